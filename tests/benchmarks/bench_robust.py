"""Benchmark: a robust fit (ROBPCA, ``RobustPCAModel``) against the classical fit (``PCAModel``) on the same data.

Run by hand (not part of the test suite):

    .venv/bin/python tests/benchmarks/bench_robust.py [--n 100000] [--p 50] [--components 5] [--repeats 3]

Target (issue "Outliers that hide each other"): a robust fit of 100,000 x 50 with 5 components takes
less than 10 times the classical fit of the same data. Both fits do all their work: preprocessing
(robust: median and MAD), the model, and the training distances (classical: T2 and SPE; robust:
score and orthogonal distances, both cut-offs, regions, explained shares). Timings are the best of
interleaved repeats, so a busy machine hurts both alike; wall time and CPU time of the process are
both printed (with one BLAS thread, ``OPENBLAS_NUM_THREADS=1``, CPU time is what the fit costs
whatever else runs on the machine). The data are invented (seeded numpy): 10
latent directions, noise, and 5 % of the samples shifted off the plane, so the robust steps have
outliers to deal with. Record the printed lines in docs/performance.md.
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np
from threadpoolctl import threadpool_info

from analysis.pca import PCAModel
from analysis.robust import RobustPCAModel

TARGET_RATIO = 10.0


def invented(n: int, p: int, seed: int = 0) -> np.ndarray:
    """10 latent directions of decreasing strength, unit noise, non-zero means, 5 % shifted samples."""
    rng = np.random.default_rng(seed)
    k = min(10, p)
    X = (rng.standard_normal((n, k)) * np.linspace(5.0, 1.0, k)) @ rng.standard_normal((k, p))
    X += rng.standard_normal((n, p)) + rng.uniform(-20, 20, size=p)
    shifted = rng.choice(n, size=n // 20, replace=False)
    X[shifted, 0] += 15.0
    return X


def best_of(repeats: int, *jobs):
    """(best wall times, best CPU times, last results) of the jobs, interleaved ``repeats`` times."""
    wall = [np.inf] * len(jobs)
    cpu = [np.inf] * len(jobs)
    results = [None] * len(jobs)
    for _ in range(repeats):
        for i, job in enumerate(jobs):
            start, start_cpu = time.perf_counter(), time.process_time()
            results[i] = job()
            wall[i] = min(wall[i], time.perf_counter() - start)
            cpu[i] = min(cpu[i], time.process_time() - start_cpu)
    return wall, cpu, results


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=100_000)
    parser.add_argument("--p", type=int, default=50)
    parser.add_argument("--components", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    X = invented(args.n, args.p)
    k = args.components
    (t_classical, t_robust), (c_classical, c_robust), (classical, robust) = best_of(
        args.repeats,
        lambda: PCAModel(n_components=k).fit(X),
        lambda: RobustPCAModel(n_components=k).fit(X),
    )
    ratio = t_robust / t_classical
    beyond = (classical.t2_ > classical.t2_limit(0.95)) | (classical.spe_ > classical.spe_limit(0.95))
    classical_flagged = int(beyond.sum())
    cpu_ratio = c_robust / c_classical
    blas = ", ".join(sorted({f"{i['internal_api']} {i['num_threads']} thread(s)" for i in threadpool_info()}))
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} CPU(s); BLAS: {blas}")
    print(f"data: {args.n:,} x {args.p}, {k} components, best of {args.repeats}")
    print(f"classical PCAModel.fit:     {t_classical:7.2f} s wall, {c_classical:7.2f} s CPU")
    print(f"robust RobustPCAModel.fit:  {t_robust:7.2f} s wall, {c_robust:7.2f} s CPU  "
          f"(h = {robust.h_:,}, flagged {int(robust.flags_.sum()):,}; "
          f"classical flagged at 95%: {classical_flagged:,})")
    print(f"ratio robust / classical:   {ratio:7.1f} x wall, {cpu_ratio:5.1f} x CPU  (target < {TARGET_RATIO:g} x "
          f"wall: {'met' if ratio < TARGET_RATIO else 'NOT met'})")


if __name__ == "__main__":
    main()
