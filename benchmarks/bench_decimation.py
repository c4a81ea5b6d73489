"""Speed of channel extraction against the plain numpy/scipy way, measured in the same run.

Run on demand: ``python benchmarks/bench_decimation.py``. The plain way is what a user would
write: multiply by ``np.exp(-2j*pi*f*n/fs)`` and call ``scipy.signal.decimate(z, 8,
ftype="fir")`` (a 161-tap Hamming FIR that reaches only about 50 dB stopband). quadkit's
``extract_channel`` does the shift, an 80 dB low-pass and the decimation by 8.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import scipy.signal as ss

import quadkit
from quadkit.decimation import extract_channel

N = 2**23
FS = 8e6
OFFSET = 1.234e6
FACTOR = 8
BANDWIDTH = 0.8 * FS / FACTOR  # the widest channel that decimates by 8


def best_of(fn, repeats=5):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> None:
    rng = np.random.default_rng(0)
    x = (rng.standard_normal(N) + 1j * rng.standard_normal(N)).astype(np.complex64)
    cap = quadkit.capture(x, sample_rate=FS)

    def plain():
        n = np.arange(N)
        z = x * np.exp(-2j * np.pi * OFFSET * n / FS)
        return ss.decimate(z, FACTOR, ftype="fir")

    def ours():
        return extract_channel(cap, OFFSET, BANDWIDTH)

    t_plain, ref = best_of(plain, 3)
    t_ours, out = best_of(ours, 5)
    assert out.attrs["sample_rate"] == FS / FACTOR and out.dtype == np.complex64
    print(f"samples: 2^23 complex64, shift {OFFSET:g} Hz, decimate by {FACTOR}")
    print(f"plain numpy exp + scipy.signal.decimate(fir): {t_plain * 1e3:8.1f} ms "
          f"{N / t_plain / 1e6:8.1f} MS/s  (output {ref.dtype})")
    print(f"quadkit extract_channel (80 dB):             {t_ours * 1e3:8.1f} ms "
          f"{N / t_ours / 1e6:8.1f} MS/s  (output {out.dtype})")
    print(f"ratio: {t_plain / t_ours:.1f}x")
    # numpy reports its buffers to tracemalloc: peak extra memory of one call
    tracemalloc.start()
    extract_channel(cap, OFFSET, BANDWIDTH)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"peak temporary memory of extract_channel: {peak / x.nbytes:.2f} x the capture "
          f"({peak / 2**20:.0f} MiB for a {x.nbytes / 2**20:.0f} MiB capture)")
    # the shift alone, for reference (NCO by block phasors from the exact phase)
    t_shift, _ = best_of(lambda: quadkit.mixing.shift(cap, -OFFSET), 5)
    t_exp, _ = best_of(lambda: x * np.exp(-2j * np.pi * OFFSET * np.arange(N) / FS), 3)
    print(f"shift alone: quadkit {N / t_shift / 1e6:.1f} MS/s, numpy exp {N / t_exp / 1e6:.1f} "
          f"MS/s, ratio {t_exp / t_shift:.1f}x")


if __name__ == "__main__":
    main()
