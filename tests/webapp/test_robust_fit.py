"""Robust PCA (ROBPCA) as a fit option: API, cache, command line, side-by-side lists, saved views.

Sources named beside each check:
- Hubert, M., Rousseeuw, P.J., Vanden Branden, K. (2005) ROBPCA: a new approach to robust
  principal component analysis. Technometrics 47(1), 64-79: the subset size
  h = max([alpha n], [(n + k + 1) / 2]) with alpha = 0.75, the score-distance cut-off
  sqrt(chi2_{k, conf}) and the orthogonal-distance cut-off (t + s z_conf)^(3/2), t and s the
  univariate MCD of OD^(2/3) (Wilson, E.B., Hilferty, M.M. 1931, PNAS 17, 684-688); and the
  masking effect the outlier map shows: a group of outliers pulls the classical PCA towards
  itself.
- Rousseeuw, P.J., Leroy, A.M. (1987) Robust Regression and Outlier Detection, ch. 4 (the
  univariate MCD as the h-window of least variance), Croux & Haesbroeck (1999) consistency
  factor and the 97.5 % reweighting of Rousseeuw & Van Driessen (1999): written out below as
  the reference for the OD cut-off.
- scipy.stats chi2 and norm quantiles.

Data: a planted test case, invented with seeded numpy (not measurements): 800 samples near a
2-dimensional plane in 10 variables and a group of 200 shifted by 8 along a third variable,
off that plane. The group is large enough to pull the classical first component towards
itself, which is the situation the robust fit is for.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from analysis.robust import RobustPCAModel
from review_helpers import actor
from webapp import cli, url_state
from webapp.services import ingest, method_comparison, modelling, review
from webapp.services.fit_settings import FitSettings

N_CLEAN, N_GROUP, P, K = 800, 200, 10, 2
LEVEL = 0.95


def planted_frame(seed: int = 0) -> pd.DataFrame:
    """The invented masked-group data (see the module docstring); ids P0001..., group G0801..."""
    rng = np.random.default_rng(seed)
    n = N_CLEAN + N_GROUP
    scores = rng.standard_normal((n, 2)) * [3.0, 2.0]
    X = rng.standard_normal((n, P)) * 0.5
    X[:, :2] += scores
    X[N_CLEAN:, 2] += 8.0
    frame = pd.DataFrame(X, columns=[f"v{j + 1:02d}" for j in range(P)])
    frame.insert(0, "sample", [f"P{i + 1:04d}" for i in range(N_CLEAN)] + [f"G{i + 1:04d}" for i in range(N_CLEAN, n)])
    return frame


GROUP = [f"G{i + 1:04d}" for i in range(N_CLEAN, N_CLEAN + N_GROUP)]


def expected_h(n: int, k: int, alpha: float = 0.75) -> int:
    # Hubert et al. (2005), section 3: h = max([alpha n], [(n + kmax + 1) / 2]).
    return max(int(alpha * n), (n + k + 1) // 2)


def reference_od_cutoff(od: np.ndarray, h: int, confidence: float) -> float:
    """(t + s z)^(3/2) with t, s the reweighted univariate MCD of OD^(2/3), every h-window tried."""
    y = np.asarray(od, dtype=float) ** (2.0 / 3.0)
    n = y.size
    ys = np.sort(y)
    windows = np.array([ys[j: j + h] for j in range(n - h + 1)])
    best = windows[np.argmin(windows.var(axis=1))]

    def factor(a):  # Croux & Haesbroeck (1999) for one dimension
        return a / stats.chi2.cdf(stats.chi2.ppf(a, 1), 3)

    t_raw, v_raw = best.mean(), best.var() * factor(h / n)
    kept = y[(y - t_raw) ** 2 / v_raw < stats.chi2.ppf(0.975, 1)]
    t, s = kept.mean(), np.sqrt(kept.var() * factor(0.975))
    return float((t + s * stats.norm.ppf(confidence)) ** 1.5)


@pytest.fixture
def analyst(app):
    return actor(app, "analyst", "Ana Lyst")


@pytest.fixture
def planted_id(client, analyst):
    raw = planted_frame().to_csv(index=False).encode()
    response = client.post("/api/v1/datasets", data={"file": (io.BytesIO(raw), "planted.csv"), "id_column": "sample"},
                           headers=analyst.headers, content_type="multipart/form-data")
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


@pytest.fixture
def robust_fits(monkeypatch):
    """Counts every RobustPCAModel.fit call in this process."""
    calls = []
    original = RobustPCAModel.fit

    def counting(self, *args, **kwargs):
        calls.append(self.n_components)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(RobustPCAModel, "fit", counting)
    return calls


def _fit(client, who, dataset_id, **settings):
    return client.post(f"/api/v1/datasets/{dataset_id}/models", json=settings, headers=who.headers)


# ------------------------------------------------------------------------- API
def test_api_robust_fit_answers_the_method_h_and_the_published_cutoffs(client, analyst, planted_id):
    answer = _fit(client, analyst, planted_id, components=K, method="robust", confidence=LEVEL)
    assert answer.status_code == 200, answer.get_json()
    model = answer.get_json()["model"]
    assert model["method"] == "robust" and model["settings"]["method"] == "robust"
    robust = model["robust"]
    n = N_CLEAN + N_GROUP
    assert robust["h"] == expected_h(n, K) == 750
    # Hubert et al. (2005): SD cut-off sqrt(chi2_{k, conf}); scipy's quantile.
    assert robust["sd_cutoff"] == pytest.approx(np.sqrt(stats.chi2.ppf(LEVEL, K)), rel=1e-12)
    # The limits the classical model's interface reports are the squared cut-offs.
    assert model["t2_limit"] == pytest.approx(robust["sd_cutoff"] ** 2, rel=1e-12)
    assert model["spe_limit"] == pytest.approx(robust["od_cutoff"] ** 2, rel=1e-12)
    # OD cut-off: the paper's formula written out on the model's own orthogonal distances.
    samples = client.get(f"/api/v1/models/{model['id']}/samples", headers=analyst.headers).get_json()["samples"]
    od = np.sqrt([s["spe"] for s in samples])
    assert robust["od_cutoff"] == pytest.approx(reference_od_cutoff(od, robust["h"], LEVEL), rel=1e-9)
    assert robust["rank"] == P and "keeps every dimension" in robust["first_step"]


@pytest.mark.parametrize("method", ["ROBPCA", "", 1, ["robust"]])
def test_a_bad_method_is_a_400_naming_the_field(client, analyst, planted_id, method):
    answer = _fit(client, analyst, planted_id, components=K, method=method)
    assert answer.status_code == 400
    body = answer.get_json()
    assert body["ok"] is False and body["error"]["code"] == "bad_input"
    assert body["error"]["field"] == "method"
    assert "'method' must be one of classical, robust" in body["error"]["message"]


def test_more_variables_than_samples_are_reduced_first_and_said_so(client, analyst):
    # Hubert et al. (2005), stage 1: with p > n the data are first reduced to the affine subspace the
    # n samples span (rank at most n - 1). Invented data: 12 samples x 30 variables, seeded numpy.
    rng = np.random.default_rng(5)
    frame = pd.DataFrame(rng.standard_normal((12, 30)), columns=[f"x{j:02d}" for j in range(30)])
    frame.insert(0, "sample", [f"S{i:02d}" for i in range(12)])
    raw = frame.to_csv(index=False).encode()
    made = client.post("/api/v1/datasets", data={"file": (io.BytesIO(raw), "wide.csv"), "id_column": "sample"},
                       headers=analyst.headers, content_type="multipart/form-data")
    assert made.status_code == 201, made.get_json()
    answer = _fit(client, analyst, made.get_json()["dataset"]["id"], components=2, method="robust")
    assert answer.status_code == 200, answer.get_json()
    robust = answer.get_json()["model"]["robust"]
    assert robust["rank"] == 11
    assert "reduced the 30 variables (more variables than samples) to the 11 dimensions" in robust["first_step"]


# ------------------------------------------------------------------ the cache
def test_the_method_is_part_of_the_fingerprint_and_a_repeated_robust_fit_is_a_cache_hit(
        app, analyst, planted_id, robust_fits):
    with app.app_context():
        _, classical = modelling.get_model(planted_id, {"components": K}, user_id=analyst.id)
        _, first = modelling.get_model(planted_id, {"components": K, "method": "robust"}, user_id=analyst.id)
        fits = len(robust_fits)
        _, again = modelling.get_model(planted_id, {"components": K, "method": "robust", "confidence": 0.99},
                                       user_id=analyst.id)
        dataset = ingest.dataset_info(planted_id)
    assert fits == 1 and len(robust_fits) == fits  # the second robust request never refits
    assert classical["fingerprint"] != first["fingerprint"]
    assert (first["cache_hit"], again["cache_hit"]) == (False, True)
    assert again["id"] == first["id"] and again["fingerprint"] == first["fingerprint"]
    # A stricter level from the same fit: wider cut-offs, computed, not refitted (scipy's chi2 again).
    assert again["robust"]["sd_cutoff"] == pytest.approx(np.sqrt(stats.chi2.ppf(0.99, K)), rel=1e-12)
    assert again["robust"]["od_cutoff"] > first["robust"]["od_cutoff"]
    # The classical fingerprint is what it was before the option existed (no method in its hash).
    settings = FitSettings.parse({"components": K}, dataset["variables"])
    assert modelling.fingerprint_for(dataset, settings, K) == classical["fingerprint"]
    assert modelling.fingerprint_for(dataset, settings.replace(method="robust"), K) == first["fingerprint"]


# ---------------------------------------------------------------- command line
def test_summary_json_from_the_command_line_records_method_h_and_cutoffs(app, analyst, planted_id, tmp_path, capsys):
    path = tmp_path / "planted.csv"
    planted_frame().to_csv(path, index=False)
    out = tmp_path / "out"
    code = cli.main(["fit", str(path), "--id-column", "sample", "--components", str(K), "--method", "robust",
                     "--out", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "by ROBPCA (h=750)" in captured.out
    summary = json.loads((out / "summary.json").read_text())
    assert summary["method"] == "robust"
    robust = summary["robust"]
    assert robust["h"] == expected_h(N_CLEAN + N_GROUP, K)
    assert robust["confidence"] == 0.95
    assert robust["sd_cutoff"] == pytest.approx(np.sqrt(stats.chi2.ppf(0.95, K)), rel=1e-12)
    samples = pd.read_csv(out / "samples.csv")
    assert robust["od_cutoff"] == pytest.approx(
        reference_od_cutoff(samples["orthogonal_distance"].to_numpy(), robust["h"], 0.95), rel=1e-9)
    np.testing.assert_allclose(samples["spe"], samples["orthogonal_distance"] ** 2, rtol=1e-12)
    assert set(samples["region"]) <= {"regular", "far along the model", "off the model plane", "far and off"}
    assert not (out / "model.json").exists()  # apply scores against classical models only
    # The command line and the web app agree on the fingerprint of the same file and settings.
    with app.app_context():
        _, web = modelling.get_model(planted_id, {"components": K, "method": "robust"}, user_id=analyst.id)
    assert summary["fingerprint"] == web["fingerprint"]


def test_the_command_line_refuses_an_unknown_method(tmp_path, capsys):
    path = tmp_path / "planted.csv"
    planted_frame().head(50).to_csv(path, index=False)
    with pytest.raises(SystemExit) as refused:
        cli.main(["fit", str(path), "--method", "median", "--out", str(tmp_path / "out")])
    assert refused.value.code == 2
    assert "--method" in capsys.readouterr().err


# -------------------------------------------------------------- side by side
def test_side_by_side_lists_show_the_planted_group_flagged_by_robust_and_not_classical(app, analyst, planted_id):
    # Hubert et al. (2005): the shifted group masks itself in the classical fit; the robust fit flags it.
    with app.app_context():
        compared = method_comparison.side_by_side(planted_id, {"components": K, "confidence": LEVEL},
                                                  user_id=analyst.id)
    group = set(GROUP)
    robust_only, both = set(compared["robust_only"]) & group, set(compared["both"]) & group
    flagged_classically = (set(compared["classical_only"]) | set(compared["both"])) & group
    assert len(robust_only | both) >= 0.9 * N_GROUP  # the robust fit flags the group
    assert len(flagged_classically) < 0.5 * N_GROUP  # the classical fit, pulled towards it, does not
    assert len(robust_only) > len(both) and len(robust_only) >= 0.9 * N_GROUP - len(both)
    assert sum(compared["counts"].values()) == N_CLEAN + N_GROUP
    assert compared["robust"]["h"] == 750 and compared["n_components"] == K


def test_the_outliers_tab_draws_the_outlier_map_and_lists_both_ways(app, analyst, planted_id):
    from dash import html

    from webapp.web.pages import dataset, dataset_samples, dataset_views
    from webapp.web.ui import figures, plot_table

    state = url_state.ViewState(components=K, method="robust", tab="outliers")
    with app.app_context():
        result = dataset.fit_summary(planted_id, dataset.applied_settings(state), analyst.id)
        assert result["ok"] and result["method"] == "robust" and result["robust"]["h"] == 750
        figure = dataset_samples.outlier_map_view(result).to_plotly_json()
        panel = dataset_samples.side_by_side_panel(result)
        selection = dataset_samples.select_listed(result, None, "robust_only")
        explanation = _text(dataset_samples.explain_view(result, GROUP[1]), html)
        rows, columns, note = dataset_views.outlier_rows(result)
        _, sd_chart, od_chart = dataset_views.diagnostics_view(result, order=None)
    numbers = plot_table.figure_rows(figure)
    sd_line = f"score distance cut-off 95%: x = {np.sqrt(stats.chi2.ppf(LEVEL, K)):.4g}"
    assert sd_line in numbers.lines  # the cut-off drawn where scipy's chi2 puts it
    assert {row[0].split(" (")[0] for row in numbers.rows} <= {"regular", "far along the model",
                                                                 "off the model plane", "far and off"}
    text = _text(panel, html)
    assert "Flagged by the robust fit only" in text and "Flagged by the classical fit only" in text
    listed = selection["sample_ids"][:dataset_samples.LISTED_SHOWN]  # the robust-only samples, as written out
    assert ", ".join(listed) in text and len(set(listed) & set(GROUP)) >= 0.9 * len(listed)
    assert len(set(selection["sample_ids"]) & set(GROUP)) > N_GROUP / 2  # "Select them": most of the group
    # The explanation, the outlier table and the control charts speak of distances and cut-offs.
    assert "Score distance" in explanation and "orthogonal distance" in explanation and "T²" not in explanation
    assert note.startswith("Robust fit:") and {c.get("headerName") for c in columns} >= {"SD²", "OD²"}
    assert {r["region"] for r in rows} <= set(figures.MAP_REGION_TEXT)
    assert sd_chart.layout.yaxis.title.text == "SD² (robust)" and od_chart.layout.yaxis.title.text == "OD² (robust)"


def _text(component, html) -> str:
    if isinstance(component, str):
        return component
    if isinstance(component, (list, tuple)):
        return " ".join(_text(c, html) for c in component)
    children = getattr(component, "children", None)
    return "" if children is None else _text(children, html)


def test_robust_explanations_sum_to_the_distances(app, analyst, planted_id):
    # Westerhuis, Gurden & Smilde (2000) contributions on the robust centre and loadings: the SD^2 parts
    # sum to SD^2, the OD^2 parts (squared residuals) to OD^2.
    with app.app_context():
        _, info = modelling.get_model(planted_id, {"components": K, "method": "robust"}, user_id=analyst.id)
        explained = modelling.contributions(info["id"], GROUP[0])
    parts_t2 = sum(v["t2_contribution"] for v in explained["variables"])
    parts_spe = sum(v["spe_contribution"] for v in explained["variables"])
    assert parts_t2 == pytest.approx(explained["score_distance"] ** 2, rel=1e-9)
    assert parts_spe == pytest.approx(explained["orthogonal_distance"] ** 2, rel=1e-9)
    assert explained["method"] == "robust"
    assert explained["sentence"].startswith("Off the robust model plane")
    assert explained["ranked"][0]["variable"] == "v03"  # the planted shift is along variable 3


# ----------------------------------------------------------------- saved views
def test_a_saved_view_with_method_robust_reopens_robust(client, analyst, planted_id):
    query = url_state.to_query(url_state.ViewState(components=K, method="robust", tab="outliers"))
    assert "method=robust" in query
    assert url_state.from_query(query).method == "robust"
    assert "method" not in url_state.to_query(url_state.ViewState(components=K))  # classical links unchanged
    saved = client.post("/api/v1/views", json={"dataset_id": planted_id, "query": query, "title": "Robust view"},
                        headers=analyst.headers)
    assert saved.status_code == 201, saved.get_json()
    opened = client.get(f"/api/v1/views/{saved.get_json()['view']['id']}", headers=analyst.headers).get_json()
    assert opened["model"]["method"] == "robust" and opened["reproduced"] is True
    assert opened["model"]["robust"]["h"] == 750
    for link in opened["links"].values():
        assert url_state.from_query(link.split("?", 1)[1]).method == "robust"


# -------------------------------------------------------------- the proposal
def test_the_proposal_comparison_states_which_method_flags_each_sample(app, analyst, planted_id):
    from dash import html

    from webapp.web.pages.review import comparison_block

    with app.app_context():
        compared = method_comparison.side_by_side(planted_id, {"components": K}, user_id=analyst.id)
        masked = next(s for s in compared["robust_only"] if s in GROUP)  # a planted sample only ROBPCA flags
        regular = next(s for s in planted_frame()["sample"] if s not in compared["robust_only"]
                       and s not in compared["classical_only"] and s not in compared["both"])
        comparison = review.preview(planted_id, action="exclude", samples=[masked, regular],
                                    settings={"components": K, "method": "robust"}, user_id=analyst.id)
    rows = {r["sample"]: r for r in comparison["methods"]["samples"]}
    assert (rows[masked]["classical"], rows[masked]["robust"]) == (False, True)
    assert rows[masked]["supported_by"] == "the robust fit only"
    assert (rows[regular]["classical"], rows[regular]["robust"], rows[regular]["supported_by"]) == (
        False, False, "neither fit")
    assert comparison["settings"]["method"] == "robust"  # the before/after comparison is of robust fits
    text = _text(comparison_block(comparison), html)
    assert "Which method flags each sample" in text and "the robust fit only" in text
