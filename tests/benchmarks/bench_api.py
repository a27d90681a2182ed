"""Benchmark: the JSON API on 100,000 samples x 10 variables, against references from the same run.

Measured through Flask's test client (no network): upload (intake + store), the
first fit (a cache miss), the same fit again (a cache hit, which must not refit),
the samples table as JSON and as CSV, and one sample's contributions.

References measured in the same run and process: ``pandas.read_csv`` of the same
bytes (for the upload), a bare ``PCAModel.fit`` of the same matrix (for the fit),
and ``json.dumps`` of an equally long list of plain dicts (for the samples JSON).
Printed as seconds and as ratios to those references. The data are invented:
seeded normal noise around three latent factors.

Not part of the default test run. Usage:

    .venv/bin/python tests/benchmarks/bench_api.py [--rows 100000] [--cols 10] [--repeat 3]
"""

from __future__ import annotations

import argparse
import io
import json
import statistics
import tempfile
import time

import numpy as np
import pandas as pd

from analysis.pca import PCAModel
from webapp import auth
from webapp.app import create_app
from webapp.store import accounts, session_scope


def _data(rows: int, cols: int) -> pd.DataFrame:
    rng = np.random.default_rng(20261201)
    factors = rng.normal(size=(rows, 3))
    values = factors @ rng.normal(size=(3, cols)) + 0.3 * rng.normal(size=(rows, cols))
    frame = pd.DataFrame(values, columns=[f"x{j + 1}" for j in range(cols)])
    frame.insert(0, "line", [f"line {i % 4 + 1}" for i in range(rows)])
    frame.insert(0, "sample", [f"S{i + 1:06d}" for i in range(rows)])
    return frame


def _best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        started = time.perf_counter()
        fn()
        times.append(time.perf_counter() - started)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--cols", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()

    frame = _data(args.rows, args.cols)
    raw = frame.to_csv(index=False).encode("utf-8")
    app = create_app({"SECRET_KEY": "bench", "HOME": tempfile.mkdtemp(prefix="latentdesk-bench-")})
    with app.app_context(), session_scope() as s:
        user = accounts.add_user(s, "bench", "analyst", auth.hash_password("x" * 16))
        headers = {"Authorization": f"Bearer {auth.create_token(s, user.id)}"}
    client = app.test_client()

    def upload(content=raw):
        response = client.post("/api/v1/datasets", data={"file": (io.BytesIO(content), "bench.csv")}, headers=headers)
        assert response.status_code == 201, response.get_json()
        return response.get_json()["dataset"]["id"]

    started = time.perf_counter()
    dataset_id = upload()
    t_upload = time.perf_counter() - started
    t_read_csv = _best(lambda: pd.read_csv(io.BytesIO(raw)), args.repeat)

    def fit():
        response = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": 3}, headers=headers)
        return response.get_json()["model"]

    started = time.perf_counter()
    model = fit()
    t_fit = time.perf_counter() - started
    assert model["cache_hit"] is False
    t_hit = _best(lambda: fit(), args.repeat)
    assert fit()["cache_hit"] is True
    matrix = frame.iloc[:, 2:].to_numpy()
    t_bare_fit = _best(lambda: PCAModel(n_components=3).fit(matrix), args.repeat)

    model_id = model["id"]
    t_samples = _best(lambda: client.get(f"/api/v1/models/{model_id}/samples", headers=headers), args.repeat)
    t_csv = _best(lambda: client.get(f"/api/v1/models/{model_id}/samples.csv", headers=headers), args.repeat)
    t_contrib = _best(lambda: client.get(f"/api/v1/models/{model_id}/contributions/S000042", headers=headers), args.repeat)
    plain = [
        {"sample_id": f"S{i:06d}", "metadata": {"line": "line 1"}, "excluded": False, "scores": [0.1, 0.2, 0.3],
         "t2": 1.0, "t2_limit": 7.8, "spe": 0.5, "spe_limit": 2.0, "flags": []}
        for i in range(args.rows)
    ]
    t_dumps = _best(lambda: json.dumps(plain), args.repeat)

    print(f"{args.rows} samples x {args.cols} variables ({len(raw) / 1024**2:.1f} MB CSV)")
    rows = [
        ("upload (intake + store)", t_upload, t_read_csv, "pandas.read_csv"),
        ("fit, cache miss", t_fit, t_bare_fit, "bare PCAModel.fit"),
        ("fit, cache hit", t_hit, t_bare_fit, "bare PCAModel.fit"),
        ("samples JSON", t_samples, t_dumps, "json.dumps of plain rows"),
        ("samples CSV", t_csv, t_dumps, "json.dumps of plain rows"),
        ("contributions, one sample", t_contrib, t_bare_fit, "bare PCAModel.fit"),
    ]
    for name, seconds, reference, label in rows:
        print(f"  {name:28s} {seconds:7.3f} s   {seconds / reference:6.2f} x {label} ({reference:.3f} s)")
    print(f"  (best of {args.repeat}; median bare fit {statistics.median([t_bare_fit]):.3f} s)")


if __name__ == "__main__":
    main()
