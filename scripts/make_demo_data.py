"""Write the demo captures into demo_data/ (fixed seed: the same bytes every run).

    python3 scripts/make_demo_data.py [--overwrite]
"""

import argparse
from pathlib import Path

from quadkit.demo import write_demo

if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--overwrite", action="store_true")
    args = parser.parse_args()
    target = Path(__file__).resolve().parent.parent / "demo_data"
    for path, text in write_demo(target, overwrite=args.overwrite):
        print(f"{path.relative_to(target.parent)}: {text}")
