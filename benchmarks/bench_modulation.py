"""Speed of quadkit.modulation against the plain scipy way, measured in the same run.

Run on demand: ``python benchmarks/bench_modulation.py``. Prints MS/s (output samples per
second for modulate, input samples per second for analyze) and the ratio to the reference:
``scipy.signal.upfirdn`` with the same RRC taps for modulate; for analyze, a bare matched
filter (``scipy.signal.fftconvolve``) plus picking every sps-th sample, which measures nothing
but bounds what a full blind analysis can cost.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.signal

from quadkit import modulation as qm


def best_of(fn, repeat=3):
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main() -> None:
    rng = np.random.default_rng(0)
    rs = 1e6
    for scheme, n_sym, sps in [("qpsk", 100_000, 4), ("16qam", 100_000, 8), ("256qam", 50_000, 4)]:
        k = qm.constellation(scheme).attrs["bits_per_symbol"]
        bits = rng.integers(0, 2, k * n_sym)
        cap = qm.modulate(bits, scheme, symbol_rate=rs, sample_rate=sps * rs, power_dbfs=0)
        n_out = cap.sizes["time"]
        symbols = qm.constellation(scheme).values[rng.integers(0, 2 ** k, n_sym)]
        taps = qm.rrc_taps(0.35, sps, 32)
        t_mod = best_of(lambda: qm.modulate(bits, scheme, symbol_rate=rs, sample_rate=sps * rs))
        t_ref = best_of(lambda: scipy.signal.upfirdn(taps, symbols, up=sps))
        print(f"modulate {scheme:7s} {n_sym} sym, {sps} sps: {n_out / t_mod / 1e6:7.1f} MS/s "
              f"(upfirdn {n_out / t_ref / 1e6:7.1f} MS/s, ratio {t_mod / t_ref:5.2f})")
        noisy = cap + (0.01 * (rng.standard_normal(n_out) + 1j * rng.standard_normal(n_out))).astype(np.complex64)
        x = noisy.values
        t_an = best_of(lambda: qm.analyze(noisy, scheme, symbol_rate=rs), repeat=1)
        t_mf = best_of(lambda: scipy.signal.fftconvolve(x, taps, mode="same")[::sps])
        print(f"analyze  {scheme:7s} {n_sym} sym, {sps} sps: {n_out / t_an / 1e6:7.2f} MS/s, "
              f"{n_sym / t_an / 1e3:7.1f} ksym/s (bare matched filter {n_out / t_mf / 1e6:7.1f} MS/s, "
              f"ratio {t_an / t_mf:6.1f})")
    # a non-integer rate ratio takes the exact per-sample pulse evaluation path
    bits = rng.integers(0, 2, 2 * 20_000)
    t_frac = best_of(lambda: qm.modulate(bits, "qpsk", symbol_rate=rs, sample_rate=4.37 * rs))
    n_frac = int(round((20_000 - 1 + 32) * 4.37)) + 1
    print(f"modulate qpsk    20000 sym, 4.37 sps: {n_frac / t_frac / 1e6:7.2f} MS/s (no scipy equivalent)")


if __name__ == "__main__":
    main()
