"""Speed of quadkit.impairments against the plain numpy way, measured in the same run.

Run on demand: ``python benchmarks/bench_impairments.py``. Prints MS/s (million samples per
second) and the ratio to a plain numpy implementation of the same arithmetic.
"""

from __future__ import annotations

import time

import numpy as np

import quadkit
from quadkit import impairments

N = 4 * 2**20
FS = 1e6


def best(func, repeat=3):
    t = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        t.append(time.perf_counter() - t0)
    return min(t)


def row(name, seconds, ref_seconds=None):
    msps = N / seconds / 1e6
    ratio = f"{ref_seconds / seconds:6.2f}x numpy" if ref_seconds else ""
    print(f"{name:44s} {msps:8.1f} MS/s  {ratio}")


def main():
    rng = np.random.default_rng(0)
    x = ((rng.standard_normal(N) + 1j * rng.standard_normal(N)) * 0.2).astype(np.complex64)
    cap = quadkit.capture(x, sample_rate=FS)
    g, phi = 10 ** (1 / 20), np.deg2rad(5.0)

    def numpy_apply():
        i, q = x.real, x.imag
        return (i + 0.01 + 1j * (g * (q * np.cos(phi) - i * np.sin(phi)) - 0.02)).astype(np.complex64)

    t_ref = best(numpy_apply)
    row("numpy: imbalance + DC", t_ref)
    row("apply: imbalance + DC", best(lambda: impairments.apply(
        cap, gain_imbalance_db=1, phase_skew_deg=5, dc_i=0.01, dc_q=-0.02)), t_ref)
    row("apply: + frequency offset", best(lambda: impairments.apply(
        cap, gain_imbalance_db=1, phase_skew_deg=5, frequency_offset_hz=1e3)), t_ref)
    row("apply: + phase-noise profile", best(lambda: impairments.apply(
        cap, phase_noise={1e3: -80, 1e5: -110}, rng=1), repeat=1), t_ref)
    row("apply: + clock offset (32-tap sinc)", best(lambda: impairments.apply(
        cap, sample_rate_offset_ppm=20), repeat=1), t_ref)

    bad = impairments.apply(cap, gain_imbalance_db=1, phase_skew_deg=5, dc_i=0.01)
    y = bad.values

    def numpy_moments():
        i, q = y.real.astype(np.float64), y.imag.astype(np.float64)
        mi, mq = i.mean(), q.mean()
        vi, vq = np.mean((i - mi) ** 2), np.mean((q - mq) ** 2)
        return np.sqrt(vq / vi), -np.mean((i - mi) * (q - mq)) / np.sqrt(vi * vq)

    t_mom = best(numpy_moments)
    row("numpy: blind moments (no uncertainty)", t_mom)
    row("estimate: blind, with jackknife", best(lambda: impairments.estimate(bad, method="blind")), t_mom)
    tone = quadkit.synth.tone(123e3, sample_rate=FS, n_samples=N, amplitude=0.5)
    tbad = impairments.apply(tone, gain_imbalance_db=1, phase_skew_deg=5)
    row("estimate: tone (two passes + search)", best(lambda: impairments.estimate(tbad, method="tone")), t_mom)
    est = impairments.estimate(bad)

    def numpy_correct():
        i = y.real - 0.01
        q = y.imag
        return (i + 1j * ((q / g + i * np.sin(phi)) / np.cos(phi))).astype(np.complex64)

    t_cor = best(numpy_correct)
    row("numpy: correct", t_cor)
    row("correct", best(lambda: impairments.correct(bad, est)), t_cor)
    lazy = quadkit._capture.like(bad, __import__("dask.array").array.from_array(y, chunks=2**20))
    row("correct (dask, 1 Mi chunks, computed)", best(lambda: impairments.correct(lazy, est).compute()), t_cor)
    row("estimate blind (dask, 1 Mi chunks)", best(lambda: impairments.estimate(lazy, method="blind")), t_mom)


if __name__ == "__main__":
    main()
