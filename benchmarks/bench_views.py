"""Display reduction speed: quadkit.views.envelope_bins against the plain numpy way.

Run on demand: ``python benchmarks/bench_views.py``. Prints MS/s (million samples per second)
for min/max envelopes of I, Q and |z| over 2000 bins, and the bytes a time plot sends to the
browser, for captures up to 2**25 samples (numpy) and a lazy (dask) capture.
"""

from __future__ import annotations

import json
import time

import numpy as np


def _best(func, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def _plain(x: np.ndarray, bins: int):
    # The plain numpy way: reshape to (bins, n / bins) and reduce (needs n divisible by bins).
    parts = (x.real, x.imag, np.abs(x))
    return [(p.reshape(bins, -1).min(axis=1), p.reshape(bins, -1).max(axis=1)) for p in parts]


def main() -> None:
    import dask.array as da
    from bokeh.embed import json_item

    import quadkit
    from quadkit import views

    bins = 2000
    rng = np.random.default_rng(0)
    print(f"{'samples':>12} {'quadkit MS/s':>14} {'numpy MS/s':>12} {'ratio':>7} {'plot bytes':>12}")
    for exp in (20, 23, 25):
        n = 2**exp
        n -= n % bins  # so that the plain reshape works
        x = (rng.standard_normal(n, dtype=np.float32)
             + 1j * rng.standard_normal(n, dtype=np.float32)).astype(np.complex64)
        t_q = _best(lambda: views.envelope_bins(x, bins))
        t_n = _best(lambda: _plain(x, bins))
        cap = quadkit.capture(x, sample_rate=10e6)
        size = len(json.dumps(json_item(views.time_plot(cap))))
        print(f"{n:>12,} {n / t_q / 1e6:>14.1f} {n / t_n / 1e6:>12.1f} {t_n / t_q:>7.2f} "
              f"{size:>12,}")
    n = 2**24
    lazy = da.random.default_rng(1).standard_normal(n, chunks=2**21).astype(np.float32) * (1 + 0j)
    lazy = lazy.astype(np.complex64)
    t_l = _best(lambda: views.envelope_bins(lazy, bins), repeat=1)
    print(f"lazy {n:,} samples (chunks of 2**21, generated on the fly): {n / t_l / 1e6:.1f} MS/s")


if __name__ == "__main__":
    main()
