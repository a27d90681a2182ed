"""Tests for analysis.compare: principal angles and what an exclusion changed."""

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.linalg import subspace_angles
from sklearn.datasets import load_wine

from analysis.compare import compare_fits, principal_angles
from analysis.errors import InputError
from analysis.pca import PCAModel


@pytest.fixture(scope="module")
def wine():
    # Open dataset shipped by scikit-learn (UCI wine recognition data): 178 samples x 13 variables.
    data = load_wine(as_frame=True).frame.drop(columns="target")
    data.index = [f"w{i}" for i in range(len(data))]
    return data


@pytest.mark.parametrize(("p", "a", "b"), [(6, 2, 2), (10, 3, 5), (13, 4, 1), (30, 6, 6)])
def test_principal_angles_match_scipy(p, a, b):
    # Reference: scipy.linalg.subspace_angles (Knyazev & Argentati 2002), returned in descending order.
    rng = np.random.default_rng(p + a + b)
    A, B = rng.standard_normal((p, a)), rng.standard_normal((p, b))
    expected = np.sort(np.degrees(subspace_angles(A, B)))
    np.testing.assert_allclose(principal_angles(A, B), expected, rtol=1e-10, atol=1e-10)


def test_small_angles_stay_accurate():
    # Nearly equal subspaces: a rotation by 1e-7 radians in one plane. Reference: scipy (sine-based formula) and
    # the construction itself.
    rng = np.random.default_rng(1)
    Q = np.linalg.qr(rng.standard_normal((8, 4)))[0]
    angle = 1e-7
    B = Q[:, :2].copy()
    B[:, 0] = np.cos(angle) * Q[:, 0] + np.sin(angle) * Q[:, 3]
    ours = principal_angles(Q[:, :2], B)
    np.testing.assert_allclose(ours, np.sort(np.degrees(subspace_angles(Q[:, :2], B))), rtol=1e-6, atol=1e-14)
    np.testing.assert_allclose(ours[-1], np.degrees(angle), rtol=1e-6)


def test_identical_fits_change_nothing(wine):
    model = PCAModel(n_components=3).fit(wine)
    result = compare_fits(model, model, X=wine)
    np.testing.assert_allclose(result["principal_angles"], 0.0, atol=1e-6)
    assert all(row["delta"] == 0.0 for row in result["explained"])
    assert result["crossings"] == [] and result["excluded"] == [] and result["added"] == []
    assert result["evaluated_on"] == "given data" and result["n_evaluated"] == 178


def _t2_directly(train, X, a):
    """Hotelling's T2 of X under a PCA of autoscaled `train`, computed with numpy's SVD (definition)."""
    mean, sd = train.mean(axis=0), train.std(axis=0, ddof=1)
    z_train = (train - mean) / sd
    _, s, vt = np.linalg.svd(z_train, full_matrices=False)
    eigenvalues = s[:a] ** 2 / (len(train) - 1)
    scores = ((X - mean) / sd) @ vt[:a].T
    return np.sum(scores**2 / eigenvalues, axis=1)


def _t2_limit(n, a, new, confidence=0.95):
    # Tracy, Young & Mason (1992): training T2 ~ ((n-1)^2/n) Beta(A/2, (n-A-1)/2);
    # new samples T2 ~ A(n+1)(n-1)/(n(n-A)) F(A, n-A) (NIST/SEMATECH e-Handbook 6.5.4.3). scipy quantiles.
    if new:
        return a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(confidence, a, n - a)
    return (n - 1) ** 2 / n * stats.beta.ppf(confidence, a / 2, (n - a - 1) / 2)


def test_exclusion_report_against_direct_computation(wine):
    before = PCAModel(n_components=3).fit(wine)
    excluded = [wine.index[i] for i in np.argsort(before.t2_)[-4:]]
    kept = wine.drop(index=excluded)
    after = PCAModel(n_components=3).fit(kept)
    result = compare_fits(before, after, X=wine)

    # Angles: scipy.linalg.subspace_angles on the two loading matrices.
    expected_angles = np.sort(np.degrees(subspace_angles(before.loadings_, after.loadings_)))
    np.testing.assert_allclose(result["principal_angles"], expected_angles, rtol=1e-8, atol=1e-10)
    assert result["max_angle"] == pytest.approx(expected_angles.max())

    # Explained variance per component: the share of each model's first eigenvalues (numpy SVD, by definition).
    for model, key in ((before, "before"), (after, "after")):
        data = wine.to_numpy() if key == "before" else kept.to_numpy()
        s = np.linalg.svd((data - data.mean(0)) / data.std(0, ddof=1), compute_uv=False)
        np.testing.assert_allclose([row[key] for row in result["explained"]], (s**2 / np.sum(s**2))[:3], rtol=1e-9)
    for row in result["explained"]:
        assert row["delta"] == pytest.approx(row["after"] - row["before"])

    # T2 crossings: flags recomputed from the definitions; a model's own samples use the training limit and the
    # excluded samples (new to the after model) the new-sample limit.
    X = wine.to_numpy()
    t2_before = _t2_directly(wine.to_numpy(), X, 3)
    t2_after = _t2_directly(kept.to_numpy(), X, 3)
    flags_before = t2_before > _t2_limit(178, 3, new=False)
    is_new = wine.index.isin(excluded)
    flags_after = t2_after > np.where(is_new, _t2_limit(174, 3, new=True), _t2_limit(174, 3, new=False))
    expected = sorted(wine.index[flags_before != flags_after])
    got = sorted(row["sample"] for row in result["crossings"] if row["statistic"] == "t2")
    assert got == expected
    assert result["exceeding"]["before"]["t2"] == int(flags_before.sum())
    assert result["exceeding"]["after"]["t2"] == int(flags_after.sum())
    for row in result["crossings"]:
        beyond_after = row["after"] > row["after_limit"]
        assert row["change"] == ("now beyond the limit" if beyond_after else "no longer beyond the limit")
    assert result["excluded"] == [s for s in wine.index if s in excluded]
    assert result["n_samples"] == {"before": 178, "after": 174}
    json.dumps(result, allow_nan=False)  # JSON-safe: standard JSON without NaN


def test_without_data_the_shared_training_samples_are_compared(wine):
    before = PCAModel(n_components=2).fit(wine)
    after = PCAModel(n_components=2).fit(wine.iloc[5:])
    result = compare_fits(before, after)
    assert result["evaluated_on"] == "training samples in both fits"
    assert result["n_evaluated"] == 173
    limit_before, limit_after = _t2_limit(178, 2, False), _t2_limit(173, 2, False)
    t2_before = pd.Series(before.t2_, index=before.sample_ids_).iloc[5:]
    t2_after = pd.Series(after.t2_, index=after.sample_ids_)
    expected = sorted(t2_before.index[(t2_before > limit_before) != (t2_after > limit_after)])
    assert sorted(r["sample"] for r in result["crossings"] if r["statistic"] == "t2") == expected
    assert result["limits"]["before"]["t2_training"] == pytest.approx(limit_before, rel=1e-12)


def test_different_variables_and_component_counts(wine):
    before = PCAModel(n_components=3).fit(wine)
    after = PCAModel(n_components=2).fit(wine.drop(columns=["proline"]))
    result = compare_fits(before, after, X=wine)
    assert result["variables"] == {"common": 12, "only_before": ["proline"], "only_after": []}
    assert len(result["principal_angles"]) == 2
    assert result["explained"][2]["after"] is None and result["explained"][2]["delta"] is None
    # Reference: scipy on the loadings restricted to the 12 shared variables.
    shared = [before.variable_names_.index(v) for v in after.variable_names_]
    expected = np.sort(np.degrees(subspace_angles(before.loadings_[shared], after.loadings_)))
    np.testing.assert_allclose(result["principal_angles"], expected, rtol=1e-8, atol=1e-10)


def test_ndarray_with_sample_ids_and_bad_input(wine):
    before = PCAModel(n_components=2).fit(wine)
    after = PCAModel(n_components=2).fit(wine.iloc[3:])
    by_frame = compare_fits(before, after, X=wine)
    by_array = compare_fits(before, after, X=wine.to_numpy(), sample_ids=list(wine.index))
    assert by_frame == by_array
    with pytest.raises(InputError, match="2 sample ids given for 178 rows"):
        compare_fits(before, after, X=wine.to_numpy(), sample_ids=["a", "b"])
    with pytest.raises(InputError, match="not been fitted"):
        compare_fits(PCAModel(), after)
    other = PCAModel(n_components=1).fit(pd.DataFrame({"x": [1.0, 2, 4], "y": [3.0, 1, 2]}))
    with pytest.raises(InputError, match="share no variable"):
        compare_fits(before, other)


def test_loaded_models_need_the_data(tmp_path, wine):
    from analysis.modelfile import load_model, save_model

    save_model(PCAModel(n_components=2).fit(wine), tmp_path / "m.json")
    loaded = load_model(tmp_path / "m.json")
    with pytest.raises(InputError, match="pass the data X"):
        compare_fits(loaded, loaded)
    assert compare_fits(loaded, loaded, X=wine)["crossings"] == []
