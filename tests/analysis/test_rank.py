"""Tests for analysis.rank: broken stick, parallel analysis, ekf cross-validation, recommendation."""

import json
from fractions import Fraction

import numpy as np
import pytest

from analysis.errors import InputError
from analysis.rank import (
    TABLE_COLUMNS,
    broken_stick,
    data_eigenvalues,
    ekf_cross_validation,
    ekf_press,
    mean_imputed,
    parallel_analysis,
    rank_table,
)

# NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.5.2 "Numerical Example".
NIST = np.array(
    [[7, 4, 3], [4, 1, 8], [6, 3, 5], [8, 6, 1], [8, 5, 7], [7, 2, 9], [5, 3, 3], [9, 5, 8], [7, 4, 5], [8, 2, 2]],
    dtype=float,
)


def _autoscale(X):
    return (X - X.mean(axis=0)) / X.std(axis=0, ddof=1)


def _planted(rng, n, p, rank, noise=0.3, missing=0.0):
    """Data with a known number of components: rank strong directions plus small noise."""
    strengths = np.linspace(5.0, 2.0, rank)
    scores = rng.standard_normal((n, rank)) * strengths
    loadings = np.linalg.qr(rng.standard_normal((p, rank)))[0]
    X = scores @ loadings.T + noise * rng.standard_normal((n, p))
    if missing:
        X[rng.random(X.shape) < missing] = np.nan
    return X


def test_broken_stick_matches_jacksons_formula():
    # Jackson, D.A. (1993) Ecology 74(8), 2204-2214: b_k = (1/p) sum_{i=k..p} 1/i, computed exactly.
    for p in (1, 2, 5, 12):
        expected = [float(sum(Fraction(1, i) for i in range(k, p + 1)) / p) for k in range(1, p + 1)]
        np.testing.assert_allclose(broken_stick(p), expected, rtol=1e-14)
    # The shares of all p components add up to the whole (same formula, summed by hand).
    assert broken_stick(7).sum() == pytest.approx(1.0, rel=1e-14)


def test_eigenvalues_match_nist_handbook_and_nag_example():
    # NIST/SEMATECH e-Handbook 6.5.5.2: correlation-matrix eigenvalues 1.769, 0.927, 0.304.
    np.testing.assert_allclose(data_eigenvalues(_autoscale(NIST)), [1.769, 0.927, 0.304], atol=6e-4)
    # NAG Library g03aac example (same data, covariance PCA): 8.2739, 3.6761, 0.7499.
    np.testing.assert_allclose(data_eigenvalues(NIST - NIST.mean(axis=0)), [8.2739, 3.6761, 0.7499], atol=6e-5)


def test_rank_table_columns_against_definitions():
    Z = _autoscale(NIST)
    result = rank_table(Z, "autoscale", max_components=5, random_state=3)
    assert list(result.table.columns) == TABLE_COLUMNS
    # Only 3 variables: at most 3 rows. Explained shares from numpy's SVD of the same data (common practice).
    assert list(result.table["components"]) == [1, 2, 3]
    singular = np.linalg.svd(Z, compute_uv=False)
    np.testing.assert_allclose(result.table["explained"], singular**2 / np.sum(singular**2), rtol=1e-10)
    np.testing.assert_allclose(result.table["cumulative"].iloc[-1], 1.0, rtol=1e-12)
    np.testing.assert_allclose(result.table["broken_stick"], [11 / 18, 5 / 18, 2 / 18], rtol=1e-12)
    assert "the data allow at most 3 component(s)" in result.notes


def _direct_parallel_thresholds(Z, scaling, n_components, n_simulations, seed, quantile=95):
    """Horn (1965) parallel analysis computed straight from its definition with numpy's SVD."""
    n, p = Z.shape
    m = np.nanmean(Z, axis=0)
    s = np.nanstd(Z, axis=0, ddof=1)
    rng = np.random.default_rng(seed)
    values = []
    for _ in range(n_simulations):
        N = rng.standard_normal((n, p))
        centred = N - N.mean(axis=0)
        sd = N.std(axis=0, ddof=1)
        R = {
            "none": m + s * N,
            "center": s * centred,
            "autoscale": centred / sd,
            "pareto": s * centred / np.sqrt(sd),
        }[scaling]
        values.append((np.linalg.svd(R, compute_uv=False) ** 2 / (n - 1))[:n_components])
    return np.percentile(np.array(values), quantile, axis=0)


@pytest.mark.parametrize("scaling", ["none", "center", "autoscale", "pareto"])
def test_parallel_analysis_matches_direct_computation_on_wide_data(scaling):
    # Horn, J.L. (1965) Psychometrika 30, 179-185: 95th percentile of eigenvalues of random normal data of the
    # same shape after the same preprocessing; reference computed directly with numpy.linalg.svd from the
    # same random stream (wide data draw the random matrix itself).
    rng = np.random.default_rng(11)
    Z = rng.normal(3.0, 2.0, size=(9, 15)) * np.linspace(0.5, 3.0, 15)
    Z[1, 2] = np.nan
    ours = parallel_analysis(Z, scaling, 4, n_simulations=30, random_state=5)
    expected = _direct_parallel_thresholds(Z, scaling, 4, 30, 5)
    np.testing.assert_allclose(ours, expected, rtol=1e-8)


@pytest.mark.parametrize("scaling", ["none", "center", "autoscale", "pareto"])
def test_parallel_analysis_of_tall_data_has_the_distribution_of_the_direct_computation(scaling):
    # Tall data are simulated through the Wishart distribution of the cross-product (Bartlett
    # decomposition; Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd ed.,
    # sections 3.3 and 7.2), not from the same random numbers, so the check is distributional: the
    # leading random eigenvalues of both routes (600 simulations each, 40 x 6) pass a two-sample
    # Kolmogorov-Smirnov test (scipy.stats.ks_2samp; seeded, p > 0.001), and the thresholds agree
    # within their Monte Carlo error.
    from scipy import stats

    from analysis.rank import _observed_column_stats, _random_eigenvalues_tall

    rng = np.random.default_rng(11)
    Z = rng.normal(3.0, 2.0, size=(40, 6)) * np.linspace(0.5, 3.0, 6)
    Z[1, 2] = np.nan
    means, spreads = _observed_column_stats(Z)
    draws = np.random.default_rng(5)
    ours = np.array([_random_eigenvalues_tall(draws, 40, 6, means, spreads, scaling, 3) for _ in range(600)])
    m, s = np.nanmean(Z, axis=0), np.nanstd(Z, axis=0, ddof=1)
    direct = []
    for _ in range(600):
        N = draws.standard_normal((40, 6))
        centred = N - N.mean(axis=0)
        sd = N.std(axis=0, ddof=1)
        R = {"none": m + s * N, "center": s * centred, "autoscale": centred / sd,
             "pareto": s * centred / np.sqrt(sd)}[scaling]
        direct.append((np.linalg.svd(R, compute_uv=False) ** 2 / 39)[:3])
    direct = np.array(direct)
    for a in range(3):
        assert stats.ks_2samp(ours[:, a], direct[:, a]).pvalue > 1e-3
    spread = direct.std(axis=0) / np.sqrt(600)
    np.testing.assert_allclose(ours.mean(axis=0), direct.mean(axis=0), atol=5 * np.sqrt(2) * spread.max())


def test_wishart_draws_have_the_textbook_moments():
    # W ~ Wishart(df, I_p): E W = df I, Var W_ii = 2 df, Var W_ij = df for i != j
    # (Anderson 2003, section 7.2 / 7.3). 4,000 seeded draws, df = 30, p = 4; within 5 standard errors.
    from analysis.rank import _wishart_identity

    rng = np.random.default_rng(8)
    draws = np.array([_wishart_identity(rng, 30, 4) for _ in range(4000)])
    mean, var = draws.mean(axis=0), draws.var(axis=0, ddof=1)
    expected_var = np.where(np.eye(4, dtype=bool), 60.0, 30.0)
    np.testing.assert_allclose(mean, 30 * np.eye(4), atol=5 * np.sqrt(expected_var / 4000).max())
    assert np.all(np.abs(var / expected_var - 1) < 5 * np.sqrt(2 / 4000) * 2)
    assert np.allclose(draws, np.swapaxes(draws, 1, 2)) and np.all(np.linalg.eigvalsh(draws) > 0)


def test_parallel_analysis_autoscaled_noise_thresholds_exceed_one():
    # Eigenvalues of the correlation matrix of independent normal data scatter around 1, the largest above it
    # (Horn 1965, the reason parallel analysis replaces the eigenvalue-above-1 rule).
    rng = np.random.default_rng(0)
    thresholds = parallel_analysis(rng.standard_normal((50, 10)), "autoscale", 3, n_simulations=40)
    assert thresholds[0] > 1.0
    assert np.all(np.diff(thresholds) < 0)


def test_ekf_press_matches_leave_one_cell_out_least_squares():
    # Bro, Kjeldahl, Smilde & Kiers (2008) Anal. Bioanal. Chem. 390, 1241-1251, "ekf": each cell of a left-out row
    # is predicted from scores fitted by least squares to the row's other observed cells. Reference: numpy lstsq
    # per cell, by definition.
    rng = np.random.default_rng(2)
    loadings = np.linalg.qr(rng.standard_normal((7, 3)))[0]
    rows = rng.standard_normal((6, 7))
    rows[1, [0, 4]] = np.nan
    rows[3, 6] = np.nan
    expected = np.zeros(4)
    for x in rows:
        for j in np.flatnonzero(~np.isnan(x)):
            expected[0] += x[j] ** 2
            others = ~np.isnan(x)
            others[j] = False
            for a in range(1, 4):
                t = np.linalg.lstsq(loadings[others, :a], x[others], rcond=None)[0]
                expected[a] += (x[j] - loadings[j, :a] @ t) ** 2
    press, skipped = ekf_press(rows, loadings)
    assert skipped == 0
    np.testing.assert_allclose(press, expected, rtol=1e-10)


def test_ekf_press_skips_rows_with_too_few_observed_cells():
    loadings = np.linalg.qr(np.random.default_rng(4).standard_normal((5, 2)))[0]
    rows = np.ones((3, 5))
    rows[0, :3] = np.nan  # 2 observed cells cannot give a leave-one-out prediction with 2 components
    press, skipped = ekf_press(rows, loadings)
    assert skipped == 1
    assert press[0] == pytest.approx(10.0)  # two complete rows of ones: 2 x 5 squared cells


def test_ekf_cross_validation_matches_direct_fold_computation():
    # Same definition as above, now with the fold loop: training rows centred by their own means and loadings
    # from numpy's SVD; folds as documented (default_rng(seed).permutation(n) % k).
    rng = np.random.default_rng(8)
    Z = _planted(rng, 30, 6, 2)
    n_folds, seed = 5, 13
    folds = np.random.default_rng(seed).permutation(30) % n_folds
    press = np.zeros(4)
    for fold in range(n_folds):
        train, test = Z[folds != fold], Z[folds == fold]
        centre = train.mean(axis=0)
        vt = np.linalg.svd(train - centre, full_matrices=False)[2]
        for x in test - centre:
            for j in range(6):
                others = np.arange(6) != j
                press[0] += x[j] ** 2
                for a in range(1, 4):
                    P = vt[:a].T
                    t = np.linalg.lstsq(P[others], x[others], rcond=None)[0]
                    press[a] += (x[j] - P[j] @ t) ** 2
    cv, notes = ekf_cross_validation(Z, 3, n_folds=n_folds, random_state=seed)
    np.testing.assert_allclose(cv, 1 - press[1:] / press[0], rtol=1e-9)
    assert notes == []


@pytest.mark.parametrize(("n", "p", "rank", "seed"), [(60, 10, 3, 1), (40, 30, 2, 2), (20, 50, 4, 3), (150, 8, 1, 4)])
def test_cross_validation_recovers_planted_rank(n, p, rank, seed):
    # Theory check, not a table: data built from `rank` strong components plus small independent noise have
    # exactly `rank` predictive components (Eastment & Krzanowski 1982; Bro et al. 2008).
    Z = _autoscale(_planted(np.random.default_rng(seed), n, p, rank))
    result = rank_table(Z, "autoscale", max_components=10, random_state=0)
    assert result.method == "cross-validation"
    assert result.recommended == rank
    assert f"component {rank + 1} would change it by" in result.rule
    if n > p:
        # With many more samples than variables parallel analysis agrees on such clear data (Horn 1965): exactly
        # `rank` eigenvalues above the thresholds. (With n < p random eigenvalues are large and it is conservative.)
        above = result.table["eigenvalue"] > result.table["parallel_threshold"]
        assert above.sum() == rank and above.iloc[:rank].all()


def test_same_seed_same_table_and_subsampling_is_reported():
    Z = _autoscale(_planted(np.random.default_rng(5), 120, 6, 2))
    first, notes = ekf_cross_validation(Z, 3, random_state=7, max_rows=50)
    second, _ = ekf_cross_validation(Z, 3, random_state=7, max_rows=50)
    np.testing.assert_array_equal(first, second)
    assert notes == ["cross-validation used a random subset of 50 of the 120 samples (seeded)"]
    a = rank_table(Z, "autoscale", 4, random_state=1).to_dict()
    b = rank_table(Z, "autoscale", 4, random_state=1).to_dict()
    assert a == b


def test_noise_gets_one_component_and_says_why():
    # Independent noise has no predictive component (theory check); the smallest model is kept.
    Z = _autoscale(np.random.default_rng(6).standard_normal((40, 8)))
    result = rank_table(Z, "autoscale", 5)
    assert result.recommended == 1
    assert "look like noise" in result.rule


def test_too_few_samples_falls_back_to_parallel_analysis():
    rng = np.random.default_rng(9)
    Z = _autoscale(_planted(rng, 3, 5, 1, noise=0.05))
    result = rank_table(Z, "autoscale", 5)
    assert result.method == "parallel analysis"
    assert result.table["cv_explained"].isna().all()
    assert "Horn 1965" in result.rule and "at least 4 samples" in result.rule
    assert result.to_dict()["table"][0]["cv_explained"] is None
    json.dumps(result.to_dict(), allow_nan=False)  # standard JSON (RFC 8259 has no NaN)


def test_mean_imputed_fills_column_means():
    Z = np.array([[1.0, np.nan], [3.0, 4.0], [np.nan, 8.0]])
    np.testing.assert_array_equal(mean_imputed(Z), [[1.0, 6.0], [3.0, 4.0], [2.0, 8.0]])


def test_missing_cells_cross_validation_still_finds_planted_rank():
    # Theory check with 10% missing cells (missing completely at random): missing cells are neither predicted nor
    # used, so the planted rank is still found.
    pytest.importorskip("analysis.pca")
    X = _planted(np.random.default_rng(10), 80, 9, 2, missing=0.10)
    Z = (X - np.nanmean(X, axis=0)) / np.nanstd(X, axis=0, ddof=1)
    result = rank_table(Z, "autoscale", 6)
    assert result.method == "cross-validation"
    assert result.recommended == 2
    assert np.isfinite(result.table["eigenvalue"]).all()


def test_bad_max_components_is_input_error():
    from analysis.rank import choose_components

    with pytest.raises(InputError, match="max_components"):
        choose_components(NIST, max_components=0)
    with pytest.raises(InputError, match="max_components"):
        choose_components(NIST, max_components="3")


def test_choose_components_preprocesses_like_the_model():
    # NIST/SEMATECH e-Handbook 6.5.5.2: autoscaled data give the correlation eigenvalues 1.769, 0.927, 0.304;
    # NAG g03aac example: centred data give 8.2739, 3.6761, 0.7499.
    from analysis.rank import choose_components

    auto = choose_components(NIST, scaling="autoscale")
    np.testing.assert_allclose(auto.table["eigenvalue"], [1.769, 0.927, 0.304], atol=6e-4)
    centred = choose_components(NIST, scaling="center")
    np.testing.assert_allclose(centred.table["eigenvalue"], [8.2739, 3.6761, 0.7499], atol=6e-5)
    # log10 of a variable is applied before scaling: same table as logging the column by hand (definition).
    logged = NIST.copy()
    logged[:, 0] = np.log10(logged[:, 0])
    import pandas as pd

    frame = pd.DataFrame(NIST, columns=["a", "b", "c"])
    np.testing.assert_allclose(
        choose_components(frame, log10=["a"]).table["eigenvalue"],
        data_eigenvalues(_autoscale(logged)),
        rtol=1e-10,
    )
    with pytest.raises(InputError, match="log10"):
        choose_components(frame, log10=["zz"])


def test_leading_eigenvalues_of_larger_matrices_agree_with_lapack_svd():
    # Only the leading eigenpairs are computed (LAPACK MRRR subset); reference: numpy's LAPACK SVD.
    rng = np.random.default_rng(12)
    Z = _autoscale(_planted(rng, 450, 520, 3, noise=0.1))
    np.testing.assert_allclose(
        data_eigenvalues(Z, 6), (np.linalg.svd(Z, compute_uv=False) ** 2 / 449)[:6], rtol=1e-9
    )
    ours = parallel_analysis(Z, "autoscale", 3, n_simulations=3, random_state=2)
    np.testing.assert_allclose(ours, _direct_parallel_thresholds(Z, "autoscale", 3, 3, 2), rtol=1e-8)
    cv, _ = ekf_cross_validation(Z, 4, n_folds=3, random_state=0)
    assert np.argmax(np.diff(np.concatenate([[0.0], cv])) < 0.01) == 3  # planted rank 3 (theory check)


def test_uncentred_scaling_cross_validates_without_centring():
    # With scaling "none" the model is not centred, so neither are the folds: PRESS_0 is the plain sum of squares
    # (definition of ekf with a zero offset; reference computed here with numpy lstsq, as above).
    rng = np.random.default_rng(21)
    Z = _planted(rng, 12, 4, 1) + 5.0
    folds = np.random.default_rng(0).permutation(12) % 7
    press = np.zeros(2)
    for fold in range(7):
        vt = np.linalg.svd(Z[folds != fold], full_matrices=False)[2]
        for x in Z[folds == fold]:
            for j in range(4):
                others = np.arange(4) != j
                press[0] += x[j] ** 2
                t = np.linalg.lstsq(vt[:1].T[others], x[others], rcond=None)[0]
                press[1] += (x[j] - vt[0, j] * t[0]) ** 2
    cv, _ = ekf_cross_validation(Z, 1, random_state=0, centre=False)
    np.testing.assert_allclose(cv, 1 - press[1:] / press[0], rtol=1e-9)


def test_rank_table_and_model_share_one_rank_tolerance():
    # One tolerance, lambda > lambda_max * 10 * max(n, p) * eps (common practice; cf.
    # numpy.linalg.matrix_rank), in analysis.pca.numerical_rank; the table may not offer a
    # component count that PCAModel then refuses. The last eigenvalue sits at 5x the unit
    # rounding level: above max(n, p) * eps, below 10 * max(n, p) * eps.
    from analysis.pca import PCAModel

    rng = np.random.default_rng(8)
    n, p = 200, 5
    centred = rng.standard_normal((n, p))
    centred -= centred.mean(axis=0)
    basis = np.linalg.qr(centred)[0]  # orthonormal columns with mean 0: centring keeps the spectrum
    ratio = 5 * max(n, p) * np.finfo(float).eps
    singular = np.sqrt(np.array([1.0, 0.5, 0.25, 0.1, ratio]))
    X = basis * singular @ np.linalg.qr(rng.standard_normal((p, p)))[0]
    table = rank_table(X - X.mean(axis=0), "center").table
    assert len(table) == 4
    assert PCAModel(4, scaling="center").fit(X).eigenvalues_.size == 4
    with pytest.raises(InputError, match="rank"):
        PCAModel(5, scaling="center").fit(X)


def _wine():
    from sklearn.datasets import load_wine

    return load_wine().data  # open dataset shipped with scikit-learn: 178 wines x 13 measurements


def test_cross_validation_is_not_estimable_from_p_minus_1_components():
    # With A >= p - 1 components a row's other p - 1 cells fix its scores exactly, so the ekf
    # prediction of the left-out cell has no check (common practice). Wine, 13 variables: counts 12
    # and 13 are reported as not estimable, with the reason, instead of a huge negative share.
    from analysis.rank import choose_components

    result = choose_components(_wine(), max_components=13)
    cv = result.table["cv_explained"].to_numpy()
    assert np.isfinite(cv[:11]).all() and np.isnan(cv[11:]).all()
    assert any("not estimable from 12 components on" in note for note in result.notes)
    assert result.to_dict()["table"][11]["cv_explained"] is None


@pytest.mark.parametrize("fraction", [0.0, 0.05])
def test_table_columns_are_the_fitted_models_numbers(fraction):
    # One number for one thing: the table's eigenvalue / explained / cumulative columns equal the
    # fitted PCAModel's (explained_variance_ratio_, cumulative_explained_, eigenvalues_) to the last
    # digit, on wine complete and with 5 % of the cells removed at random (seeded). On complete data
    # they also equal the table's own decomposition (LAPACK, 1e-10).
    from analysis.pca import PCAModel
    from analysis.rank import choose_components, with_model

    X = _wine().copy()
    X[np.random.default_rng(3).random(X.shape) < fraction] = np.nan
    rank = choose_components(X, max_components=8)
    model = PCAModel(rank.recommended).fit(X)
    table = with_model(rank.to_dict(), model)["table"]
    a = model.n_components_
    np.testing.assert_array_equal([r["explained"] for r in table[:a]], model.explained_variance_ratio_)
    np.testing.assert_allclose([r["cumulative"] for r in table[:a]], model.cumulative_explained_, rtol=1e-15)
    np.testing.assert_array_equal([r["eigenvalue"] for r in table], model.eigenvalues_[: len(table)])
    notes = with_model(rank.to_dict(), model)["notes"]
    if fraction:
        assert any("preliminary decomposition" in note for note in notes)
    else:
        np.testing.assert_allclose([r["explained"] for r in table], rank.table["explained"], rtol=1e-10)
        assert not any("preliminary decomposition" in note for note in notes)
