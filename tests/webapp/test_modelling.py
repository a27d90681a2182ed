"""Models for stored datasets: fingerprint, cache (a hit never refits), result tables.

Reference values come from scikit-learn's PCA (``sklearn.decomposition.PCA``,
LAPACK SVD) on the wine data shipped with scikit-learn, autoscaled with ddof=1
by hand. Formulas named beside each check.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from sklearn.decomposition import PCA

from analysis.errors import InputError
from analysis.pca import PCAModel
from webapp.services import ingest, modelling
from webapp.services.fit_settings import FitSettings
from webapp.store import accounts, session_scope
from wine_data import variables, wine_csv, wine_frame

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture
def user_id(app, make_user):
    name, _ = make_user("analyst")
    with app.app_context(), session_scope() as s:
        return accounts.get_user_by_name(s, name).id


@pytest.fixture
def wine_id(app, user_id):
    with app.app_context():
        return ingest.ingest_upload(wine_csv(), "wine.csv", user_id)["id"]


@pytest.fixture
def fit_calls(monkeypatch):
    """Counts every PCAModel.fit call in this process."""
    calls = []
    original = PCAModel.fit

    def counting(self, *args, **kwargs):
        calls.append(self.n_components)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(PCAModel, "fit", counting)
    return calls


def _sklearn_reference(n_components: int, drop=()):
    frame = wine_frame().set_index("sample")
    x = frame.drop(index=list(drop))[variables()].to_numpy(dtype=float)
    z = (x - x.mean(axis=0)) / x.std(axis=0, ddof=1)  # autoscaling, ddof=1 (docs/design.md section 2)
    return PCA(n_components=n_components, svd_solver="full").fit(z), z


def _align(reference: np.ndarray, ours: np.ndarray) -> np.ndarray:
    """Flip reference columns to our signs (PCA axes are defined up to sign)."""
    signs = np.sign(np.sum(reference * ours, axis=0))
    return reference * signs


def test_fit_matches_scikit_learn(app, wine_id, user_id):
    with app.app_context():
        model, info = modelling.get_model(wine_id, {"scaling": "autoscale", "components": 3}, user_id=user_id)
    pca, z = _sklearn_reference(3)
    np.testing.assert_allclose(info["explained_variance_ratio"], pca.explained_variance_ratio_, rtol=1e-8)
    np.testing.assert_allclose(info["cumulative"], np.cumsum(pca.explained_variance_ratio_), rtol=1e-8)
    reference_scores = _align(pca.transform(z), model.scores_)
    np.testing.assert_allclose(model.scores_, reference_scores, rtol=1e-7, atol=1e-9)
    # Hotelling's T2 = sum_a t_a^2 / lambda_a with lambda_a = t_a't_a/(n-1)
    # (Jackson 1991, "A User's Guide to Principal Components", eq. 1.7.3);
    # scikit-learn's explained_variance_ is that lambda.
    t2 = np.sum(pca.transform(z) ** 2 / pca.explained_variance_, axis=1)
    np.testing.assert_allclose(model.t2_, t2, rtol=1e-8)
    assert info["n_components"] == 3 and info["excluded"] == []
    assert info["cache_hit"] is False and len(info["fingerprint"]) == 64


def test_cache_hit_never_refits(app, wine_id, user_id, fit_calls):
    settings = {"scaling": "autoscale", "components": 2}
    with app.app_context():
        _, first = modelling.get_model(wine_id, settings, user_id=user_id)
        fits_after_first = len(fit_calls)
        _, second = modelling.get_model(wine_id, dict(settings), user_id=user_id)
        _, other_level = modelling.get_model(wine_id, {**settings, "confidence": 0.99}, user_id=user_id)
    assert fits_after_first >= 1 and len(fit_calls) == fits_after_first
    assert (first["cache_hit"], second["cache_hit"], other_level["cache_hit"]) == (False, True, True)
    assert first["id"] == second["id"] == other_level["id"]
    assert first["fingerprint"] == second["fingerprint"] == other_level["fingerprint"]
    # Same model, stricter level: wider limits, no refit.
    assert other_level["t2_limit"] > first["t2_limit"]
    assert other_level["spe_limit"] > first["spe_limit"]


def test_auto_components_are_remembered_without_refitting(app, wine_id, user_id, fit_calls):
    with app.app_context():
        _, first = modelling.get_model(wine_id, {"components": "auto"}, user_id=user_id)
        fits_after_first = len(fit_calls)
        _, again = modelling.get_model(wine_id, {"components": "auto"}, user_id=user_id)
        _, explicit = modelling.get_model(wine_id, {"components": first["n_components"]}, user_id=user_id)
    assert len(fit_calls) == fits_after_first
    assert again["cache_hit"] and explicit["cache_hit"]
    assert first["fingerprint"] == again["fingerprint"] == explicit["fingerprint"]
    assert first["rank"] is not None and first["rank"]["recommended"] == first["n_components"]


def test_a_new_app_on_the_same_home_hits_the_cache(app_factory, app, wine_id, user_id, fit_calls):
    with app.app_context():
        _, first = modelling.get_model(wine_id, {"components": 2}, user_id=user_id)
    fits = len(fit_calls)
    second_app = app_factory()  # same home folder, new engine and caches: another worker
    with second_app.app_context():
        _, second = modelling.get_model(wine_id, {"components": 2}, user_id=user_id)
    assert len(fit_calls) == fits and second["cache_hit"] and second["id"] == first["id"]


def test_fingerprint_is_stable_across_processes(app, wine_id, user_id):
    with app.app_context():
        _, info = modelling.get_model(wine_id, {"components": 2, "log10": ["proline"]}, user_id=user_id)
        dataset = ingest.dataset_info(wine_id)
    settings = FitSettings.parse({"components": 2, "log10": ["proline"]}, dataset["variables"]).to_dict()
    script = (
        "import json, sys\n"
        "from webapp.services.fit_settings import FitSettings\n"
        "from webapp.services.modelling import fingerprint_for\n"
        "d, s = json.loads(sys.argv[1]), json.loads(sys.argv[2])\n"
        "print(fingerprint_for(d, FitSettings.parse(s, d['variables']), 2))\n"
    )
    fresh = subprocess.run(
        [sys.executable, "-c", script, json.dumps(dataset), json.dumps(settings)],
        capture_output=True, text=True, check=True, cwd=ROOT,
        env={**os.environ, "PYTHONHASHSEED": "123", "PYTHONPATH": str(ROOT)},
    )
    assert fresh.stdout.strip() == info["fingerprint"]


def test_fingerprint_follows_what_changes_the_numbers(app, wine_id, user_id):
    def fp(settings):
        with app.app_context():
            dataset = ingest.dataset_info(wine_id)
        return modelling.fingerprint_for(dataset, FitSettings.parse(settings, dataset["variables"]), 2)

    base = fp({})
    assert fp({"variables": list(reversed(variables()))}) == base  # order canonical
    assert fp({"confidence": 0.99}) == base  # limits only
    assert fp({"exclude": ["W-002", "W-001"]}) == fp({"exclude": ["W-001", "W-002", "W-001"]})
    changed = [
        fp({"scaling": "pareto"}),
        fp({"log10": ["proline"]}),
        fp({"variables": variables()[:5]}),
        fp({"exclude": ["W-001"]}),
    ]
    assert len({base, *changed}) == 5


@pytest.mark.parametrize(
    "settings, named",
    [
        ({"scaling": "unit"}, "'unit'"),
        ({"components": 0}, "0"),
        ({"components": "three"}, "'three'"),
        ({"components": True}, "True"),
        ({"variables": ["pH"]}, "pH"),
        ({"variables": "proline"}, "'proline'"),
        ({"log10": ["pH"]}, "pH"),
        ({"confidence": 1.5}, "1.5"),
        ({"colour": "red"}, "colour"),
        ({"exclude": "W-001"}, "'W-001'"),
    ],
)
def test_bad_settings_are_refused_by_name(settings, named):
    with pytest.raises(InputError) as refused:
        FitSettings.parse(settings, variables())
    assert named in str(refused.value)


def test_too_many_components_is_an_input_error(app, wine_id, user_id):
    with app.app_context(), pytest.raises(InputError):
        modelling.get_model(wine_id, {"components": 40}, user_id=user_id)


def test_unknown_excluded_sample_is_an_input_error(app, wine_id, user_id):
    with app.app_context(), pytest.raises(InputError, match="NOPE"):
        modelling.get_model(wine_id, {"components": 2, "exclude": ["NOPE"]}, user_id=user_id)


def test_samples_table_scores_every_sample_and_flags_by_limit(app, wine_id, user_id):
    with app.app_context():
        model, info = modelling.get_model(wine_id, {"components": 2, "exclude": ["W-019"]}, user_id=user_id)
        frame = modelling.samples_table(info["id"])
    assert len(frame) == 178 and list(frame["sample_id"][:2]) == ["W-001", "W-002"]
    assert frame.columns[:3].tolist() == ["sample_id", "cultivar", "excluded"]
    assert frame["excluded"].sum() == 1 and bool(frame.set_index("sample_id").loc["W-019", "excluded"])
    n, a = 177, 2
    # Training-sample T2 limit: (n-1)^2/n * Beta_{A/2, (n-A-1)/2}(0.95) (Tracy, Young & Mason 1992, eq. 4).
    beta_limit = (n - 1) ** 2 / n * stats.beta.ppf(0.95, a / 2, (n - a - 1) / 2)
    # New-sample limit: A(n+1)(n-1)/(n(n-A)) * F_{A, n-A}(0.95) (same paper; Jackson 1991 sec. 1.7).
    f_limit = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(0.95, a, n - a)
    limits = frame.set_index("sample_id")["T2_limit"]
    assert limits["W-001"] == pytest.approx(beta_limit, rel=1e-9)
    assert limits["W-019"] == pytest.approx(f_limit, rel=1e-9)
    np.testing.assert_array_equal(frame["T2_flag"], frame["T2"] > frame["T2_limit"])
    np.testing.assert_array_equal(frame["SPE_flag"], frame["SPE"] > frame["SPE_limit"])
    both = frame[frame["T2_flag"] & frame["SPE_flag"]]
    assert all(both["flags"] == "T2;SPE")
    # The excluded sample is projected onto the model fitted without it.
    pca, _ = _sklearn_reference(2, drop=["W-019"])
    raw = wine_frame().set_index("sample")[variables()]
    kept = raw.drop(index="W-019")
    z19 = (raw.loc[["W-019"]].to_numpy() - kept.mean().to_numpy()) / kept.std(ddof=1).to_numpy()
    signs = np.sign(np.sum(pca.components_.T * model.loadings_, axis=0))  # axes match up to sign
    ours = frame.set_index("sample_id").loc["W-019", ["PC1", "PC2"]].to_numpy(dtype=float)
    np.testing.assert_allclose(ours, pca.transform(z19)[0] * signs, rtol=1e-7)


def test_variables_table_matches_reference_loadings(app, wine_id, user_id):
    with app.app_context():
        _, info = modelling.get_model(wine_id, {"components": 3}, user_id=user_id)
        frame = modelling.variables_table(info["id"])
    pca, _ = _sklearn_reference(3)
    loadings = frame[["PC1", "PC2", "PC3"]].to_numpy()
    np.testing.assert_allclose(loadings, _align(pca.components_.T, loadings), rtol=1e-7, atol=1e-10)
    # Explained fraction of variable j: sum_a p_ja^2 lambda_a / var_j, var_j = 1 after
    # autoscaling (Wold, Esbensen & Geladi 1987, "Principal component analysis", sec. 6).
    expected = np.sum(pca.components_.T**2 * pca.explained_variance_, axis=1)
    np.testing.assert_allclose(frame["explained"], expected, rtol=1e-7)
    assert frame["variable"].tolist() == variables()


def test_contributions_sum_to_the_sample_statistics(app, wine_id, user_id):
    with app.app_context():
        _, info = modelling.get_model(wine_id, {"components": 2}, user_id=user_id)
        frame = modelling.samples_table(info["id"]).set_index("sample_id")
        result = modelling.contributions(info["id"], "W-060")
    spe_parts = [v["spe_contribution"] for v in result["variables"]]
    t2_parts = [v["t2_contribution"] for v in result["variables"]]
    # SPE contributions are squared residuals and T2 contributions sum to T2
    # (Westerhuis, Gurden & Smilde 2000, Chemometr. Intell. Lab. Syst. 51, 95-114).
    assert sum(spe_parts) == pytest.approx(frame.loc["W-060", "SPE"], rel=1e-8)
    assert sum(t2_parts) == pytest.approx(frame.loc["W-060", "T2"], rel=1e-8)
    assert result["sentence"] and result["excluded"] is False
    with app.app_context(), pytest.raises(modelling.SampleNotFound):
        modelling.contributions(info["id"], "W-999")


def test_models_are_recorded_once_per_fingerprint(app, wine_id, user_id):
    from webapp.store import datasets as store

    with app.app_context():
        modelling.get_model(wine_id, {"components": 2}, user_id=user_id)
        modelling.get_model(wine_id, {"components": 2}, user_id=user_id)
        modelling.get_model(wine_id, {"components": 3}, user_id=user_id)
        with session_scope() as s:
            rows = store.models_of_dataset(s, wine_id)
            assert [r.summary["n_components"] for r in rows] == [3, 2]
            assert rows[0].settings["components"] == 3 and rows[0].created_by == user_id
    with app.app_context(), pytest.raises(modelling.ModelNotFound):
        modelling.model_by_id(9999)


def test_command_line_and_web_app_agree_on_the_fingerprint(app, wine_id, user_id, tmp_path):
    from webapp.services.headless import fit_to_folder

    (tmp_path / "wine.csv").write_bytes(wine_csv())
    settings = {"components": 2, "log10": ["proline"], "exclude": ["W-007"]}
    summary = fit_to_folder(
        tmp_path / "wine.csv", tmp_path / "out", id_column=None, group_columns=[], sheet=None,
        scaling="autoscale", log10=["proline"], components=2, exclude=["W-007"], confidence=0.95,
        below_limit="half", bad_cells="error",
    )
    with app.app_context():
        _, info = modelling.get_model(wine_id, settings, user_id=user_id)
    assert summary["fingerprint"] == info["fingerprint"]
