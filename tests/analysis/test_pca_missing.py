"""Missing values: (regularised) iterative PCA imputation for fitting, projection for scoring."""

from __future__ import annotations

from unittest import mock

import numpy as np
import pytest
from scipy import linalg

from analysis import pca
from analysis.pca import PCAModel

N, P, A = 300, 20, 3
COMPONENT_SD = np.array([5.0, 3.0, 2.0])
NOISE_SD = 0.3


def structured_data(seed: int):
    """Three strong components plus small noise (population loadings returned too)."""
    rng = np.random.default_rng(seed)
    loadings = np.linalg.qr(rng.standard_normal((P, A)))[0]
    scores = rng.standard_normal((N, A)) * COMPONENT_SD
    return scores @ loadings.T + NOISE_SD * rng.standard_normal((N, P)) + 10.0, loadings


def with_missing(X, fraction, seed):
    """Missing completely at random (MCAR), seeded; no row loses every value."""
    rng = np.random.default_rng(seed)
    out = X.copy()
    out[rng.random(X.shape) < fraction] = np.nan
    return out


def reference_iterative_imputation(X, a, iterations=3000):
    """Independent reference written from Walczak & Massart (2001), Chemometr. Intell. Lab. Syst. 58,
    15-27, section on iterative PCA: fill with column means, fit PCA (numpy SVD), replace missing
    cells by the reconstruction, re-estimate means and repeat. Autoscaling on the observed values."""
    mean, sd = np.nanmean(X, 0), np.nanstd(X, 0, ddof=1)
    Z = (X - mean) / sd
    miss = np.isnan(Z)
    Z[miss] = 0.0
    for _ in range(iterations):
        m = Z.mean(0)
        u, s, vt = np.linalg.svd(Z - m, full_matrices=False)
        Z[miss] = (m + (u[:, :a] * s[:a]) @ vt[:a])[miss]
    return vt[:a].T


@pytest.mark.parametrize("fraction,max_degrees", [(0.05, 3.0), (0.20, 5.0)])
def test_loadings_close_to_complete_data_fit(fraction, max_degrees):
    # Tolerance: the first-order sampling error of a loading direction is about
    # (noise SD / component SD) * sqrt(p/n) = 0.3/2 * sqrt(20/300) = 0.039 rad = 2.2 degrees
    # (Anderson 1963, Ann. Math. Statist. 34, 122-148, asymptotics of principal components).
    # Losing 5% / 20% of the cells at random must keep the fit within that order of the
    # complete-data fit: 3 and 5 degrees.
    X, _ = structured_data(1)
    complete = PCAModel(n_components=A).fit(X)
    Xm = with_missing(X, fraction, seed=2)
    model = PCAModel(n_components=A).fit(Xm)
    assert model.n_missing_ == int(np.isnan(Xm).sum())
    assert model.solver_ == "imputation+xtx"
    angles = np.degrees(linalg.subspace_angles(model.loadings_, complete.loadings_))
    assert angles.max() < max_degrees
    # Eigenvalues of strong components move by a few percent at most (same reasoning: their
    # relative sampling SD is sqrt(2/n) = 8%).
    np.testing.assert_allclose(model.eigenvalues_[:A], complete.eigenvalues_[:A], rtol=0.08)
    assert model.eigenvalues_.size == P  # every eigenvalue the data allow, for the SPE limit
    assert model.spe_limit() > 0


def reference_regularised_imputation(X, a, iterations=3000):
    """Independent reference written from Josse & Husson (2012), J. Soc. Fr. Stat. 153(2), 79-99,
    section 3.2: as above, but the reconstruction is U diag(sqrt(n) (lambda_s - sigma2) / sqrt(lambda_s)) V'
    with lambda_s = d_s^2 / n and sigma2 = sum_{s>A} d_s^2 / (np - p - nA - pA + A^2 + A)."""
    mean, sd = np.nanmean(X, 0), np.nanstd(X, 0, ddof=1)
    Z = (X - mean) / sd
    miss = np.isnan(Z)
    n, p = Z.shape
    Z[miss] = 0.0
    for _ in range(iterations):
        m = Z.mean(0)
        u, d, vt = np.linalg.svd(Z - m, full_matrices=False)
        lam = d[:a] ** 2 / n
        sigma2 = np.sum(d[a:] ** 2) / (n * p - p - n * a - p * a + a * a + a)
        Z[miss] = (m + (u[:, :a] * (np.sqrt(n) * (lam - sigma2) / np.sqrt(lam))) @ vt[:a])[miss]
    return vt[:a].T


def reference_observed_least_squares(X, a, iterations=4000):
    """The classical method's fixed point is the least-squares fit of mean + rank-A model to the
    observed cells only (Kiers 1997, Psychometrika 62, 251-266). Reference that never imputes:
    alternating least squares on the observed cells (criss-cross regression, Gabriel & Zamir 1979,
    Technometrics 21, 489-498), rows then columns, each an ordinary regression on observed values."""
    mean, sd = np.nanmean(X, 0), np.nanstd(X, 0, ddof=1)
    Z = (X - mean) / sd
    obs = ~np.isnan(Z)
    n, p = Z.shape
    rng = np.random.default_rng(0)
    m, P = np.zeros(p), np.linalg.qr(rng.standard_normal((p, a)))[0]
    T = np.zeros((n, a))
    for _ in range(iterations):
        for i in range(n):
            o = obs[i]
            T[i] = np.linalg.lstsq(P[o], Z[i, o] - m[o], rcond=None)[0]
        design = np.column_stack([np.ones(n), T])
        for j in range(p):
            o = obs[:, j]
            coef = np.linalg.lstsq(design[o], Z[o, j], rcond=None)[0]
            m[j], P[j] = coef[0], coef[1:]
    return np.linalg.qr(P)[0]


def test_iterative_imputation_matches_independent_reference():
    # Walczak & Massart (2001): the converged classical iterative PCA fit, written independently above.
    X, _ = structured_data(4)
    Xm = with_missing(X, 0.1, seed=5)
    model = PCAModel(n_components=A, imputation="iterative").fit(Xm)
    ref = reference_iterative_imputation(Xm, A)
    assert model.imputation_["converged"] and model.imputation_["method"] == "iterative"
    assert np.degrees(linalg.subspace_angles(model.loadings_, ref)).max() < 1e-4


def test_iterative_imputation_is_the_least_squares_fit_of_the_observed_cells():
    # Kiers (1997) / Gabriel & Zamir (1979): a solver that handles the missing cells without
    # imputing them reaches the same subspace.
    X, _ = structured_data(11)
    Xm = with_missing(X[:120], 0.1, seed=12)
    model = PCAModel(n_components=A, imputation="iterative").fit(Xm)
    ref = reference_observed_least_squares(Xm, A, iterations=300)
    assert np.degrees(linalg.subspace_angles(model.loadings_, ref)).max() < 1e-4


def test_regularised_imputation_matches_independent_reference():
    # Josse & Husson (2012), section 3.2, written independently above with numpy's SVD.
    X, _ = structured_data(4)
    Xm = with_missing(X, 0.1, seed=5)
    model = PCAModel(n_components=A).fit(Xm)
    assert model.imputation_["method"] == "regularised" and model.imputation_["converged"]
    ref = reference_regularised_imputation(Xm, A)
    assert np.degrees(linalg.subspace_angles(model.loadings_, ref)).max() < 1e-4


def test_regularised_imputation_converges_in_few_rounds_where_noise_components_are_kept():
    # Josse & Husson (2012), section 2.3: with more components than the data support, the classical
    # method over-fits (its noise components chase their own imputations) and converges slowly; the
    # regularised one does not. Three real components, eight kept.
    X, _ = structured_data(13)
    Xm = with_missing(X, 0.05, seed=14)
    regularised = PCAModel(n_components=8).fit(Xm)
    classical = PCAModel(n_components=8, imputation="iterative").fit(Xm)
    assert regularised.imputation_["converged"]
    assert regularised.imputation_["achieved"] <= pca.IMPUTATION_RTOL
    assert regularised.n_iter_ < classical.n_iter_ / 3
    # the over-fitted noise eigenvalues of the classical fit are larger than the regularised ones
    assert classical.eigenvalues_[A:8].sum() > regularised.eigenvalues_[A:8].sum()


def test_non_convergence_is_a_warning_not_a_silent_cap():
    X, _ = structured_data(4)
    Xm = with_missing(X, 0.1, seed=5)
    with mock.patch.object(pca, "IMPUTATION_MAX_ROUNDS", 2):
        model = PCAModel(n_components=A).fit(Xm)
    assert model.imputation_["rounds"] == 2 and not model.imputation_["converged"]
    assert model.imputation_["achieved"] > pca.IMPUTATION_RTOL
    assert any("did not converge" in w and "after 2 rounds" in w for w in model.warnings_)


def test_unknown_imputation_method_is_refused():
    with pytest.raises(pca.InputError, match="imputation='mice' is not one of regularised, iterative"):
        PCAModel(imputation="mice").fit(np.eye(3) + 1)


@pytest.mark.parametrize("imputation", pca.IMPUTATIONS)
def test_training_diagnostics_with_missing_values_are_consistent(imputation):
    # Training samples are scored like new ones, by projection of the observed values to the
    # model plane (Nelson, Taylor & MacGregor 1996), so checking one again gives the same numbers.
    X, _ = structured_data(6)
    Xm = with_missing(X, 0.2, seed=7)
    model = PCAModel(n_components=A, imputation=imputation).fit(Xm)
    np.testing.assert_allclose(model.transform(Xm), model.scores_, rtol=0, atol=1e-12)
    np.testing.assert_allclose(model.hotelling_t2(Xm), model.t2_, rtol=1e-10)
    np.testing.assert_allclose(model.spe(Xm), model.spe_, rtol=1e-10)
    # lambda_a = t_a't_a/(n-1) keeps sum T2 = (n-1)A (docs/references.md, "Checks that are theory").
    assert model.t2_.sum() == pytest.approx((N - 1) * A, rel=1e-10)
    assert not model.warnings_


def test_new_incomplete_samples_scored_by_projection():
    # Nelson, Taylor & MacGregor (1996), projection to the model plane:
    # t = (P_o' P_o)^{-1} P_o' z_o over the observed variables, written out with numpy.
    X, _ = structured_data(8)
    model = PCAModel(n_components=A).fit(X[:260])
    new = X[260:]  # same population, not used in the fit
    incomplete = with_missing(new, 0.25, seed=10)
    scores = model.transform(incomplete)
    Z = model.preprocess(incomplete)
    for i in range(len(new)):
        obs = ~np.isnan(Z[i])
        po = model.loadings_[obs]
        expected = np.linalg.solve(po.T @ po, po.T @ Z[i, obs])
        np.testing.assert_allclose(scores[i], expected, rtol=1e-10, atol=1e-12)
    # The projection error is the residual noise carried through (P_o'P_o)^{-1} P_o'; with a fraction f
    # of cells missing at random its variance is about sigma2 * f/(1-f) (diagonal of (P_o'P_o)^{-1}
    # minus 1), sigma2 = mean discarded eigenvalue (noise variance per variable). RMS error per
    # component must stay below twice that prediction.
    complete_scores = model.transform(new)
    sigma2 = model.eigenvalues_[A:].mean()
    rms = np.sqrt(np.mean((scores - complete_scores) ** 2, axis=0))
    assert np.all(rms < 2 * np.sqrt(sigma2 * 0.25 / 0.75))
    # Residuals are NaN where the input is missing; SPE sums the observed ones.
    r = model.residuals(incomplete)
    assert np.array_equal(np.isnan(r), np.isnan(incomplete))
    np.testing.assert_allclose(model.spe(incomplete), np.nansum(r**2, axis=1))


def test_projection_of_nearly_empty_rows_is_the_least_squares_solution():
    # Rows with fewer observed variables than components (P_o'P_o singular) get the minimum-norm
    # least-squares solution (Nelson, Taylor & MacGregor 1996, with the pseudo-inverse), computed
    # by numpy.linalg.lstsq on the observed rows of P; the batch path agrees with it elsewhere.
    X, _ = structured_data(8)
    model = PCAModel(n_components=A).fit(X)
    new = X[:40].copy()
    new[:20, 2:] = np.nan  # two observed variables, three components
    new[20:, ::3] = np.nan
    scores = model.transform(new)
    Z = model.preprocess(new)
    for i in range(len(new)):
        obs = ~np.isnan(Z[i])
        expected = np.linalg.lstsq(model.loadings_[obs], Z[i, obs], rcond=None)[0]
        np.testing.assert_allclose(scores[i], expected, rtol=1e-10, atol=1e-12)


def test_agrees_with_scikit_learn_iterative_imputer_on_wine_to_sampling_level():
    # Open dataset: scikit-learn's wine (178 x 13), 5 % of the cells removed at random (seeded), autoscaled
    # on the observed values. Reference: sklearn.impute.IterativeImputer (chained regressions, BayesianRidge)
    # followed by PCA of the completed table. The two impute by different models (regressions of each
    # variable on all others versus a 3-component low-rank model), so they cannot agree to rounding; both
    # must stay near the complete-data fit. Measured: 2.6 degrees between the two (largest principal angle,
    # 3 components), 5.1 and 4.8 degrees from the complete-data fit. The scale to compare with: the third
    # direction's first-order sampling SD, sqrt(l3 l4 / (n (l3 - l4)^2)) with l3 = 1.45, l4 = 0.92 (Anderson
    # 1963, Ann. Math. Statist. 34, 122-148) is about 9 degrees. Bounds: 4 and 7 degrees.
    from sklearn.datasets import load_wine
    from sklearn.decomposition import PCA
    from sklearn.experimental import enable_iterative_imputer  # noqa: F401
    from sklearn.impute import IterativeImputer

    X = load_wine().data
    Xm = with_missing(X, 0.05, seed=21)
    mean, sd = np.nanmean(Xm, axis=0), np.nanstd(Xm, axis=0, ddof=1)
    filled = IterativeImputer(max_iter=50, tol=1e-6, random_state=0).fit_transform((Xm - mean) / sd)
    theirs = PCA(3, svd_solver="full").fit(filled).components_.T
    ours = PCAModel(n_components=3).fit(Xm).loadings_
    complete = PCAModel(n_components=3).fit(X).loadings_
    assert np.degrees(linalg.subspace_angles(ours, theirs)).max() < 4.0
    assert np.degrees(linalg.subspace_angles(ours, complete)).max() < 7.0
    assert np.degrees(linalg.subspace_angles(theirs, complete)).max() < 7.0
