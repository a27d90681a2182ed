"""New batches against an approved reference model: scoring, run rules across batches, outcomes.

Outside sources beside the checks:
- Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn;
  the model is fitted on the first 45 samples of cultivar 1, the other 14 are new samples. The unit
  labels of the units row are invented for the test.
- Scores, T2 and SPE of new samples: scikit-learn ``PCA`` (``fit`` / ``transform``) on the
  autoscaled training data (sample SD, ddof=1) and numpy: T2 = sum_a t_a^2 / lambda_a with
  lambda_a = ``explained_variance_``; SPE = ||z - t P'||^2 (Jackson 1991, A User's Guide to
  Principal Components, section 1.7).
- New-observation T2 limit: NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3, and
  Tracy, Young & Mason (1992): A (n+1)(n-1) / (n (n-A)) F(conf; A, n-A), F quantile from scipy.
- Reconstruction-based contributions: Alcala & Qin (2009), Automatica 45:1593, who prove that a
  large enough fault along one variable gives that variable the largest SPE contribution.
- Run rules: Nelson (1984), J. Quality Technology 16(4), test 3: six points in a row steadily
  increasing.
- Signatures: US FDA 21 CFR Part 11, 11.50 (printed name, date and time, meaning) and 11.200(a).
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest
from review_helpers import actor
from scipy import stats
from sklearn.decomposition import PCA
from sqlalchemy.exc import DBAPIError
from wine_data import wine_frame

from analysis.modelfile import model_from_dict
from webapp.services import audit
from webapp.store import get_engine, session_scope
from webapp.store.tables import Batch, BatchOutcome, BatchSample, ReviewLogEntry

UNITS = {"alcohol": "% v/v", "malic_acid": "g/L", "magnesium": "mg/L", "proline": "mg/L"}  # invented labels
N_TRAIN, COMPONENTS = 45, 3


def cultivar_one() -> pd.DataFrame:
    frame = wine_frame()
    return frame[frame["cultivar"] == "cultivar 1"].reset_index(drop=True)


def as_csv(frame: pd.DataFrame, units: dict[str, str] | None = None) -> bytes:
    """CSV bytes, with a units row under the header when ``units`` is given."""
    lines = frame.to_csv(index=False).splitlines()
    if units is not None:
        lines.insert(1, ",".join(units.get(c, "au") if c not in ("sample", "cultivar") else ""
                                 for c in frame.columns))
    return ("\n".join(lines) + "\n").encode("utf-8")


def training() -> pd.DataFrame:
    return cultivar_one().head(N_TRAIN)


def held_out() -> pd.DataFrame:
    return cultivar_one().iloc[N_TRAIN:].reset_index(drop=True)


def variables() -> list[str]:
    return list(wine_frame().columns[2:])


# --- a signed reference model ----------------------------------------------------------


def _ok(response, status=200):
    assert response.status_code == status, response.get_json()
    return response.get_json()


def approved_reference_model(client, analyst, reviewer) -> int:
    upload = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(as_csv(training(), UNITS)), "cellar.csv"),
                                  "id_column": "sample"},
        headers=analyst.headers, content_type="multipart/form-data",
    )
    dataset_id = _ok(upload, 201)["dataset"]["id"]
    model = _ok(client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": COMPONENTS},
                            headers=analyst.headers))["model"]
    proposed = _ok(client.post("/api/v1/reference-models", json={"model_id": model["id"], "name": "Cellar 1"},
                               headers=analyst.headers), 201)["reference_model"]
    _ok(client.post(f"/api/v1/reference-models/{proposed['id']}/approve",
                    json={"password": reviewer.password, "comment": "checked"}, headers=reviewer.headers))
    return proposed["id"]


@pytest.fixture
def team(app):
    return {role: actor(app, role, f"{role.title()} Person") for role in ("viewer", "analyst", "reviewer")}


@pytest.fixture
def ref_id(client, team):
    return approved_reference_model(client, team["analyst"], team["reviewer"])


@pytest.fixture
def frozen(client, team, ref_id):
    download = client.get(f"/api/v1/reference-models/{ref_id}/model.json", headers=team["viewer"].headers)
    return model_from_dict(json.loads(download.data))


def upload_batch(client, who, ref_id, raw: bytes, filename="batch.csv", **form):
    data = {"file": (io.BytesIO(raw), filename), **form}
    return client.post(f"/api/v1/reference-models/{ref_id}/batches", data=data, headers=who.headers,
                       content_type="multipart/form-data")


def stored_counts(app):
    with app.app_context(), session_scope() as s:
        return (s.query(Batch).count(), s.query(BatchSample).count(), s.query(BatchOutcome).count(),
                [e.action for e in s.query(ReviewLogEntry).order_by(ReviewLogEntry.seq)])


# --- numbers against outside references ------------------------------------------------


def test_held_out_samples_match_scikit_learn_and_numpy(client, team, ref_id):
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(held_out(), UNITS)), 201)["batch"]
    assert batch["n_samples"] == 14 and batch["state"] in ("open", "reviewed")
    train = training()[variables()].to_numpy(float)
    new = held_out()[variables()].to_numpy(float)
    mean, sd = train.mean(axis=0), train.std(axis=0, ddof=1)
    pca = PCA(n_components=COMPONENTS).fit((train - mean) / sd)
    z = (new - mean) / sd
    expected_scores = pca.transform(z)
    served = np.array([s["scores"] for s in batch["samples"]])
    signs = np.sign(np.sum(served * expected_scores, axis=0))  # a component's sign is arbitrary
    np.testing.assert_allclose(served, expected_scores * signs, rtol=1e-9, atol=1e-10)
    t2 = np.sum(expected_scores**2 / pca.explained_variance_, axis=1)
    spe = np.sum((z - expected_scores @ pca.components_) ** 2, axis=1)
    np.testing.assert_allclose([s["t2"] for s in batch["samples"]], t2, rtol=1e-9)
    np.testing.assert_allclose([s["spe"] for s in batch["samples"]], spe, rtol=1e-9)
    # NIST/SEMATECH 6.5.4.3: new-observation T2 limit at the action (0.99) and warning (0.95) levels.
    n, a = N_TRAIN, COMPONENTS
    for key, conf in (("t2_limit", 0.99), ("t2_warning_limit", 0.95)):
        expected = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(conf, a, n - a)
        assert batch["samples"][0][key] == pytest.approx(expected, rel=1e-12)
    for s in batch["samples"]:
        assert s["t2_exceeds"] == (s["t2"] > s["t2_limit"]) and s["spe_exceeds"] == (s["spe"] > s["spe_limit"])
        assert s["flagged"] == (s["t2_exceeds"] or s["spe_exceeds"] or bool(s["rules"]))
    assert batch["n_flagged"] == sum(s["flagged"] for s in batch["samples"])


def test_server_and_offline_apply_agree_to_the_last_bit(client, team, ref_id, tmp_path):
    raw = as_csv(held_out(), UNITS)
    batch = _ok(upload_batch(client, team["analyst"], ref_id, raw), 201)["batch"]
    download = client.get(f"/api/v1/reference-models/{ref_id}/model.json", headers=team["viewer"].headers)
    (tmp_path / "model.json").write_bytes(download.data)
    (tmp_path / "batch.csv").write_bytes(raw)
    from webapp.cli import main

    assert main(["apply", str(tmp_path / "model.json"), str(tmp_path / "batch.csv"), "--out",
                 str(tmp_path / "out")]) == 0
    # round_trip: the default float parser of older pandas can be one unit in the last place off
    offline = pd.read_csv(tmp_path / "out" / "samples.csv", float_precision="round_trip").set_index("sample")
    assert list(offline.index) == [s["sample"] for s in batch["samples"]]
    for s in batch["samples"]:
        row = offline.loc[s["sample"]]
        assert [row[f"PC{a + 1}"] for a in range(COMPONENTS)] == s["scores"]
        assert row["t2"] == s["t2"] and row["spe"] == s["spe"]
        assert bool(row["t2_exceeds"]) == s["t2_exceeds"] and bool(row["spe_exceeds"]) == s["spe_exceeds"]
    # The stored batch reads back with the same numbers, also as CSV.
    again = _ok(client.get(f"/api/v1/batches/{batch['id']}", headers=team["viewer"].headers))["batch"]
    assert [s["spe"] for s in again["samples"]] == [s["spe"] for s in batch["samples"]]
    csv = client.get(f"/api/v1/batches/{batch['id']}/samples.csv", headers=team["viewer"].headers)
    table = pd.read_csv(io.BytesIO(csv.data), float_precision="round_trip")
    assert csv.mimetype == "text/csv" and list(table["t2"]) == [s["t2"] for s in batch["samples"]]


def test_a_planted_fault_gets_the_largest_spe_reconstruction_contribution(client, team, ref_id, frozen):
    sample = held_out().iloc[[0]].copy()
    sd = training()["magnesium"].std(ddof=1)
    sample["magnesium"] += 12 * sd  # a large single-variable fault (Alcala & Qin 2009, section 4)
    sample["sample"] = "FAULT-1"
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(sample)), 201)["batch"]
    [checked] = batch["samples"]
    assert checked["spe_exceeds"] and checked["flagged"]
    got = _ok(client.get(f"/api/v1/batches/{batch['id']}/contributions/FAULT-1", headers=team["viewer"].headers))
    rbc = got["reconstruction"]["spe"]
    assert max(rbc, key=rbc.get) == "magnesium"
    assert set(got["t2"]) == set(got["spe"]) == set(variables())
    assert sum(got["spe"].values()) == pytest.approx(checked["spe"], rel=1e-9)  # squared residuals sum to SPE
    assert "magnesium" in got["explanation"]["sentence"] and got["explanation"]["driver"] == "spe"
    assert client.get(f"/api/v1/batches/{batch['id']}/contributions/NOPE",
                      headers=team["viewer"].headers).status_code == 404


def test_a_sample_with_a_missing_value_is_scored_by_projection_and_marked(client, team, ref_id, frozen):
    sample = held_out().head(2).copy()
    sample.loc[0, "ash"] = np.nan  # an empty cell
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(sample)), 201)["batch"]
    assert [s["incomplete"] for s in batch["samples"]] == [True, False]
    # Projection to the model plane (Nelson, Taylor & MacGregor 1996): t = (P_o'P_o)^-1 P_o' z_o.
    z = frozen.preprocess(sample[variables()])[0]
    observed = ~np.isnan(z)
    p_o = frozen.loadings_[observed]
    expected = np.linalg.solve(p_o.T @ p_o, p_o.T @ z[observed])
    np.testing.assert_allclose(batch["samples"][0]["scores"], expected, rtol=1e-10)
    got = _ok(client.get(f"/api/v1/batches/{batch['id']}/contributions/{sample['sample'][0]}",
                         headers=team["viewer"].headers))
    assert got["reconstruction"]["spe"]["ash"] is None and got["spe"]["ash"] is None


# --- bad input: a clear 4xx, nothing stored, the log unchanged -----------------------------


def _refused(app, response, status, *words):
    body = response.get_json()
    assert response.status_code == status, body
    assert body["ok"] is False and body["error"]["code"]
    for word in words:
        assert word in body["error"]["message"], body["error"]["message"]


def test_bad_batches_are_refused_and_nothing_is_stored(app, client, team, ref_id):
    analyst = team["analyst"]
    before = stored_counts(app)
    frame = held_out()
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(frame.drop(columns=["proline"]))), 400,
             "missing", "proline")
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(frame, {**UNITS, "proline": "g/L"})), 400,
             "unit", "proline", "mg/L")
    texty = frame.copy()
    texty["proline"] = ["high", "low"] * 7
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(texty)), 400, "proline")
    _refused(app, upload_batch(client, analyst, ref_id, b""), 400)
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(frame.head(0))), 400)
    _refused(app, upload_batch(client, team["viewer"], ref_id, as_csv(frame)), 403)
    _refused(app, upload_batch(client, analyst, 9999, as_csv(frame)), 404)
    assert stored_counts(app) == before

    extra = frame.head(3).assign(colour_note=[1.0, 2.0, 3.0])
    first = _ok(upload_batch(client, analyst, ref_id, as_csv(extra)), 201)["batch"]
    assert any("colour_note" in w and "ignored" in w for w in first["warnings"])
    after_first = stored_counts(app)
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(extra), "again.csv"), 409,
             f"batch {first['id']}")
    overlapping = frame.iloc[2:6]
    _refused(app, upload_batch(client, analyst, ref_id, as_csv(overlapping)), 409,
             frame["sample"][2], f"batch {first['id']}")
    assert stored_counts(app) == after_first
    retest = _ok(upload_batch(client, analyst, ref_id, as_csv(overlapping), retest="true"), 201)["batch"]
    assert retest["retest"] is True and [s["run_index"] for s in retest["samples"]] == [4, 5, 6, 7]


def test_batches_only_against_an_approved_reference_model(app, client, team, ref_id):
    reviewer2 = actor(app, "reviewer", "Second Reviewer")
    model_id = _ok(client.get(f"/api/v1/reference-models/{ref_id}", headers=team["viewer"].headers))[
        "reference_model"]["model_id"]
    proposed = _ok(client.post("/api/v1/reference-models", json={"model_id": model_id, "name": "Cellar 1b"},
                               headers=team["analyst"].headers), 201)["reference_model"]["id"]
    _refused(app, upload_batch(client, team["analyst"], proposed, as_csv(held_out())), 409, "proposed")
    _ok(client.post(f"/api/v1/reference-models/{ref_id}/retire",
                    json={"password": reviewer2.password, "comment": "line closed"}, headers=reviewer2.headers))
    before = stored_counts(app)
    _refused(app, upload_batch(client, team["analyst"], ref_id, as_csv(held_out())), 409, "retired")
    assert stored_counts(app) == before


def test_outcomes_are_signed_append_only_and_close_the_batch(app, client, team, ref_id):
    frame = held_out()
    faulty = frame.copy()
    faulty.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(faulty)), 201)["batch"]
    flagged = [s["sample"] for s in batch["samples"] if s["flagged"]]
    calm = [s["sample"] for s in batch["samples"] if not s["flagged"]]
    assert flagged and calm and batch["state"] == "open"
    url = f"/api/v1/batches/{batch['id']}/outcomes"
    reviewer = team["reviewer"]
    body = {"samples": flagged, "outcome": "assignable_cause", "cause": "balance drift", "reason": "bench log",
            "password": reviewer.password}
    before = stored_counts(app)
    _refused(app, client.post(url, json={**body, "samples": [calm[0]]}, headers=reviewer.headers), 400,
             "not flagged", calm[0])
    _refused(app, client.post(url, json={**body, "samples": ["NOPE"]}, headers=reviewer.headers), 400, "NOPE")
    _refused(app, client.post(url, json={**body, "reason": " "}, headers=reviewer.headers), 400, "reason")
    _refused(app, client.post(url, json={**body, "cause": ""}, headers=reviewer.headers), 400, "cause")
    _refused(app, client.post(url, json={**body, "outcome": "fine"}, headers=reviewer.headers), 400, "outcome")
    _refused(app, client.post(url, json=body, headers=team["analyst"].headers), 403)
    assert stored_counts(app) == before
    _refused(app, client.post(url, json={**body, "password": "wrong"}, headers=reviewer.headers), 403, "password")
    counts = stored_counts(app)
    assert counts[:3] == before[:3] and counts[3] == [*before[3], "sign_failed"]

    first = _ok(client.post(url, json={**body, "samples": flagged[:1]}, headers=reviewer.headers))["batch"]
    assert first["state"] == ("reviewed" if len(flagged) == 1 else "open")
    done = _ok(client.post(url, json={**body, "samples": flagged, "outcome": "rejected", "cause": None},
                           headers=reviewer.headers))["batch"]
    assert done["state"] == "reviewed" and done["reviewed_at"].endswith("Z")
    row = next(s for s in done["samples"] if s["sample"] == flagged[0])
    # The correction is a new signed entry; the first outcome stays on record.
    assert [o["outcome"] for o in row["outcomes"]] == ["assignable_cause", "rejected"]
    assert row["outcome"]["printed_name"] == reviewer.display_name and row["outcome"]["signed_at"].endswith("Z")
    actions = stored_counts(app)[3]
    assert actions[-2:] == ["batch_outcome_signed", "batch_outcome_signed"]
    with app.app_context(), session_scope() as s:
        assert audit.verify_chain(s)[0]


# --- run rules across batches -----------------------------------------------------------


def test_a_drift_across_two_batches_is_caught_by_a_run_rule(client, team, ref_id, frozen):
    """Six samples with SPE rising step by step, three per batch, all within the warning limit:
    Nelson (1984) test 3 fires at the sixth, across the batch boundary."""
    names = variables()
    base_frame = held_out()
    warning = frozen.spe_limit(0.95)
    spe0 = frozen.spe(base_frame[names])
    base = base_frame.iloc[[int(np.argmin(spe0))]][names]
    loadings = frozen.loadings_
    j = int(np.argmin(np.sum(loadings**2, axis=1)))  # the variable most outside the model plane
    residual = frozen.residuals(base)[0, j]
    c_jj = 1.0 - float(np.sum(loadings[j] ** 2))
    start, target = float(np.min(spe0)), float(np.min(spe0)) + (warning - float(np.min(spe0))) / 2
    # SPE(k) = SPE0 + 2 k d |r_j| + k^2 d^2 C~_jj: the step d (scaled units) that reaches target at k = 5.
    d = (-10 * abs(residual) + np.sqrt(100 * residual**2 + 100 * c_jj * (target - start))) / (50 * c_jj)
    step = d * frozen.scale_[j] * np.sign(residual)
    drift = pd.concat([base] * 6, ignore_index=True)
    drift[names[j]] += step * np.arange(6)
    drift.insert(0, "sample", [f"D-{k + 1}" for k in range(6)])
    spe = frozen.spe(drift[names])
    assert np.all(np.diff(spe) > 0) and np.all(spe < warning)  # the construction holds
    assert np.all(frozen.hotelling_t2(drift[names]) < frozen.t2_limit(0.99, new=True))

    one = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(drift.head(3)), "week1.csv"), 201)["batch"]
    two = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(drift.tail(3)), "week2.csv"), 201)["batch"]
    assert not any(s["spe_exceeds"] or s["t2_exceeds"] for s in one["samples"] + two["samples"])
    last = two["samples"][-1]
    trend = [r for r in last["rules"] if r["chart"] == "spe" and r["rule"] == "6-trend"]
    assert trend == [{
        "chart": "spe", "rule": "6-trend", "label": "6 points in a row steadily increasing or decreasing",
        "source": "Nelson (1984) test 3", "side": "rising",
        "samples": ["D-1", "D-2", "D-3", "D-4", "D-5", "D-6"], "run_indices": [1, 2, 3, 4, 5, 6],
        "batches": [one["id"], two["id"]],
    }]
    assert last["flagged"] and two["n_flagged"] >= 1 and two["state"] == "open"
    chart = _ok(client.get(f"/api/v1/reference-models/{ref_id}/chart", headers=team["viewer"].headers))["chart"]
    assert chart["series"]["sample"] == [f"D-{k + 1}" for k in range(6)]
    assert [(b["id"], b["first_run"], b["last_run"]) for b in chart["batches"]] == [(one["id"], 1, 3),
                                                                                 (two["id"], 4, 6)]
    assert any(v["rule"] == "6-trend" and v["fired_at_sample"] == "D-6" for v in chart["violations"])
    csv = client.get(f"/api/v1/reference-models/{ref_id}/chart.csv", headers=team["viewer"].headers)
    assert csv.status_code == 200 and "Nelson (1984) test 3" in csv.data.decode()


# --- the database guards the records, on SQLite and PostgreSQL ----------------------------


def test_batch_records_are_guarded_on_both_databases(app_factory, database_url, tmp_path):
    app = app_factory(DATABASE_URL=database_url, HOME=str(tmp_path / "both"))
    client = app.test_client()
    analyst, reviewer = actor(app, "analyst", "Ana Analyst"), actor(app, "reviewer", "Rita Reviewer")
    ref = approved_reference_model(client, analyst, reviewer)
    faulty = held_out()
    faulty.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)
    batch = _ok(upload_batch(client, analyst, ref, as_csv(faulty)), 201)["batch"]
    flagged = [s["sample"] for s in batch["samples"] if s["flagged"]]
    _ok(client.post(f"/api/v1/batches/{batch['id']}/outcomes",
                    json={"samples": flagged, "outcome": "no_cause_accepted", "reason": "re-measured, in range",
                          "password": reviewer.password}, headers=reviewer.headers))
    with app.app_context(), session_scope() as s:
        calm = s.query(BatchSample).filter_by(batch_id=batch["id"], flagged=False).first().id
        assert audit.verify_chain(s)[0]
    for statement in (
        "UPDATE batch_outcomes SET outcome = 'rejected'",
        "DELETE FROM batch_outcomes",
        "UPDATE batch_samples SET spe = 0",
        "DELETE FROM batch_samples",
        f"UPDATE batches SET n_flagged = 0 WHERE id = {batch['id']}",
        f"UPDATE batches SET state = 'open' WHERE id = {batch['id']}",
        f"DELETE FROM batches WHERE id = {batch['id']}",
        "INSERT INTO batch_outcomes (batch_sample_id, outcome, reason, signer_id, printed_name, signed_at) "
        f"VALUES ({calm}, 'rejected', 'x', {reviewer.id}, 'x', CURRENT_TIMESTAMP)",
    ):
        with pytest.raises(DBAPIError):
            with get_engine(app).begin() as conn:
                conn.exec_driver_sql(statement)
    got = _ok(client.get(f"/api/v1/batches/{batch['id']}", headers=reviewer.headers))["batch"]
    assert got["state"] == "reviewed" and got["n_flagged"] == len(flagged)


def test_migration_downgrades_and_upgrades_again(database_url):
    from alembic import command
    from alembic.config import Config
    from sqlalchemy import inspect

    from webapp.store import current_revision, make_engine, migrate
    from webapp.store.engine import MIGRATIONS

    engine = make_engine(database_url)
    try:
        migrate(engine)
        head = current_revision(engine)
        assert {"batches", "batch_samples", "batch_outcomes"} <= set(inspect(engine).get_table_names())
        with engine.begin() as connection:
            config = Config()
            config.set_main_option("script_location", str(MIGRATIONS))
            config.attributes["connection"] = connection
            command.downgrade(config, "0003_reference_models")
        assert "batches" not in set(inspect(engine).get_table_names())
        migrate(engine)
        assert current_revision(engine) == head
    finally:
        engine.dispose()
