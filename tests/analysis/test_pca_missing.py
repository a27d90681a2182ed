"""Missing values: iterative PCA imputation for fitting, projection for new samples."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

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


def test_imputation_matches_independent_reference():
    # Walczak & Massart (2001): the converged iterative PCA fit, written independently above.
    X, _ = structured_data(4)
    Xm = with_missing(X, 0.1, seed=5)
    model = PCAModel(n_components=A).fit(Xm)
    ref = reference_iterative_imputation(Xm, A)
    assert np.degrees(linalg.subspace_angles(model.loadings_, ref)).max() < 1e-5


def test_training_diagnostics_with_missing_values_are_consistent():
    # At convergence the imputed cells equal the model estimate, so training scores equal the
    # projection of each incomplete row to the model plane (Nelson, Taylor & MacGregor 1996).
    X, _ = structured_data(6)
    Xm = with_missing(X, 0.2, seed=7)
    model = PCAModel(n_components=A).fit(Xm)
    np.testing.assert_allclose(model.transform(Xm), model.scores_, rtol=0, atol=1e-6)
    np.testing.assert_allclose(model.hotelling_t2(Xm), model.t2_, rtol=1e-5)
    np.testing.assert_allclose(model.spe(Xm), model.spe_, rtol=1e-5)
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
