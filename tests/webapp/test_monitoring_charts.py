"""The continuing chart of a reference model: its own run rules, the training points before the
first batch, the derived charts (EWMA of T², MEWMA, combined index) and the stored arrays.

Outside sources beside the checks:
- Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn
  (the set-up of ``test_batches``).
- Training T²: Tracy, Young & Mason (1992), J. Quality Technology 24(2): for the n training
  samples, T² (n / (n-1)^2) follows Beta(A/2, (n-A-1)/2), so the mean T² is A (n-1) / n; scores
  against scikit-learn ``PCA`` on the autoscaled training data (sample SD, ddof=1).
- EWMA recursion z_i = lam x_i + (1 - lam) z_(i-1), z_0 = target, and its exact-variance limits:
  Roberts (1959), Technometrics 1(3); Lucas & Saccucci (1990), Technometrics 32(1); the mean and
  variance of the F distribution from scipy.
- MEWMA: Lowry, Woodall, Champ & Rigdon (1992), Technometrics 34(1), 46-53, eq. (1)-(3).
- Combined index phi = SPE / delta^2 + T² / chi2_(action)(A): Yue & Qin (2001), Ind. Eng. Chem.
  Res. 40(20), 4403-4414; chi-squared quantile from scipy.
- Run rules: Nelson (1984), J. Quality Technology 16(4), test 3 (six points steadily increasing).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from scipy import stats
from sklearn.decomposition import PCA
from test_batches import (  # noqa: F401 - team is a fixture
    COMPONENTS,
    N_TRAIN,
    UNITS,
    _ok,
    as_csv,
    held_out,
    team,
    training,
    upload_batch,
    variables,
)

from analysis import monitoring as mon
from analysis.modelfile import model_from_dict
from webapp.services import batches


def _propose(client, analyst, run_rules=None, name="Cellar 2"):
    upload = client.post("/api/v1/datasets", data={"file": (io.BytesIO(as_csv(training(), UNITS)), "cellar.csv"),
                                                   "id_column": "sample"},
                         headers=analyst.headers, content_type="multipart/form-data")
    dataset_id = _ok(upload, 201)["dataset"]["id"]
    model = _ok(client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": COMPONENTS},
                            headers=analyst.headers))["model"]
    body = {"model_id": model["id"], "name": name}
    if run_rules is not None:
        body["run_rules"] = run_rules
    return client.post("/api/v1/reference-models", json=body, headers=analyst.headers)


def _approved(client, team, run_rules=None) -> dict:
    proposed = _ok(_propose(client, team["analyst"], run_rules), 201)["reference_model"]
    return _ok(client.post(f"/api/v1/reference-models/{proposed['id']}/approve",
                           json={"password": team["reviewer"].password, "comment": "ok"},
                           headers=team["reviewer"].headers))["reference_model"]


def _drift(start: int, count: int):
    """Held-out samples with alcohol rising by one sample SD per run (a steady drift)."""
    frame = held_out().head(count).copy()
    sd = training()["alcohol"].std(ddof=1)
    frame["alcohol"] = training()["alcohol"].mean() + sd * 0.3 * np.arange(start, start + count)
    frame["sample"] = [f"R-{start + k}" for k in range(count)]
    return frame


def _chart(client, who, ref_id, **query):
    return _ok(client.get(f"/api/v1/reference-models/{ref_id}/chart", query_string=query,
                          headers=who.headers))["chart"]


def test_run_rules_are_chosen_per_reference_model_and_frozen_in_its_file(client, team):
    only_beyond = [{"rule": "beyond", "level": "action"}]
    ref = _approved(client, team, only_beyond)
    assert [(r["id"], r["source"]) for r in ref["run_rules"]] == [
        ("beyond-action", "Western Electric (1956) rule 1; Nelson (1984) test 1")]
    frozen = _ok(client.get(f"/api/v1/reference-models/{ref['id']}/model.json", headers=team["viewer"].headers))
    assert frozen["extra"]["reference_model"]["limits"]["run_rules"] == only_beyond
    # a six-point rise that Nelson's test 3 would flag is not a rule of this reference model
    batch = _ok(upload_batch(client, team["analyst"], ref["id"], as_csv(_drift(0, 7), UNITS)), 201)["batch"]
    assert not any(r["rule"].endswith("trend") for s in batch["samples"] for r in s["rules"])
    assert _chart(client, team["viewer"], ref["id"])["run_rules"] == ref["run_rules"]


def test_the_default_rules_apply_when_none_are_given(client, team):
    ref = _approved(client, team)
    assert [r["id"] for r in ref["run_rules"]] == ["beyond-action", "2-of-3-beyond-warning", "8-one-side", "6-trend"]


@pytest.mark.parametrize("rules, words", [
    ([], "non-empty list"),
    ([{"rule": "zigzag"}], "unknown run rule 'zigzag'"),
    ([{"rule": "run", "length": 1000}], "from 2 to 50"),
    ([{"rule": "run", "length": "8"}], "whole number"),
    ([{"rule": "beyond", "level": "action"}, {"rule": "beyond", "level": "action"}], "more than once"),
    ({"rule": "beyond"}, "non-empty list"),
])
def test_bad_run_rules_are_a_400_naming_the_field(client, team, rules, words):
    answer = _propose(client, team["analyst"], rules)
    assert answer.status_code == 400, answer.get_json()
    error = answer.get_json()["error"]
    assert error["field"] == "run_rules" and words in error["message"]


def test_the_chart_shows_the_training_samples_before_the_new_ones(client, team):
    ref = _approved(client, team)
    points = _chart(client, team["viewer"], ref["id"])["training"]
    assert len(points["samples"]) == N_TRAIN
    t2 = np.asarray(points["t2"])
    assert t2.mean() == pytest.approx(COMPONENTS * (N_TRAIN - 1) / N_TRAIN, rel=1e-10)  # Tracy, Young & Mason
    z = training()[variables()].to_numpy()
    z = (z - z.mean(axis=0)) / z.std(axis=0, ddof=1)
    reference = PCA(n_components=COMPONENTS).fit(z)
    scores = reference.transform(z)
    assert np.allclose(np.abs(points["scores"]), np.abs(scores), atol=1e-9)
    assert np.allclose(t2, (scores**2 / reference.explained_variance_).sum(axis=1), rtol=1e-9)
    assert points["t2_limit"] == ref["limits"]["action"]["t2_training"]


def test_derived_charts_follow_their_published_recursions(client, team):
    ref = _approved(client, team)
    empty = _chart(client, team["viewer"], ref["id"], derived="mewma")["derived"]
    assert empty["values"] == [] and empty["title"] == "MEWMA of the scores"
    _ok(upload_batch(client, team["analyst"], ref["id"], as_csv(held_out(), UNITS)), 201)
    chart = _chart(client, team["viewer"], ref["id"], derived="ewma-t2")
    t2 = np.array(chart["series"]["t2"])
    n, a, lam = N_TRAIN, COMPONENTS, 0.2
    scale = a * (n + 1) * (n - 1) / (n * (n - a))
    mean = scale * float(stats.f.mean(a, n - a))
    sd = scale * float(stats.f.std(a, n - a))
    z, expected = mean, []
    for x in t2:
        z = lam * x + (1 - lam) * z
        expected.append(z)
    derived = chart["derived"]
    assert np.allclose(derived["values"], expected, rtol=1e-12)
    steps = np.arange(1, t2.size + 1)
    assert np.allclose(derived["upper"], mean + 3 * sd * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * steps))))

    mewma = _chart(client, team["viewer"], ref["id"], derived="mewma")["derived"]
    scores = np.array(chart["series"]["scores"]).T
    assert len(mewma["values"]) == scores.shape[0] and mewma["action"] > 0
    frozen = _ok(client.get(f"/api/v1/reference-models/{ref['id']}/model.json", headers=team["viewer"].headers))
    lam_m = 0.1
    lambdas = np.asarray(frozen["eigenvalues"], dtype=float)[:COMPONENTS]
    zm = np.zeros(COMPONENTS)
    for i, x in enumerate(scores, start=1):
        zm = lam_m * x + (1 - lam_m) * zm
        factor = lam_m / (2 - lam_m) * (1 - (1 - lam_m) ** (2 * i))
        assert mewma["values"][i - 1] == pytest.approx(float(np.sum(zm**2 / (factor * lambdas))), rel=1e-10)

    combined = _chart(client, team["viewer"], ref["id"], derived="combined")["derived"]
    spe = np.array(chart["series"]["spe"])
    delta2 = ref["limits"]["action"]["spe"]
    tau2 = stats.chi2.ppf(ref["confidence"]["action"], COMPONENTS)
    assert np.allclose(combined["values"], spe / delta2 + t2 / tau2, rtol=1e-12)
    assert combined["warning"] < combined["action"]


def test_an_unknown_derived_chart_is_a_400(client, team):
    ref = _approved(client, team)
    answer = client.get(f"/api/v1/reference-models/{ref['id']}/chart?derived=cusum", headers=team["viewer"].headers)
    assert answer.status_code == 400 and answer.get_json()["error"]["field"] == "statistic"


def test_rules_over_the_last_window_equal_rules_over_the_whole_series(app, client, team):
    """Each upload looks back only at the last (longest window - 1) samples; across many small
    batches the violations equal a run of the same rules over the whole chart at once."""
    ref = _approved(client, team)
    for start in range(0, 28, 4):
        _ok(upload_batch(client, team["analyst"], ref["id"], as_csv(_drift(start, 4), UNITS)), 201)
    with app.app_context():
        chart = batches.chart(ref["id"], with_training=False)
    stored = sorted((v["chart"], v["rule"], v["fired_at_run"]) for v in chart["violations"])
    t2, spe = chart["series"]["t2"], chart["series"]["spe"]
    limits = ref["limits"]
    warn, act = limits["warning"], limits["action"]
    frozen = _ok(client.get(f"/api/v1/reference-models/{ref['id']}/model.json", headers=team["viewer"].headers))
    model = model_from_dict(frozen)
    levels = (ref["confidence"]["warning"], ref["confidence"]["action"])
    charts = {"t2": (t2, mon.ChartLimits(warn["t2_new"], act["t2_new"], model.t2_limit(0.5, new=True))),
              "spe": (spe, mon.ChartLimits(warn["spe"], act["spe"], model.spe_limit(0.5, limits["spe_method"])))}
    for a in range(COMPONENTS):
        charts[f"PC{a + 1}"] = (chart["series"]["scores"][a], mon.score_limits(model, a, levels))
    whole = sorted((name, v.rule_id, v.fired_at + 1) for name, (values, lim) in charts.items()
                   for v in mon.check_run_rules(values, lim, mon.DEFAULT_RULES))
    assert stored == whole
    assert any(len(v["batches"]) > 1 for v in chart["violations"])  # windows that span batches were found
