"""PCAModel against outside sources: handbook examples, scikit-learn, LAPACK SVD."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import linalg

from analysis.errors import InputError
from analysis.pca import SOLVERS, PCAModel

# NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.5.2 "Numerical Example";
# the same 10 x 3 table is the example of NAG Library routine g03aac.
NIST_DATA = np.array(
    [[7, 4, 3], [4, 1, 8], [6, 3, 5], [8, 6, 1], [8, 5, 7],
     [7, 2, 9], [5, 3, 3], [9, 5, 8], [7, 4, 5], [8, 2, 2]],
    dtype=float,
)
EXACT_SOLVERS = [s for s in SOLVERS if s != "auto"]


def preprocess_reference(X: np.ndarray, scaling: str) -> np.ndarray:
    """Centring / scaling written out with numpy (ddof=1), independent of analysis.preprocessing."""
    if scaling == "none":
        return X.copy()
    Z = X - X.mean(axis=0)
    sd = X.std(axis=0, ddof=1)
    if scaling == "autoscale":
        Z = Z / sd
    elif scaling == "pareto":
        Z = Z / np.sqrt(sd)
    return Z


def assert_same_columns_up_to_sign(a: np.ndarray, b: np.ndarray, rtol: float) -> None:
    """Columns of a equal those of b up to a sign, to rtol relative to the largest element."""
    for k in range(a.shape[1]):
        sign = np.sign(a[:, k] @ b[:, k])
        np.testing.assert_allclose(a[:, k], sign * b[:, k], rtol=0, atol=rtol * np.abs(b[:, k]).max())


# ------------------------------------------------------------ worked examples
@pytest.mark.parametrize("solver", SOLVERS)
def test_nist_handbook_correlation_eigenvalues(solver):
    # NIST/SEMATECH e-Handbook 6.5.5.2: eigenvalues of the correlation matrix 1.769, 0.927, 0.304
    # (correlation PCA = autoscaled data), printed to 3 decimals.
    model = PCAModel(n_components=3, scaling="autoscale", solver=solver).fit(NIST_DATA)
    np.testing.assert_allclose(model.eigenvalues_, [1.769, 0.927, 0.304], atol=5e-4)
    # Correlation PCA: eigenvalues sum to the number of variables (Jolliffe 2002, section 2.3).
    assert model.total_variance_ == pytest.approx(3.0, rel=1e-12)


@pytest.mark.parametrize("solver", SOLVERS)
def test_nag_g03aac_covariance_eigenvalues(solver):
    # NAG Library g03aac example (same data, covariance PCA): eigenvalues 8.2739, 3.6761, 0.7499;
    # proportions of variation 0.6515, 0.2895, 0.0590.
    model = PCAModel(n_components=3, scaling="center", solver=solver).fit(NIST_DATA)
    np.testing.assert_allclose(model.eigenvalues_, [8.2739, 3.6761, 0.7499], atol=5e-5)
    np.testing.assert_allclose(model.explained_variance_ratio_, [0.6515, 0.2895, 0.0590], atol=5e-5)


@pytest.mark.parametrize("solver", SOLVERS)
def test_sklearn_iris_example_ratio(solver):
    # scikit-learn documentation example "Comparison of LDA and PCA 2D projection of Iris dataset":
    # explained variance ratio (first two components) [0.92461872 0.05306648], mean-centred Iris.
    from sklearn.datasets import load_iris

    model = PCAModel(n_components=2, scaling="center", solver=solver).fit(load_iris().data)
    np.testing.assert_allclose(model.explained_variance_ratio_, [0.92461872, 0.05306648], atol=5e-9)


# --------------------------------------------------- open datasets vs sklearn
def open_datasets():
    from sklearn import datasets
    from statsmodels.datasets import longley, stackloss

    yield "wine", datasets.load_wine().data
    yield "breast_cancer", datasets.load_breast_cancer().data
    yield "diabetes", datasets.load_diabetes().data
    yield "longley", longley.load_pandas().data.to_numpy(dtype=float)
    yield "stackloss", stackloss.load_pandas().data.to_numpy(dtype=float)


OPEN = list(open_datasets())


@pytest.mark.parametrize("solver", SOLVERS)
@pytest.mark.parametrize("scaling", ["autoscale", "center", "pareto"])
@pytest.mark.parametrize("name,X", OPEN, ids=[name for name, _ in OPEN])
def test_open_datasets_match_sklearn_pca(name, X, scaling, solver):
    # Datasets shipped with scikit-learn (wine, breast_cancer, diabetes) and statsmodels
    # (longley, stackloss), compared with sklearn.decomposition.PCA(svd_solver="full")
    # (LAPACK SVD) on the same preprocessed data, to 1e-8 relative.
    from sklearn.decomposition import PCA

    a = min(3, X.shape[1] - 1)
    Z = preprocess_reference(X, scaling)
    ref = PCA(n_components=a, svd_solver="full").fit(Z)
    model = PCAModel(n_components=a, scaling=scaling, solver=solver).fit(X)
    np.testing.assert_allclose(model.eigenvalues_[:a], ref.explained_variance_, rtol=1e-8)
    np.testing.assert_allclose(model.explained_variance_ratio_, ref.explained_variance_ratio_, rtol=1e-8)
    assert_same_columns_up_to_sign(model.scores_, ref.transform(Z), rtol=1e-8)
    angles = linalg.subspace_angles(model.loadings_, ref.components_.T)
    assert np.max(angles) < 1e-8
    # All eigenvalues, not only A: LAPACK singular values squared / (n-1), relative to the largest.
    s = linalg.svd(Z, compute_uv=False)
    lam = s**2 / (len(X) - 1)
    np.testing.assert_allclose(model.eigenvalues_, lam[: model.eigenvalues_.size], rtol=0, atol=1e-8 * lam[0])


@pytest.mark.parametrize("solver", SOLVERS)
def test_wide_data_match_lapack_svd(solver):
    # n < p: compared with LAPACK SVD (scipy.linalg.svd) of the autoscaled data.
    rng = np.random.default_rng(11)
    X = rng.normal(size=(15, 40)) @ np.diag(np.linspace(1, 3, 40)) + rng.normal(size=(15, 1)) * 2
    Z = preprocess_reference(X, "autoscale")
    u, s, vt = linalg.svd(Z, full_matrices=False)
    model = PCAModel(n_components=5, solver=solver).fit(X)
    lam = s**2 / 14
    assert model.eigenvalues_.size == 14  # centring leaves n - 1 components
    np.testing.assert_allclose(model.eigenvalues_, lam[:14], rtol=1e-8)
    assert_same_columns_up_to_sign(model.loadings_, vt[:5].T, rtol=1e-8)
    assert_same_columns_up_to_sign(model.scores_, u[:, :5] * s[:5], rtol=1e-8)


@pytest.mark.parametrize("rows", [40, 200])
def test_wide_partial_eigensolver_matches_lapack_gesvd_on_digits(rows):
    # Open dataset: scikit-learn's digits (8 x 8 images, 64 pixel variables), the first 40 images
    # as a wide table (40 x 64) and 200 images with the pixels repeated in two blocks as 200 x 128
    # (n < p). The xxt solver computes only the leading eigenvectors of ZZ' (analysis.pca.
    # _partial_eigh); reference LAPACK gesvd (scipy.linalg.svd(lapack_driver="gesvd")) of the
    # centred data. Eigenvalues, loadings and scores to 1e-10, relative to the largest eigenvalue.
    from sklearn.datasets import load_digits

    X = load_digits().data[:rows]
    X = X if rows == 40 else np.hstack([X, 2 * X + 1])
    X = X[:, X.std(axis=0) > 0]
    Z = X - X.mean(axis=0)
    u, s, vt = linalg.svd(Z, full_matrices=False, lapack_driver="gesvd")
    lam = s**2 / (rows - 1)
    model = PCAModel(n_components=10, scaling="center", solver="xxt").fit(X)
    r = model.eigenvalues_.size
    np.testing.assert_allclose(model.eigenvalues_, lam[:r], rtol=0, atol=1e-10 * lam[0])
    assert np.all(lam[r:] <= 1e-10 * lam[0])  # what the rank cut left out is rounding noise
    assert np.max(linalg.subspace_angles(model.loadings_, vt[:10].T)) < 1e-10
    assert_same_columns_up_to_sign(model.scores_, u[:, :10] * s[:10], rtol=1e-10)


def test_auto_solver_choice_by_shape():
    # Design choice (docs/design.md section 2): X'X for tall data, XX' for wide data.
    rng = np.random.default_rng(0)
    assert PCAModel(2).fit(rng.normal(size=(30, 5))).solver_ == "xtx"
    assert PCAModel(2).fit(rng.normal(size=(5, 30))).solver_ == "xxt"


# ------------------------------------------------------- conventions and API
@pytest.mark.parametrize("solver", SOLVERS)
def test_sign_convention_largest_loading_positive(solver):
    # Our documented convention (docs/design.md section 2): largest |loading| positive in every component.
    from sklearn.datasets import load_wine

    model = PCAModel(n_components=5, solver=solver).fit(load_wine().data)
    idx = np.argmax(np.abs(model.loadings_), axis=0)
    assert np.all(model.loadings_[idx, np.arange(5)] > 0)


def test_every_solver_gives_the_same_numbers():
    # docs/design.md section 2: same data and settings give identical numbers on every solver (to 1e-8).
    from sklearn.datasets import load_breast_cancer

    X = load_breast_cancer().data
    fits = [PCAModel(n_components=4, solver=s).fit(X) for s in EXACT_SOLVERS]
    ref = fits[-1]  # LAPACK SVD
    for m in fits[:-1]:
        np.testing.assert_allclose(m.loadings_, ref.loadings_, rtol=0, atol=1e-8)
        np.testing.assert_allclose(m.scores_, ref.scores_, rtol=0, atol=1e-8 * np.abs(ref.scores_).max())
        np.testing.assert_allclose(m.t2_, ref.t2_, rtol=1e-8)
        np.testing.assert_allclose(m.spe_, ref.spe_, rtol=1e-8)
        np.testing.assert_allclose(m.variable_explained_, ref.variable_explained_, rtol=0, atol=1e-10)
        assert m.spe_limit() == pytest.approx(ref.spe_limit(), rel=1e-8)


def test_row_order_does_not_matter():
    # A property of PCA (Jolliffe 2002): the fit depends on the set of samples, not their order.
    from sklearn.datasets import load_wine

    X = load_wine().data
    perm = np.random.default_rng(3).permutation(len(X))
    a = PCAModel(n_components=3).fit(X)
    b = PCAModel(n_components=3).fit(X[perm])
    np.testing.assert_allclose(b.loadings_, a.loadings_, atol=1e-10)
    np.testing.assert_allclose(b.scores_, a.scores_[perm], atol=1e-9)
    np.testing.assert_allclose(b.t2_, a.t2_[perm], rtol=1e-9)
    np.testing.assert_allclose(b.eigenvalues_, a.eigenvalues_, rtol=1e-10)


def test_learned_attributes_and_identities():
    # Identities of PCA (Jolliffe 2002, ch. 3): orthonormal loadings, uncorrelated scores with
    # variance lambda_a, explained ratios from the total sum of squares.
    from sklearn.datasets import load_diabetes

    X = load_diabetes().data
    n, p = X.shape
    m = PCAModel(n_components=4).fit(X)
    np.testing.assert_allclose(m.loadings_.T @ m.loadings_, np.eye(4), atol=1e-12)
    cov = m.scores_.T @ m.scores_ / (n - 1)
    np.testing.assert_allclose(cov, np.diag(m.eigenvalues_[:4]), atol=1e-10)
    assert m.eigenvalues_.size == p
    assert np.all(np.diff(m.eigenvalues_) <= 0)
    np.testing.assert_allclose(m.explained_variance_ratio_, m.eigenvalues_[:4] / m.eigenvalues_.sum(), rtol=1e-10)
    np.testing.assert_allclose(m.cumulative_explained_, np.cumsum(m.explained_variance_ratio_))
    # Variable explained share: 1 - residual SS / SS per variable, computed directly.
    Z = preprocess_reference(X, "autoscale")
    E = Z - m.scores_ @ m.loadings_.T
    np.testing.assert_allclose(m.variable_explained_, 1 - (E**2).sum(0) / (Z**2).sum(0), atol=1e-10)
    assert m.n_samples_ == n and m.n_missing_ == 0 and m.n_components_ == 4
    assert m.sample_ids_ == [str(i + 1) for i in range(n)]
    assert m.variable_names_ == [f"x{j + 1}" for j in range(p)]
    # (the diabetes data ship centred: compare means on the scale of the SDs)
    np.testing.assert_allclose(m.mean_, X.mean(0), rtol=0, atol=1e-12 * X.std(0).max())
    np.testing.assert_allclose(m.scale_, X.std(0, ddof=1), rtol=1e-12)


def test_transform_reconstruct_residuals_on_training_data():
    # Definitions (Jolliffe 2002): t = P'z, reconstruction z_hat = P t, residual e = z - z_hat.
    from sklearn.datasets import load_wine

    X = load_wine().data
    m = PCAModel(n_components=3, log10=["x13"]).fit(X)
    np.testing.assert_allclose(m.transform(X), m.scores_, atol=1e-12)
    np.testing.assert_allclose(m.hotelling_t2(X), m.t2_, rtol=1e-12)
    np.testing.assert_allclose(m.spe(X), m.spe_, rtol=1e-10)
    Z = m.preprocess(X)
    np.testing.assert_allclose(m.residuals(X), Z - m.scores_ @ m.loadings_.T, atol=1e-12)
    # Reconstruction in original units: undo scaling and log10 by hand.
    zhat = m.scores_ @ m.loadings_.T
    expected = zhat * m.scale_ + m.mean_
    expected[:, 12] = 10 ** expected[:, 12]
    np.testing.assert_allclose(m.reconstruct(X), expected, rtol=1e-12)
    # Keeping every component reproduces the data.
    full = PCAModel(n_components=13, log10=["x13"]).fit(X)
    np.testing.assert_allclose(full.reconstruct(X), X, rtol=1e-9)
    assert np.all(full.spe_ == 0) and full.spe_limit() == 0.0


def test_dataframe_input_names_and_column_matching():
    rng = np.random.default_rng(5)
    df = pd.DataFrame(rng.normal(size=(12, 4)), index=[f"S{i}" for i in range(12)], columns=list("abcd"))
    m = PCAModel(n_components=2).fit(df)
    assert m.sample_ids_ == list(df.index) and m.variable_names_ == list("abcd")
    shuffled = df[["d", "b", "a", "c"]].assign(extra=1.0)
    np.testing.assert_allclose(m.transform(shuffled), m.scores_, atol=1e-12)
    with pytest.raises(InputError, match="missing from the data: c"):
        m.transform(df.drop(columns="c"))
    with pytest.raises(InputError, match="expects 4"):
        m.transform(df.to_numpy()[:, :3])


def test_preprocess_keeps_missing_values():
    m = PCAModel(n_components=2).fit(NIST_DATA)
    row = np.array([[7.0, np.nan, 3.0]])
    z = m.preprocess(row)
    assert np.isnan(z[0, 1])
    expected = (row[0] - NIST_DATA.mean(0)) / NIST_DATA.std(0, ddof=1)
    np.testing.assert_allclose(z[0, [0, 2]], expected[[0, 2]])


# ----------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"n_components": 0}, "n_components=0"),
        ({"n_components": 2.5}, "n_components=2.5"),
        ({"n_components": 3, "scaling": "unit"}, "scaling='unit'"),
        ({"n_components": 2, "solver": "magic"}, "solver='magic'"),
        ({"n_components": 2, "confidence": 1.5}, "confidence=1.5"),
        ({"n_components": 4}, "n_components=4 exceeds the 3"),
        ({"n_components": 2, "log10": ["nope"]}, "log10 variable.*nope"),
    ],
)
def test_bad_settings_are_input_errors(kwargs, match):
    with pytest.raises(InputError, match=match):
        PCAModel(**kwargs).fit(NIST_DATA)


def test_rank_deficient_data_limit_components():
    rng = np.random.default_rng(2)
    X = rng.normal(size=(30, 2)) @ rng.normal(size=(2, 6))
    m = PCAModel(n_components=2, scaling="center").fit(X)
    assert m.eigenvalues_.size == 2
    with pytest.raises(InputError, match="rank of the preprocessed data \\(2 components"):
        PCAModel(n_components=3, scaling="center").fit(X)


def test_bad_data_are_input_errors():
    with pytest.raises(InputError, match="at least 2 samples"):
        PCAModel(1).fit(NIST_DATA[:1])
    bad = NIST_DATA.copy()
    bad[2, 1] = np.inf
    with pytest.raises(InputError, match="infinite value inf in variable 'x2', sample '3'"):
        PCAModel(2).fit(bad)
    empty = NIST_DATA.copy()
    empty[4] = np.nan
    with pytest.raises(InputError, match="no values: 5"):
        PCAModel(2).fit(empty)
    with pytest.raises(InputError, match="non-numeric"):
        PCAModel(2).fit(pd.DataFrame({"a": ["x", "y", "z"], "b": [1.0, 2.0, 3.0]}))
    with pytest.raises(InputError, match="2-D"):
        PCAModel(1).fit(np.arange(5.0))


@pytest.mark.parametrize("solver", SOLVERS)
def test_large_offsets_and_drift_stay_exact(solver):
    # Numerical care (Chan, Golub & LeVeque 1983, The American Statistician 37, 242-247): means far
    # larger than the SDs, and a strong drift so the first rows are far from the rest, must not
    # cost digits. Reference: LAPACK SVD of the data centred with numpy, to 1e-8.
    rng = np.random.default_rng(21)
    n, p = 3000, 6
    X = rng.standard_normal((n, p)) @ rng.standard_normal((p, p))
    X[:, 0] += 1e7  # offset 1e7 against an SD of about 1
    X[:, 1] += np.linspace(0, 200, n)  # drift: early rows 100 SD away from the mean
    Z = preprocess_reference(X, "autoscale")
    s = linalg.svd(Z, compute_uv=False)
    model = PCAModel(n_components=3, solver=solver).fit(X)
    np.testing.assert_allclose(model.eigenvalues_, s**2 / (n - 1), rtol=1e-8)
    np.testing.assert_allclose(model.scale_, X.std(0, ddof=1), rtol=1e-10)
    # Values near 1e7 carry an absolute rounding of 1e-9 (one ulp, IEEE 754), so T2 (mean A = 3)
    # can only agree to about 1e-8 absolute whatever the algorithm.
    reference = PCAModel(n_components=3, solver="svd").fit(X).t2_
    np.testing.assert_allclose(model.t2_, reference, rtol=1e-8, atol=3e-8)


def test_failed_fit_leaves_the_model_unchanged():
    # Project rule (brief): bad input gets a clear message and changes nothing.
    model = PCAModel(n_components=2).fit(NIST_DATA)
    state = {k: (v.copy() if isinstance(v, np.ndarray) else v) for k, v in model.__dict__.items()}
    model.n_components = 3
    rank_deficient = np.column_stack([NIST_DATA[:, 0], 2 * NIST_DATA[:, 0], NIST_DATA[:, 1]])
    with pytest.raises(InputError, match="rank"):
        model.fit(rank_deficient)
    model.n_components = 2
    assert model.__dict__.keys() == state.keys()
    for key, value in state.items():
        if isinstance(value, np.ndarray):
            np.testing.assert_array_equal(model.__dict__[key], value)
        else:
            assert model.__dict__[key] == value


def test_memory_layout_and_ids_do_not_change_the_fit():
    # Row-major, column-major (what pandas hands out) and DataFrame input are the same data; a refit
    # without ids names rows by number again. New-sample SPE against the explicit residual z - zPP'
    # (Jolliffe 2002, section 10.1) computed with numpy, with means far larger than the SDs.
    rng = np.random.default_rng(31)
    X = rng.standard_normal((900, 7)) @ rng.standard_normal((7, 7)) + [1e6, 0, 5, -30, 0, 1e3, 2]
    model = PCAModel(n_components=3).fit(X, sample_ids=[f"r{i}" for i in range(900)])
    assert model.sample_ids_[:2] == ["r0", "r1"]
    model.fit(X)
    assert model.sample_ids_[:2] == ["1", "2"]
    for same in (np.asfortranarray(X), pd.DataFrame(X, columns=[f"x{j + 1}" for j in range(7)])):
        other = PCAModel(n_components=3).fit(same)
        np.testing.assert_allclose(other.eigenvalues_, model.eigenvalues_, rtol=1e-12)
        np.testing.assert_allclose(other.scores_, model.scores_, rtol=0, atol=1e-9)
        np.testing.assert_allclose(other.spe_, model.spe_, rtol=1e-9)
    new = X[:50] * rng.uniform(0.99, 1.01, size=(50, 7))
    Z = (new - X.mean(axis=0)) / X.std(axis=0, ddof=1)
    P = model.loadings_
    np.testing.assert_allclose(model.spe(new), np.sum((Z - Z @ P @ P.T) ** 2, axis=1), rtol=1e-9)
