"""Property-based tests (hypothesis) on random shapes, including n < p, rank-deficient
data and constant columns. Each property is an identity of PCA (Jolliffe 2002, ch. 1-3) or one
of the "Checks that are theory" in docs/references.md; LAPACK SVD (scipy) is the reference decomposition.
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import linalg

from analysis.pca import PCAModel

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def datasets(draw):
    """(X, scaling, n_components): random shape, optional rank deficiency and constant columns."""
    n = draw(st.integers(3, 25))
    p = draw(st.integers(1, 25))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    inner = draw(st.integers(1, max(1, min(n, p))))
    X = rng.standard_normal((n, inner)) @ rng.standard_normal((inner, p))  # rank <= inner
    X *= rng.uniform(0.1, 10, size=p)
    X += rng.uniform(-50, 50, size=p)
    n_constant = draw(st.integers(0, max(0, p - 1)))
    X[:, :n_constant] = rng.uniform(-5, 5, size=n_constant)
    scaling = draw(st.sampled_from(["center", "autoscale", "pareto", "none"]))
    return X, scaling


def fit_all(X, scaling, a):
    return [PCAModel(n_components=a, scaling=scaling, solver=s, drop_constant=True).fit(X) for s in ("xtx", "xxt", "svd")]


def allowed_components(X, scaling):
    probe = PCAModel(n_components=1, scaling=scaling, solver="svd", drop_constant=True).fit(X)
    return probe.eigenvalues_.size


@SETTINGS
@given(datasets(), st.integers(1, 25))
def test_solvers_agree_and_identities_hold(data, a_wish):
    X, scaling = data
    rank = allowed_components(X, scaling)
    a = min(a_wish, rank)
    fits = fit_all(X, scaling, a)
    ref = fits[-1]
    n = X.shape[0]
    big = max(ref.eigenvalues_[0], 1e-300)
    for m in fits:
        # Every solver: the same rank and the same numbers (docs/design.md section 2, to 1e-8).
        assert m.eigenvalues_.size == rank
        np.testing.assert_allclose(m.eigenvalues_, ref.eigenvalues_, rtol=0, atol=1e-8 * big)
        scale = max(np.abs(ref.scores_).max(), 1e-12)
        # Components with a near-tie in eigenvalue are not unique; compare the subspace when tied.
        gaps = np.abs(np.diff(ref.eigenvalues_[: a + 1])) if a < rank else np.abs(np.diff(ref.eigenvalues_[:a]))
        if np.all(gaps > 1e-4 * big):
            np.testing.assert_allclose(m.scores_, ref.scores_, rtol=0, atol=1e-7 * scale)
        if a < rank and ref.eigenvalues_[a - 1] - ref.eigenvalues_[a] > 1e-4 * big:
            assert np.max(linalg.subspace_angles(m.loadings_, ref.loadings_)) < 1e-6
        # Orthonormal loadings; sign convention: largest |loading| positive (with exact ties,
        # e.g. two autoscaled variables, one of the tied elements is positive).
        np.testing.assert_allclose(m.loadings_.T @ m.loadings_, np.eye(a), atol=1e-10)
        assert np.all(m.loadings_.max(axis=0) >= np.abs(m.loadings_).max(axis=0) - 1e-9)
        # lambda_a = t_a't_a/(n-1)  =>  sum of training T2 = (n-1)A.
        np.testing.assert_allclose(m.t2_.sum(), (n - 1) * a, rtol=1e-8)
        # sum of SPE = (n-1) * sum of discarded eigenvalues (to rounding of the total).
        np.testing.assert_allclose(m.spe_.sum(), (n - 1) * m.eigenvalues_[a:].sum(), rtol=0, atol=1e-8 * (n - 1) * big * rank)
        assert np.all(m.spe_ >= 0)
        assert np.all(np.diff(m.eigenvalues_) <= 1e-12 * big)


@SETTINGS
@given(datasets(), st.integers(1, 25), st.integers(0, 2**32 - 1))
def test_eigenvalues_match_lapack_svd(data, a_wish, seed):
    # LAPACK SVD (scipy.linalg.svd) of the preprocessed data: lambda = s^2/(n-1).
    X, scaling = data
    rank = allowed_components(X, scaling)
    m = PCAModel(n_components=min(a_wish, rank), scaling=scaling, drop_constant=True).fit(X)
    Z = m.preprocess(X)
    s = linalg.svd(Z, compute_uv=False)
    lam = s**2 / (X.shape[0] - 1)
    np.testing.assert_allclose(m.eigenvalues_, lam[:rank], rtol=0, atol=1e-8 * lam[0])
    np.testing.assert_allclose(m.total_variance_, lam.sum(), rtol=1e-10)


@SETTINGS
@given(datasets(), st.integers(1, 25), st.integers(0, 2**32 - 1))
def test_row_order_and_contributions(data, a_wish, seed):
    X, scaling = data
    rank = allowed_components(X, scaling)
    a = min(a_wish, rank)
    m = PCAModel(n_components=a, scaling=scaling, drop_constant=True).fit(X)
    perm = np.random.default_rng(seed).permutation(X.shape[0])
    mp = PCAModel(n_components=a, scaling=scaling, drop_constant=True).fit(X[perm])
    big = max(m.eigenvalues_[0], 1e-300)
    # Row order does not change the eigenvalues or the diagnostics.
    np.testing.assert_allclose(mp.eigenvalues_, m.eigenvalues_, rtol=0, atol=1e-9 * big)
    gaps_ok = a == rank or m.eigenvalues_[a - 1] - m.eigenvalues_[a] > 1e-4 * big
    distinct = np.all(np.abs(np.diff(m.eigenvalues_[:a])) > 1e-4 * big)
    if gaps_ok and distinct:
        np.testing.assert_allclose(mp.t2_, m.t2_[perm], rtol=1e-6, atol=1e-6 * a)
    # Westerhuis, Gurden & Smilde (2000): contributions sum to the sample's T2 and SPE.
    i = int(seed % X.shape[0])
    assert np.isclose(m.contributions(X[i], "t2").sum(), m.t2_[i], rtol=1e-8, atol=1e-8 * a)
    assert np.isclose(m.contributions(X[i], "spe").sum(), m.spe_[i], rtol=1e-6, atol=1e-9 * big * X.shape[1])
