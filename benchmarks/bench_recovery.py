"""Accuracy and speed of quadkit.recovery.measure_tone.

Run on demand: ``python benchmarks/bench_recovery.py [--quick]``.

Accuracy: mean squared frequency error over the Cramer-Rao bound (Rife & Boorstyn 1974,
``var(w) >= 6 / (rho N (N^2 - 1))`` for a complex tone, ``rho = A^2 / sigma^2``; for a real
tone ``12 / ((2 pi)^2 eta N (N^2 - 1))`` cycles^2 with ``eta = A^2 / (2 sigma^2)``), in dB,
against the per-sample SNR, for several lengths N; random frequency and phase per trial. The
plain way (FFT peak bin, then an inner product there) is shown for contrast: its error is
the bin quantisation, ~1/(12 N^2) cycles^2, whatever the SNR.

Speed: samples per second of measure_tone on in-memory and lazy (dask, 1e6-sample chunks)
complex64 captures, and of the plain numpy way measured in the same run.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy.stats import chi2

import quadkit
from quadkit import recovery


def _trials(n: int, count: int, snr_db: float, real: bool, rng: np.random.Generator):
    rho = 10 ** (snr_db / 10)
    k = np.arange(n)
    if real:
        f = rng.uniform(0.05, 0.45, count)
        ph = rng.uniform(-np.pi, np.pi, count)
        sigma = math.sqrt(1 / (2 * rho))
        x = np.cos(2 * np.pi * f[:, None] * k + ph[:, None])
        x += sigma * rng.standard_normal((count, n))
    else:
        f = rng.uniform(-0.45, 0.45, count)
        ph = rng.uniform(-np.pi, np.pi, count)
        sigma = math.sqrt(1 / rho)
        x = np.exp(1j * (2 * np.pi * f[:, None] * k + ph[:, None]))
        x += sigma * (rng.standard_normal((count, n)) + 1j * rng.standard_normal((count, n))) / math.sqrt(2)
    return x, f


def _crlb_cycles2(n: int, snr_db: float, real: bool) -> float:
    rho = 10 ** (snr_db / 10)
    if real:
        return 12 / ((2 * np.pi) ** 2 * rho * n * (n**2 - 1))
    return 6 / (rho * n * (n**2 - 1)) / (2 * np.pi) ** 2


def _plain(x: np.ndarray) -> tuple[float, complex]:
    """The plain numpy way: FFT peak bin, then the complex inner product at that bin."""
    n = x.size
    k = int(np.argmax(np.abs(np.fft.fft(x))))
    f = np.fft.fftfreq(n)[k]
    a = np.vdot(np.exp(2j * np.pi * f * np.arange(n)), x) / n
    return f, a


def accuracy(quick: bool) -> None:
    rng = np.random.default_rng(2026)
    snrs = [0.0, 5.0, 10.0, 20.0, 30.0, 40.0]
    # (N, trials, SNRs); long captures get fewer trials and SNRs (time), so their cells
    # scatter more: the last column is the central 95 % range of an efficient estimator's
    # cell (its MSE / CRLB is chi-square with 'trials' degrees of freedom over 'trials')
    lengths = [(256, 400, snrs), (4096, 200, snrs), (65_536, 60, snrs),
               (1_000_000, 24, [10.0, 20.0, 30.0])]
    if not quick:
        lengths.append((10_000_000, 16, [10.0, 30.0]))
    for real in (False, True):
        kind = "real" if real else "complex"
        print(f"\nfrequency MSE / CRLB (dB), {kind} tone")
        print("N".rjust(10) + "".join(f"{s:>9.0f} dB" for s in snrs)
              + "  plain@30dB  trials  95% range (dB)")
        for n, count, these in lengths:
            row = f"{n:>10d}"
            for snr in snrs:
                if snr not in these:
                    row += f"{'':>12}"
                    continue
                errs = []
                done = 0
                while done < count:
                    batch = min(count - done, max(1, 4_000_000 // n))
                    x, f = _trials(n, batch, snr, real, rng)
                    try:
                        res = recovery.measure_tone(quadkit.capture(x, sample_rate=1.0))
                        errs.append(res.offset_hz.values - f)
                    except quadkit.MeasurementError:
                        errs.append(np.full(batch, np.nan))
                    done += batch
                e = np.concatenate(errs)
                if np.isnan(e).any():
                    row += f"{'(no tone)':>12}"
                else:
                    row += f"{10 * np.log10(np.mean(e**2) / _crlb_cycles2(n, snr, real)):>12.2f}"
            x, f = _trials(n, 1 if n > 100_000 else 20, 30.0, False, rng)
            pe = np.array([_plain(xi)[0] - fi for xi, fi in zip(x, f)])
            row += f"{10 * np.log10(np.mean(pe**2) / _crlb_cycles2(n, 30.0, False)):>12.1f}"
            lo, hi = 10 * np.log10(chi2.ppf([0.025, 0.975], count) / count)
            print(row + f"{count:>8d}  {lo:+.1f} .. {hi:+.1f}")


def speed(quick: bool) -> None:
    import dask
    import dask.array as da

    rng = np.random.default_rng(7)
    print("\nspeed, complex64 capture, one tone at 20 dB SNR (best of 3)")
    print(f"{'N':>10} {'measure_tone':>14} {'lazy (1e6 chunks)':>18} {'plain numpy':>12} "
          f"{'ratio':>7}")
    sizes = [100_000, 1_000_000] + ([] if quick else [10_000_000])
    for n in sizes:
        k = np.arange(n)
        x = (np.exp(2j * np.pi * 0.1234567 * k)
             + 0.1 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
        cap = quadkit.capture(x, sample_rate=1.0)
        lazy = quadkit.capture(da.from_array(x, chunks=1_000_000), sample_rate=1.0)

        def best(fn):
            times = []
            for _ in range(3):
                t = time.perf_counter()
                fn()
                times.append(time.perf_counter() - t)
            return min(times)

        t_ours = best(lambda: recovery.measure_tone(cap))
        with dask.config.set(scheduler="threads"):
            t_lazy = best(lambda: recovery.measure_tone(lazy).compute())
        t_plain = best(lambda: _plain(x))
        print(f"{n:>10d} {n / t_ours / 1e6:>10.1f} MS/s {n / t_lazy / 1e6:>13.1f} MS/s "
              f"{n / t_plain / 1e6:>7.1f} MS/s {t_plain / t_ours:>7.2f}")
    print("ratio = plain time / measure_tone time (above 1: measure_tone is faster)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="skip the 1e7-sample cases")
    args = parser.parse_args()
    accuracy(args.quick)
    speed(args.quick)


if __name__ == "__main__":
    main()
