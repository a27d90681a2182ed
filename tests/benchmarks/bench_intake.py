"""Benchmark: intake of a large numeric CSV against a plain pandas.read_csv of the same file.

Target (issue 3): a 1,000,000 x 20 numeric CSV (about 150 MB) is read, typed and
reported by ``analysis.intake.read_path`` in at most 2x the time of
``pandas.read_csv(path, engine="c")``, with peak memory at most 3x the parsed table.

Both are measured in the same run, each in a fresh Python process (so one run's
memory cannot hide in the other's), best of ``--repeat`` runs. Peak memory is the
rise of the process high-water mark (``VmHWM``, reset just before the read) over
its resident size just before the read; the parsed table is ``Table.data``
(values + sample-id index) for intake, the DataFrame for pandas.

Not part of the default test run. Usage:

    .venv/bin/python tests/benchmarks/bench_intake.py [--rows 1000000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

CHILD = r"""
import json, resource, sys, time
kind, path = sys.argv[1], sys.argv[2]
import pandas as pd
from analysis.intake import read_path

def rss():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * resource.getpagesize()

def high_water():
    # VmHWM belongs to this process image; ru_maxrss would inherit the parent's peak across exec.
    with open("/proc/self/status") as fh:
        return next(int(l.split()[1]) * 1024 for l in fh if l.startswith("VmHWM:"))

try:
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")  # reset the high-water mark to the current resident size
except OSError:
    pass
before = rss()
t0 = time.perf_counter()
if kind == "pandas":
    frame = pd.read_csv(path, engine="c")
    seconds = time.perf_counter() - t0
    table_bytes = int(frame.memory_usage(deep=True, index=True).sum())
    shape = list(frame.shape)
else:
    table, report = read_path(path)
    seconds = time.perf_counter() - t0
    table_bytes = int(table.data.memory_usage(deep=True, index=True).sum())
    shape = [table.n_samples, table.n_variables]
peak = high_water() - before
print(json.dumps({"seconds": seconds, "peak": peak, "table_bytes": table_bytes, "shape": shape}))
"""


def write_file(path: str, rows: int, columns: int = 20, seed: int = 0) -> None:
    """Invented lab-like numbers: a sample id, then ``columns`` values with 2 decimals (about 150 bytes a row)."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    names = [f"v{j + 1:02d}" for j in range(columns)]
    block = 200_000
    for start in range(0, rows, block):
        n = min(block, rows - start)
        frame = pd.DataFrame(rng.normal(500.0, 150.0, size=(n, columns)), columns=names)
        frame.insert(0, "sample", [f"S{k:07d}" for k in range(start + 1, start + n + 1)])
        frame.to_csv(path, mode="w" if start == 0 else "a", header=start == 0, index=False, float_format="%.2f")


def measure(kind: str, path: str) -> dict:
    env = dict(os.environ, PYTHONPATH=os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    out = subprocess.run([sys.executable, "-c", CHILD, kind, path], capture_output=True, text=True, env=env, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "large.csv")
        t0 = time.perf_counter()
        write_file(path, args.rows)
        size = os.path.getsize(path)
        print(f"file: {args.rows} x 20 numeric (+ id), {size / 1e6:.1f} MB, written in {time.perf_counter() - t0:.1f} s")
        runs = {"pandas": [], "intake": []}
        for _ in range(args.repeat):
            for kind in runs:  # alternate, so background load hits both alike
                runs[kind].append(measure(kind, path))
    best = {k: min(v, key=lambda r: r["seconds"]) for k, v in runs.items()}
    peak = {k: min(r["peak"] for r in v) for k, v in runs.items()}
    p, i = best["pandas"], best["intake"]
    print(f"pandas.read_csv(engine='c'): {p['seconds']:.2f} s, peak +{peak['pandas'] / 1e6:.0f} MB, frame {p['table_bytes'] / 1e6:.0f} MB")
    print(f"intake.read_path:            {i['seconds']:.2f} s, peak +{peak['intake'] / 1e6:.0f} MB, table {i['table_bytes'] / 1e6:.0f} MB, shape {i['shape']}")
    time_ratio = i["seconds"] / p["seconds"]
    memory_ratio = peak["intake"] / i["table_bytes"]
    print(f"time ratio intake/pandas: {time_ratio:.2f} (target <= 2)")
    print(f"peak memory / parsed table: {memory_ratio:.2f} (target <= 3); pandas alone: {peak['pandas'] / p['table_bytes']:.2f}")
    print("all runs (s):", {k: [round(r["seconds"], 2) for r in v] for k, v in runs.items()})


if __name__ == "__main__":
    main()
