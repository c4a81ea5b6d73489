"""The README stays true: its quick start is what CI runs, and its tour runs."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def _blocks(lang: str = "") -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", README, flags=re.S)


def test_quick_start_is_two_commands_and_ci_runs_the_test_one():
    quick = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = [b.strip() for b in re.findall(r"```\n(.*?)```", quick, flags=re.S)]
    assert len(commands) == 2
    assert "quadkit inspect demo_data/" in commands[0]
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert commands[1] in ci  # exactly the README's test command
    demo = commands[0].split("quadkit inspect ", 1)[1].split()[0]
    assert (ROOT / demo).exists()


def test_tour_and_pipeline_run():
    blocks = _blocks("python")
    assert len(blocks) == 2  # the tour, and the pipeline on a dask.distributed cluster
    for code in blocks:
        r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                           text=True, timeout=600)
        assert r.returncode == 0, r.stderr[-2000:]
    assert "bench_tone.sigmf-meta" in r.stdout  # the pipeline went through the demo files
