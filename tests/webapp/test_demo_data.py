"""Tests of the invented demo scenarios (webapp.services.demo_data).

Most checks here are demo design checks: they confirm that our own invented
data carry the planted problems in a form an analyst would find. They are
not checks against an outside source. The PCA itself is scikit-learn's on
autoscaled data; the limits use the published formulas named beside them.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from analysis.intake import read_table
from analysis.pca import PCAModel
from webapp.services import demo_data
from webapp.services.demo_data import (
    LAB_LATER_FILENAMES,
    LAB_METADATA,
    LAB_VARIABLES,
    SURVEY_METADATA,
    SURVEY_VARIABLES,
    lab_later_batches,
    lab_later_findings,
    lab_scenario,
    planted_anomalies,
    survey_scenario,
)


# ----------------------------------------------------------- helpers

def _read(raw: bytes) -> pd.DataFrame:
    return pd.read_csv(io.BytesIO(raw), dtype=str, keep_default_na=False, encoding="utf-8")


def _numeric(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """Cells as floats: blank -> NaN, "<LOD" -> LOD/2.

    LOD/2 substitution: common practice for multivariate screening (see
    docs/references.md, "Facts of the trade").
    """

    def cell(text: str) -> float:
        if text == "":
            return np.nan
        if text.startswith("<"):
            return float(text[1:]) / 2
        return float(text)

    return np.array([[cell(v) for v in frame[c]] for c in columns]).T


def _fit(X: np.ndarray, n_components: int) -> PCAModel:
    """Autoscaled PCA of the demo table with the project's own PCAModel.

    This is what the app will fit, so the checks below ask whether the app
    would flag the planted samples. Blanks are handled by the model's
    iterative imputation; limits at 95 %: T2 by Tracy, Young & Mason (1992),
    SPE by Jackson & Mudholkar (1979), as implemented in analysis.diagnostics.
    """
    return PCAModel(n_components=n_components, scaling="autoscale", confidence=0.95).fit(X)


def _lab_fit(seed: int = demo_data.LAB_SEED):
    """(frame, batch ids, 3-component model, numeric matrix) of the lab demo."""
    frame = _read(lab_scenario(seed)[1])
    X = _numeric(frame, LAB_VARIABLES)
    return frame, list(frame["Batch"]), _fit(X, 3), X


def _survey_fit(seed: int = demo_data.SURVEY_SEED):
    """(frame, respondent ids, 4-component model, numeric matrix) of the survey demo."""
    frame = _read(survey_scenario(seed)[1])
    X = _numeric(frame, SURVEY_VARIABLES)
    return frame, list(frame["Respondent"]), _fit(X, 4), X


# ------------------------------------------------------ determinism

@pytest.mark.parametrize("scenario", [lab_scenario, survey_scenario])
def test_same_seed_gives_identical_bytes(scenario):
    assert scenario() == scenario()
    assert scenario(11)[1] == scenario(11)[1]
    assert scenario(11)[1] != scenario(12)[1]


def test_planted_ids_do_not_depend_on_the_seed():
    for name, anomalies in (("lab", planted_anomalies("lab")), ("survey", planted_anomalies("survey"))):
        for problem in anomalies.values():
            assert problem["samples"] and problem["variables"] and problem["cause"] and problem["finding"]
        ids_column = "Batch" if name == "lab" else "Respondent"
        make = lab_scenario if name == "lab" else survey_scenario
        for seed in (1, 2):
            present = set(_read(make(seed)[1])[ids_column])
            for problem in anomalies.values():
                assert set(problem["samples"]) <= present


def test_unknown_scenario_is_refused():
    with pytest.raises(ValueError, match="unknown demo scenario 'lap'"):
        planted_anomalies("lap")


# ------------------------------------------------- shapes and roles

def test_lab_file_shape_and_roles():
    filename, raw = lab_scenario()
    assert filename.endswith(".csv")
    frame = _read(raw)
    assert list(frame.columns) == ["Batch", *LAB_METADATA, *LAB_VARIABLES]
    assert len(frame) == 150 and frame["Batch"].is_unique
    assert set(frame["Site"]) == {"Site North", "Site South"}
    assert set(frame["Line"]) == {"Line A", "Line B", "Line C"}
    dates = pd.to_datetime(frame["Manufactured"], format="%Y-%m-%d")
    assert dates.is_monotonic_increasing
    # Line C is the only line at Site South.
    assert set(frame.loc[frame["Site"] == "Site South", "Line"]) == {"Line C"}

    below = frame[LAB_VARIABLES].apply(lambda c: c.str.startswith("<"))
    assert set(below.columns[below.any()]) == {"Impurity B (%)"}
    assert 1 <= int(below.to_numpy().sum()) <= 10
    assert set(frame.loc[below["Impurity B (%)"], "Impurity B (%)"]) == {"<0.05"}
    assert int((frame[LAB_VARIABLES] == "").to_numpy().sum()) == 15

    X = _numeric(frame, LAB_VARIABLES)
    assert np.all(X[~np.isnan(X)] > 0)
    assert 90 < np.nanmin(X[:, 0]) and np.nanmax(X[:, 0]) < 103  # assay stays plausible


def test_survey_file_shape_and_roles():
    filename, raw = survey_scenario()
    assert filename.endswith(".csv")
    frame = _read(raw)
    assert list(frame.columns) == ["Respondent", *SURVEY_METADATA, *SURVEY_VARIABLES]
    assert len(frame) == 320 and frame["Respondent"].is_unique
    assert set(frame["Department"]) == {"Planning", "Workshop", "Customer Care", "Logistics"}
    assert set(frame["Mode"]) == {"online", "paper"}
    answers = frame[SURVEY_VARIABLES].to_numpy()
    assert set(np.unique(answers)) == {"", "1", "2", "3", "4", "5"}
    assert int((answers == "").sum()) == 90


def test_intake_reads_both_files_without_options():
    filename, raw = lab_scenario()
    lab, report = read_table(raw, filename)
    assert lab.id_column == "Batch" and lab.variables == LAB_VARIABLES
    assert lab.metadata_columns == LAB_METADATA
    assert report.below_limit_counts == {"Impurity B (%)": raw.count(b",<0.05,")}
    assert sum(report.missing_counts.values()) == 15

    filename, raw = survey_scenario()
    survey, report = read_table(raw, filename)
    assert survey.id_column == "Respondent" and survey.variables == SURVEY_VARIABLES
    assert survey.metadata_columns == SURVEY_METADATA
    assert sum(report.missing_counts.values()) == 90


def test_lab_component_table_shows_the_fitted_models_numbers():
    # One number for one thing on the lab demo (15 missing cells): the component-choice table that
    # comes with an "auto" fit shows the fitted model's explained variance (the summary's
    # explained_variance_ratio, the axis titles and the API use the same values), and the counts
    # cross-validation cannot estimate (p - 1 = 9 and 10 of the 10 assays) are None, not a share.
    from webapp.services.headless import fit_table

    filename, raw = lab_scenario()
    table, _ = read_table(raw, filename)
    model, summary, _ = fit_table(table, components="auto")
    rows = summary["rank"]["table"]
    a = summary["n_components"]
    assert [r["explained"] for r in rows[:a]] == summary["explained_variance_ratio"]
    shown = [round(100 * v, 1) for v in model.explained_variance_ratio_]
    assert [round(100 * r["explained"], 1) for r in rows[:a]] == shown
    assert [r["cv_explained"] for r in rows[8:]] == [None] * (len(rows) - 8)
    assert all(r["cv_explained"] is not None for r in rows[:8])


def test_no_planted_sample_has_a_blank_cell():
    lab = _read(lab_scenario()[1]).set_index("Batch")
    survey = _read(survey_scenario()[1]).set_index("Respondent")
    for frame, anomalies in ((lab, planted_anomalies("lab")), (survey, planted_anomalies("survey"))):
        for name, problem in anomalies.items():
            if name == "line_shift":  # the whole line, not one planted batch
                continue
            assert not (frame.loc[problem["samples"]] == "").any().any(), name


# ------------------------------- lab: what an analyst should find
# Demo design checks (our own invented data), 3 components (the three
# latent factors the generator uses).

@pytest.mark.parametrize("seed", [demo_data.LAB_SEED, 1, 2, 3])
def test_lab_outliers_have_the_largest_spe_and_the_extreme_batch_high_t2(seed):
    _, ids, fit, _ = _lab_fit(seed)
    planted = planted_anomalies("lab")
    outliers = planted["assay_outlier"]["samples"] + planted["dissolution_outlier"]["samples"]
    top_two = [ids[i] for i in np.argsort(-fit.spe_)[:2]]
    assert sorted(top_two) == sorted(outliers)
    assert all(fit.spe_[ids.index(s)] > fit.spe_limit() for s in outliers)

    extreme = ids.index(planted["extreme_valid"]["samples"][0])
    assert fit.t2_[extreme] == fit.t2_.max()
    assert fit.t2_[extreme] > fit.t2_limit()
    assert fit.spe_[extreme] < fit.spe_limit()


def test_lab_outliers_are_explained_by_their_planted_variable():
    _, ids, fit, X = _lab_fit()
    planted = planted_anomalies("lab")
    for name in ("assay_outlier", "dissolution_outlier"):
        row = ids.index(planted[name]["samples"][0])
        # SPE contribution of a variable = its squared residual
        # (Westerhuis, Gurden & Smilde 2000, Chemometr. Intell. Lab. Syst. 51, 95-114).
        top = LAB_VARIABLES[int(np.argmax(fit.contributions(X[row], kind="spe")))]
        assert [top] == planted[name]["variables"]
        assert fit.residuals(X[[row]])[0, LAB_VARIABLES.index(top)] < 0  # both read low


def test_lab_drifting_instrument_shows_in_water_residuals_over_run_order():
    _, ids, fit, X = _lab_fit()
    drift = planted_anomalies("lab")["drifting_instrument"]
    rows = [ids.index(s) for s in drift["samples"]]
    water = LAB_VARIABLES.index("Water content (%)")
    assert drift["variables"] == ["Water content (%)"]
    # Residuals of water grow along the run order of the drifting batches.
    rho = stats.spearmanr(np.arange(len(rows)), fit.residuals(X[rows])[:, water]).statistic
    assert rho > 0.7
    # The last batches are out, and water leads their SPE contributions.
    last = rows[-5:]
    assert np.median(fit.spe_[last]) > fit.spe_limit()
    leaders = [LAB_VARIABLES[int(np.argmax(fit.contributions(X[r], kind="spe")))] for r in last]
    assert leaders.count("Water content (%)") >= 4
    # ... and far above the typical batch outside the drift.
    earlier = [i for i, s in enumerate(ids) if s not in drift["samples"]]
    assert np.median(fit.spe_[rows[-5:]]) > 3 * np.median(fit.spe_[earlier])


def test_lab_line_b_sits_apart_and_the_mislabelled_batch_sits_with_it():
    frame, ids, fit, X = _lab_fit()
    planted = planted_anomalies("lab")
    mislabelled = ids.index(planted["mislabelled_batch"]["samples"][0])
    assert frame["Line"].iloc[mislabelled] == "Line A"  # what the record says

    line = frame["Line"].to_numpy()
    for name in planted["line_shift"]["variables"]:
        j = LAB_VARIABLES.index(name)
        others = X[line != "Line B", j]
        gap = np.nanmean(X[line == "Line B", j]) - np.nanmean(others)
        assert gap > 1.0 * np.nanstd(others, ddof=1)

    line_b = set(planted["line_shift"]["samples"])
    true_line = np.array(["Line B" if s in line_b else lab for s, lab in zip(ids, line)])
    keep = np.arange(len(ids)) != mislabelled
    centroids = {
        name: fit.scores_[keep & (true_line == name)].mean(axis=0) for name in ("Line A", "Line B", "Line C")
    }
    nearest = min(centroids, key=lambda k: np.linalg.norm(fit.scores_[mislabelled] - centroids[k]))
    assert nearest == "Line B"


# ----------------------------- survey: what an analyst should find
# Demo design checks (our own invented data), 4 components (one per trait).

def test_survey_straight_liners_stand_out():
    _, ids, fit, answers = _survey_fit()
    planted = planted_anomalies("survey")["straight_liners"]
    # Every planted straight-liner, and nobody else, has zero spread.
    spread = np.nanstd(answers, axis=1)
    assert {ids[i] for i in np.flatnonzero(spread == 0)} == set(planted["samples"])
    # Those answering 5 or 1 throughout contradict the negatively worded
    # items: SPE above the limit, at the top of the list.
    loud = [s for s in planted["samples"] if answers[ids.index(s), 0] in (1, 5)]
    assert len(loud) == 3
    top = {ids[i] for i in np.argsort(-fit.spe_)[: len(loud)]}
    assert top == set(loud)
    # The one answering 3 throughout sits near the centre, as the docs say.
    quiet = (set(planted["samples"]) - set(loud)).pop()
    assert fit.spe_[ids.index(quiet)] < fit.spe_limit()
    assert fit.t2_[ids.index(quiet)] < fit.t2_limit()


def test_survey_reversed_block_stands_out():
    frame, ids, fit, _ = _survey_fit()
    anomalies = planted_anomalies("survey")
    block = anomalies["reversed_page_two"]["samples"]
    rows = [ids.index(s) for s in block]
    assert set(frame["Mode"].iloc[rows]) == {"paper"}
    assert set(frame["Department"].iloc[rows]) == {"Logistics"}
    assert int((fit.spe_[rows] > fit.spe_limit()).sum()) >= 12
    planted = set(block) | set(anomalies["straight_liners"]["samples"])
    others = [i for i, s in enumerate(ids) if s not in planted]
    assert np.median(fit.spe_[rows]) > 3 * np.median(fit.spe_[others])
    # Few unplanted respondents cross the limit: the flags point at the plant.
    assert int((fit.spe_[others] > fit.spe_limit()).sum()) <= 0.05 * len(others)


# ------------------------- lab: the reference model and three later weeks
# ``latentdesk demo`` prepares them through the real services (webapp.cli.serve.prepare_demo);
# the checks read them back through the services. Demo design checks again, except where a
# published formula is named.


@pytest.fixture(scope="module")
def demo_home(tmp_path_factory):
    """A demo home prepared twice, as a restarted ``latentdesk demo`` does: (app, printed users)."""
    from webapp.app import create_app
    from webapp.cli import serve

    home = str(tmp_path_factory.mktemp("demo") / "home")
    serve.prepare_demo({"HOME": home})
    users = serve.prepare_demo({"HOME": home})
    app = create_app({"TESTING": True, "HOME": home, "DEMO": True})
    yield app, users
    app.extensions["latentdesk.engine"].dispose()


@pytest.fixture(scope="module")
def demo_monitoring(demo_home):
    """(reference model, {file name: batch}) of the prepared demo."""
    from webapp.cli.serve import DEMO_REFERENCE_MODEL
    from webapp.services import batches
    from webapp.services import reference_models as reference

    app, _ = demo_home
    with app.app_context():
        models = reference.list_reference_models(name=DEMO_REFERENCE_MODEL)
        assert len(models) == 1  # the second preparation added nothing
        listed = batches.chart(models[0]["id"])["batches"]
        return models[0], {b["file_name"]: batches.batch_info(b["id"]) for b in listed}


def test_later_weeks_are_seeded_and_continue_the_run():
    assert lab_later_batches() == lab_later_batches()
    assert lab_later_batches(5) != lab_later_batches(6)
    training = set(_read(lab_scenario()[1])["Batch"])
    seen = []
    for filename, raw in lab_later_batches():
        frame = _read(raw)
        assert list(frame.columns) == ["Batch", *LAB_METADATA, *LAB_VARIABLES]
        seen.extend(frame["Batch"])
    assert [f for f, _ in lab_later_batches()] == list(LAB_LATER_FILENAMES)
    assert seen == [f"B26-{k:03d}" for k in range(151, 151 + len(seen))] and not set(seen) & training
    for seed in (1, 2):  # the planted ids do not move with the seed
        ids = set().union(*(set(_read(raw)["Batch"]) for _, raw in lab_later_batches(seed)))
        assert all(set(f["samples"]) <= ids for f in lab_later_findings().values())


def test_demo_ships_an_approved_reference_model_signed_by_two_people(demo_home, demo_monitoring):
    from webapp.services import audit
    from webapp.store import session_scope

    app, users = demo_home
    model, weeks = demo_monitoring
    assert model["state"] == "approved" and model["proposed_by_name"] == "Ana Demo"
    [signature] = model["signatures"]
    assert signature["meaning"] == "approved" and signature["printed_name"] == "Rowan Demo"
    assert model["n_samples"] == 150 and model["n_components"] == 3
    # New-observation T2 limit, NIST/SEMATECH e-Handbook 6.5.4.3 (Tracy, Young & Mason 1992).
    n, a = 150, 3
    for level in ("warning", "action"):
        conf = model["confidence"][level]
        expected = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(conf, a, n - a)
        assert model["limits"][level]["t2_new"] == pytest.approx(expected, rel=1e-9)
    assert list(weeks) == list(LAB_LATER_FILENAMES)
    assert all(b["uploaded_by_name"] == "Ana Demo" for b in weeks.values())
    with app.app_context(), session_scope() as s:
        assert audit.verify_chain(s)[0]
    assert {name for name, _, _ in users} >= {"ana", "rowan"}


def _beyond_action(sample) -> bool:
    return sample["t2"] > sample["t2_limit"] or sample["spe"] > sample["spe_limit"]


def test_week_one_is_in_control(demo_monitoring):
    _, weeks = demo_monitoring
    week = weeks[LAB_LATER_FILENAMES[0]]
    assert week["n_samples"] == 12 and week["n_flagged"] == 0
    assert not any(_beyond_action(s) or s["rules"] for s in week["samples"])
    assert week["state"] == "reviewed"  # nothing flagged, nothing to sign: reviewed as stored


def test_week_two_flags_the_planted_assay_fault(demo_home, demo_monitoring):
    from webapp.services import batches

    app, _ = demo_home
    _, weeks = demo_monitoring
    week = weeks[LAB_LATER_FILENAMES[1]]
    [planted] = lab_later_findings()[LAB_LATER_FILENAMES[1]]["samples"]
    sample = next(s for s in week["samples"] if s["sample"] == planted)
    assert sample["flagged"] and sample["spe"] > sample["spe_limit"] and sample["spe_exceeds"]
    with app.app_context():
        found = batches.sample_contributions(week["id"], planted)
    # Alcala & Qin (2009): a large single-variable fault leads the SPE reconstruction-based contributions.
    leader = max(found["reconstruction"]["spe"], key=found["reconstruction"]["spe"].get)
    assert leader == "Assay (%)" and "Assay (%)" in found["explanation"]["sentence"]
    # Any other flag of the week is a score-chart alarm of an ordinary batch: T2 and SPE within the limits.
    others = [s for s in week["samples"] if s["flagged"] and s["sample"] != planted]
    assert all(not _beyond_action(s) and s["rules"] for s in others)
    assert [s["sample"] for s in week["samples"] if _beyond_action(s)] == [planted]


def test_week_three_drift_is_caught_by_a_run_rule_before_any_point_crosses(demo_monitoring):
    _, weeks = demo_monitoring
    week = weeks[LAB_LATER_FILENAMES[2]]
    assert not any(_beyond_action(s) for s in week["samples"])
    assert not any(s["t2_exceeds"] or s["spe_exceeds"] for s in week["samples"])
    fired = [r for s in week["samples"] for r in s["rules"]]
    assert fired and week["n_flagged"] > 0 and week["state"] == "open"
    assert all(r["rule"] != "beyond-action" for r in fired)
    # The drift is along the degradation factor: the flagged samples' latest rules run on one score chart
    # above its centre line (Western Electric 1956, rule 4: 8 in a row on one side).
    assert {(r["rule"], r["side"]) for r in fired} == {("8-one-side", "above")}
