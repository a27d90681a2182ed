"""Cost of choosing the number of components, relative to one PCA fit of the same data.

Not part of the default test run. Usage:

    .venv/bin/python tests/benchmarks/bench_rank.py

For each shape it prints the wall time of ``choose_components`` (cross-validation,
parallel analysis, broken stick) and its ratio to ``PCAModel(n_components=5).fit``
and to scikit-learn's ``PCA(n_components=5, svd_solver="full")`` measured in the same run,
and the peak memory of ``choose_components`` (tracemalloc) against the input matrix.
Targets at 1,000,000 x 50: under 1.5 s, peak memory at most 1.5 x the input.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
from sklearn.decomposition import PCA

from analysis.pca import PCAModel
from analysis.rank import choose_components

SHAPES = [(1_000_000, 50), (200_000, 100), (20_000, 50), (2_000, 5_000), (500, 40)]


def _seconds(work) -> float:
    start = time.perf_counter()
    work()
    return time.perf_counter() - start


def _peak_ratio(work, X) -> float:
    tracemalloc.start()
    work()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / X.nbytes


def main() -> None:
    rng = np.random.default_rng(0)
    print(f"{'shape':>14} {'rank s':>8} {'fit s':>8} {'sklearn s':>10} {'rank/fit':>9} {'rank/sklearn':>13} "
          f"{'peak/input':>11}")
    for n, p in SHAPES:
        X = rng.standard_normal((n, 5)) @ rng.standard_normal((5, p)) + rng.standard_normal((n, p))
        rank_s = _seconds(lambda: choose_components(X))
        fit_s = _seconds(lambda: PCAModel(n_components=5).fit(X))
        z = (X - X.mean(axis=0)) / X.std(axis=0, ddof=1)
        sk_s = _seconds(lambda: PCA(n_components=5, svd_solver="full").fit(z))
        del z
        peak = _peak_ratio(lambda: choose_components(X), X)
        print(f"{n:>7}x{p:<6} {rank_s:8.2f} {fit_s:8.2f} {sk_s:10.2f} {rank_s / fit_s:9.1f} {rank_s / sk_s:13.1f} "
              f"{peak:11.2f}", flush=True)
        if (n, p) == (1_000_000, 50):
            print(f"  targets: under 1.5 s {'OK' if rank_s < 1.5 else 'MISSED'}; "
                  f"peak <= 1.5 x input {'OK' if peak <= 1.5 else 'MISSED'}", flush=True)


if __name__ == "__main__":
    main()
