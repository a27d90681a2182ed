"""Benchmark: checking new batches against an approved reference model, through the JSON API.

Measured through Flask's test client (no network) on invented data (seeded normal
noise around three latent factors, 50 variables): one batch of ``--batch`` new
samples posted to ``/api/v1/reference-models/<id>/batches`` (intake, column match,
scoring, limits, run rules over the continuing series, store), then, after
``--batches`` such batches, the chart endpoint of every checked sample.

References measured in the same run and process: ``pandas.read_csv`` of the same
bytes and ``PCAModel.transform`` of the same matrix (for the upload), and
``json.dumps`` of an equally long list of plain dicts (for the chart). Printed as
seconds and as ratios. Then the peak memory (``tracemalloc``) while one more batch is
checked, against the batch table's size. The issue's targets: a 10,000-sample batch
under 1 s, the chart of 100,000 checked samples under 1 s, memory within 3x the batch
table.

Not part of the default test run. Usage:

    .venv/bin/python tests/benchmarks/bench_batches.py [--batch 10000] [--batches 3] [--cols 50]
"""

from __future__ import annotations

import argparse
import io
import json
import tempfile
import time
import tracemalloc

import numpy as np
import pandas as pd

from analysis.pca import PCAModel
from webapp import auth
from webapp.api.responses import json_text
from webapp.app import create_app
from webapp.services import batches
from webapp.store import accounts, session_scope


def _frame(rows: int, cols: int, start: int, rng) -> pd.DataFrame:
    loadings = np.random.default_rng(7).normal(size=(3, cols))
    values = rng.normal(size=(rows, 3)) @ loadings + 0.3 * rng.normal(size=(rows, cols))
    frame = pd.DataFrame(values, columns=[f"x{j + 1}" for j in range(cols)])
    frame.insert(0, "sample", [f"S{start + i:07d}" for i in range(rows)])
    return frame


def _timed(fn):
    started = time.perf_counter()
    result = fn()
    return result, time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--train", type=int, default=500)
    parser.add_argument("--batch", type=int, default=10_000)
    parser.add_argument("--batches", type=int, default=3)
    parser.add_argument("--cols", type=int, default=50)
    args = parser.parse_args()
    rng = np.random.default_rng(20261204)

    app = create_app({"SECRET_KEY": "bench", "HOME": tempfile.mkdtemp(prefix="latentdesk-bench-")})
    people = {}
    with app.app_context(), session_scope() as s:
        for name, role in (("ana", "analyst"), ("rowan", "reviewer")):
            user = accounts.add_user(s, name, role, auth.hash_password(f"{name}-password-bench"))
            people[name] = {"Authorization": f"Bearer {auth.create_token(s, user.id)}"}
    client = app.test_client()

    def ok(response, status=200):
        assert response.status_code == status, response.get_json()
        return response.get_json()

    training = _frame(args.train, args.cols, 0, rng)
    upload = ok(client.post("/api/v1/datasets", data={"file": (io.BytesIO(training.to_csv(index=False).encode()),
                                                                "train.csv"), "id_column": "sample"},
                            headers=people["ana"], content_type="multipart/form-data"), 201)
    model = ok(client.post(f"/api/v1/datasets/{upload['dataset']['id']}/models", json={"components": 3},
                           headers=people["ana"]))["model"]
    ref = ok(client.post("/api/v1/reference-models", json={"model_id": model["id"], "name": "bench"},
                         headers=people["ana"]), 201)["reference_model"]["id"]
    ok(client.post(f"/api/v1/reference-models/{ref}/approve",
                   json={"password": "rowan-password-bench", "comment": "bench"}, headers=people["rowan"]))

    fitted = PCAModel(n_components=3).fit(training.iloc[:, 1:].to_numpy())
    print(f"reference model: {args.train} training samples x {args.cols} variables, 3 components")
    for b in range(args.batches):
        batch = _frame(args.batch, args.cols, 1_000_000 * (b + 1), rng)
        raw = batch.to_csv(index=False).encode()
        answer, seconds = _timed(lambda: client.post(
            f"/api/v1/reference-models/{ref}/batches", data={"file": (io.BytesIO(raw), f"batch{b}.csv")},
            headers=people["ana"], content_type="multipart/form-data"))
        ok(answer, 201)
        _, t_read = _timed(lambda: pd.read_csv(io.BytesIO(raw)))
        _, t_transform = _timed(lambda: fitted.transform(batch.iloc[:, 1:].to_numpy()))
        reference = t_read + t_transform
        print(f"  batch {b + 1} ({args.batch} samples, {len(raw) / 1024**2:.1f} MB): {seconds:6.3f} s"
              f"   {seconds / reference:6.1f} x read_csv + transform ({reference:.3f} s)")

    # Memory: peak of Python's (and numpy's) allocations while the server checks one more batch and
    # encodes its answer, the uploaded bytes already in memory (the test client's own copies of the
    # request are left out), against the batch table (its DataFrame, ids included). Target: within 3x.
    extra = _frame(args.batch, args.cols, 1_000_000 * (args.batches + 1), rng)
    raw = extra.to_csv(index=False).encode()
    table_bytes = extra.memory_usage(deep=True).sum()
    with app.test_request_context():
        with session_scope() as s:
            row = accounts.get_user_by_name(s, "ana")
            analyst = auth.CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role)
        tracemalloc.start()
        answer = json_text({"ok": True, "batch": batches.check_batch(ref, raw, "extra.csv", analyst)})
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    del answer
    print(f"  memory while checking one batch: peak {peak / 1024**2:.1f} MB = {peak / table_bytes:.2f} x the batch"
          f" table ({table_bytes / 1024**2:.1f} MB); the upload itself is {len(raw) / 1024**2:.1f} MB")

    checked = args.batch * (args.batches + 1)
    answer, t_chart = _timed(lambda: client.get(f"/api/v1/reference-models/{ref}/chart", headers=people["ana"]))
    ok(answer)
    plain = [{"run": i, "batch": 1, "sample": f"S{i:07d}", "t2": 1.0, "spe": 0.5, "scores": [0.1, 0.2, 0.3],
              "violations": []} for i in range(checked)]
    _, t_dumps = _timed(lambda: json.dumps(plain))
    print(f"  chart of {checked} checked samples: {t_chart:6.3f} s   {t_chart / t_dumps:6.1f} x json.dumps of plain"
          f" rows ({t_dumps:.3f} s)")


if __name__ == "__main__":
    main()
