"""Cost of respondent screening, relative to one plain numpy pass over the same matrix.

Not part of the default test run. Usage:

    .venv/bin/python tests/benchmarks/bench_screening.py [--rows 100000] [--items 40] [--repeat 5]

The matrix is invented: answers 1-5 from four correlated traits, 2 % of the
respondents straight-lining and 0.5 % of the answers blank. For each part it
prints the best wall time of ``--repeat`` runs and its ratio to ``np.diff``
along the items of the same matrix (the reference: a long-string index
compares neighbouring answers, which is what np.diff touches), measured in
the same run. Target (issue "Outliers that hide each other"): the whole
screening of 100,000 x 40 under 1 s.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from analysis import screening


def invented_answers(n: int, k: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    traits = rng.standard_normal((n, 4))
    loadings = np.zeros((4, k))
    loadings[np.arange(k) % 4, np.arange(k)] = 0.8
    latent = traits @ loadings + 0.6 * rng.standard_normal((n, k))
    answers = 1 + np.searchsorted(np.array([-1.5, -0.5, 0.5, 1.5]), latent).astype(np.float64)
    liners = rng.choice(n, size=n // 50, replace=False)
    answers[liners] = rng.integers(1, 6, size=(liners.size, 1))
    blanks = rng.random((n, k)) < 0.005
    answers[blanks & ~np.isin(np.arange(n), liners)[:, None]] = np.nan
    return answers


def best_of(repeat: int, work) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--items", type=int, default=40)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    X = invented_answers(args.rows, args.items)
    complete = X[np.isfinite(X).all(axis=1)]
    parts = {
        "np.diff (reference)": lambda: np.diff(X, axis=1),
        "scale check": lambda: screening.check_item_scale(X),
        "long string": lambda: screening.long_string(X),
        "IRV": lambda: screening.response_variability(X),
        "robust distance, complete rows": lambda: screening.robust_distances(complete),
        "robust distance, with blanks": lambda: screening.robust_distances(X),
        "screen (all of it)": lambda: screening.screen(X),
    }
    print(f"{args.rows} x {args.items}, {np.isnan(X).sum()} blanks in "
          f"{args.rows - complete.shape[0]} rows, best of {args.repeat}")
    reference = None
    for name, work in parts.items():
        seconds = best_of(args.repeat, work)
        reference = reference or seconds
        print(f"{name:>32}: {seconds * 1000:9.1f} ms   x{seconds / reference:8.1f}", flush=True)
    flagged = screening.screen(X).table[list(screening.FLAG_COLUMNS)].sum()
    print("flagged:", ", ".join(f"{k} {int(v)}" for k, v in flagged.items()))


if __name__ == "__main__":
    main()
