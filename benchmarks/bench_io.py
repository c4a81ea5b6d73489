"""Reading speed of quadkit.io against the plain numpy way, measured in the same run.

Run on demand: ``python benchmarks/bench_io.py [n_samples]``. Prints mega-samples per second
(MS/s) and the ratio quadkit / numpy (1.0 = as fast; below 1 = slower).

The numpy reference for integer IQ is ``np.fromfile`` + ``astype(float32)`` +
``view(complex64)`` (no scaling: quadkit also scales to full scale 1.0, which numpy's line
leaves out, so the comparison favours numpy). The file is read once before timing so both
paths read from the page cache; the best of several repeats is reported.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from quadkit import io as qio


def best(fn, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(n: int = 1 << 23) -> None:
    rng = np.random.default_rng(1)
    folder = Path(tempfile.mkdtemp(prefix="quadkit-bench-io-"))
    cases = {
        "ci16_le": np.int16, "ci8": np.int8, "cu8": np.uint8, "ci32_le": np.int32,
        "cf32_le": np.float32,
    }
    print(f"{n} complex samples per file; best of 5; MS/s = 1e6 samples per second")
    print("read: numpy = fromfile + astype(float32) + view(complex64); quadkit = read_raw")
    print("mean power: numpy = the same read + vdot; lazy = read_raw(chunks=2**20), "
          "mean(|x|^2) on dask threads")
    print(f"{'datatype':>9} {'numpy MS/s':>11} {'quadkit MS/s':>13} {'ratio':>6}  "
          f"{'numpy pow':>10} {'lazy pow':>10} {'ratio':>6}")
    for name, np_type in cases.items():
        path = folder / f"x.{name}"
        if np.dtype(np_type).kind == "f":
            comp = rng.standard_normal(2 * n).astype(np_type)
        else:
            info = np.iinfo(np_type)
            comp = rng.integers(info.min, info.max, 2 * n, dtype=np.int64).astype(np_type)
        comp.tofile(path)
        np.fromfile(path, np_type)  # warm the page cache

        def plain():
            x = np.fromfile(path, np_type)
            if x.dtype != np.float32:
                x = x.astype(np.float32)
            return x.view(np.complex64)

        def ours():
            return qio.read_raw(path, dtype=name, sample_rate=1e6)

        def plain_power():
            x = plain()
            return float(np.vdot(x, x).real) / x.size

        def lazy_power():
            cap = qio.read_raw(path, dtype=name, sample_rate=1e6, chunks=1 << 20)
            return float((abs(cap) ** 2).mean())

        t_np, t_q = best(plain), best(ours)
        t_npp, t_l = best(plain_power, 3), best(lazy_power, 3)
        print(f"{name:>9} {n / t_np / 1e6:11.1f} {n / t_q / 1e6:13.1f} {t_np / t_q:6.2f}  "
              f"{n / t_npp / 1e6:10.1f} {n / t_l / 1e6:10.1f} {t_npp / t_l:6.2f}")
    cap = qio.read_raw(folder / "x.ci16_le", dtype="ci16_le", sample_rate=1e6)
    out = folder / "w.ci16"

    def write_np():
        scaled = np.rint(cap.values.view(np.float32) * 32768)
        np.clip(scaled, -32768, 32767, out=scaled)
        scaled.astype("<i2").tofile(out)

    def write_q():
        qio.write_raw(cap, out, dtype="ci16_le", overwrite=True)

    t_np, t_q = best(write_np), best(write_q)
    print(f"write ci16_le: numpy (rint, clip, astype, tofile) {n / t_np / 1e6:.1f} MS/s, "
          f"quadkit {n / t_q / 1e6:.1f} MS/s, ratio {t_np / t_q:.2f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1 << 23)
