"""ROBPCA (analysis.robust) against its paper, scipy and scikit-learn.

Sources named beside each check:
- Hubert, M., Rousseeuw, P.J., Vanden Branden, K. (2005) ROBPCA: a new approach
  to robust principal component analysis. Technometrics 47(1), 64-79
  (the three stages, h, the score- and orthogonal-distance cut-offs).
- Rousseeuw, P.J., Van Driessen, K. (1999) A fast algorithm for the minimum
  covariance determinant estimator. Technometrics 41(3), 212-223 (reweighting).
- scikit-learn ``sklearn.covariance.MinCovDet`` as the reference FastMCD;
  its reweighted estimate carries the Croux & Haesbroeck (1999) consistency
  factor from scikit-learn 1.8 on (scikit-learn pull request #32117).
- scipy.stats chi2 and norm quantiles.
"""

from __future__ import annotations

import numpy as np
import pytest
import sklearn
from scipy import stats
from sklearn.covariance import MinCovDet

from analysis.errors import InputError
from analysis.pca import PCAModel
from analysis.robust import RobustPCAModel, compare_flags, fit_mcd, od_cutoff

NOMINAL_FLAG_RATE = 1 - 0.975**2  # SD and OD beyond their 97.5% cut-offs, independent at the normal (common practice)


def _latent_plane(rng, n, p=10):
    """n samples near a 2-dimensional plane in p variables: scores with SD 3 and 2, noise SD 0.5."""
    scores = rng.standard_normal((n, 2)) * [3.0, 2.0]
    X = rng.standard_normal((n, p)) * 0.5
    X[:, :2] += scores
    return X


def _masked_group(seed, n_clean=800, n_group=200, shift=8.0):
    """A 20 % group shifted along variable 3, off the plane of the rest: it pulls the classical PC1 to itself."""
    rng = np.random.default_rng(seed)
    X = _latent_plane(rng, n_clean + n_group)
    X[n_clean:, 2] += shift
    group = np.r_[np.zeros(n_clean, dtype=bool), np.ones(n_group, dtype=bool)]
    return X, group


def _univariate_reweighted_mcd(y, h):
    """Reweighted univariate MCD written out: every h-window of the sorted data, the smallest variance.

    Rousseeuw & Leroy (1987), Robust Regression and Outlier Detection, ch. 4
    (the univariate MCD as the h-window of least variance); consistency factors
    c = alpha / F_{chi2, 3}(chi2_{1, alpha}) (Croux & Haesbroeck 1999), and the
    97.5 % chi-square(1) reweighting of Rousseeuw & Van Driessen (1999).
    """
    n = len(y)
    ys = np.sort(y)
    windows = np.array([ys[j : j + h] for j in range(n - h + 1)])
    best = windows[np.argmin(windows.var(axis=1))]

    def factor(alpha):
        return alpha / stats.chi2.cdf(stats.chi2.ppf(alpha, 1), 3)

    t_raw, v_raw = best.mean(), best.var() * factor(h / n)
    kept = y[(y - t_raw) ** 2 / v_raw < stats.chi2.ppf(0.975, 1)]
    return kept.mean(), np.sqrt(kept.var() * factor(0.975))


# ------------------------------------------------------------------ (1) masking
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_robust_fit_flags_a_masked_group_the_classical_fit_misses(seed):
    # Hubert et al. (2005), the outlier map: the robust fit is not pulled towards a group of
    # outliers sharing a direction; the classical PCA (T2 beta limit, Tracy et al. 1992;
    # SPE limit, Jackson & Mudholkar 1979) is.
    X, group = _masked_group(seed)
    classical = PCAModel(n_components=2).fit(X)
    classical_flags = (classical.hotelling_t2(X) > classical.t2_limit()) | (classical.spe(X) > classical.spe_limit())
    robust = RobustPCAModel(n_components=2).fit(X)

    assert robust.flags_[group].mean() >= 0.90
    assert classical_flags[group].mean() < 0.5
    # False flags on the clean 800 near 1 - 0.975^2 = 4.9 % (binomial SD 0.8 %; common practice).
    assert abs(robust.flags_[~group].mean() - NOMINAL_FLAG_RATE) < 0.03
    # The side-by-side lists: the group appears among the samples only the robust fit flags.
    ids = [f"S{i}" for i in range(len(X))]
    both = compare_flags(classical_flags, robust.flags_, ids)
    planted = {ids[i] for i in np.flatnonzero(group)}
    assert len(planted & set(both["robust_only"])) >= 0.9 * len(planted) - both["counts"]["both"]
    assert sum(both["counts"].values()) == len(X)


def test_false_flag_rate_on_clean_data_is_near_nominal():
    # Hubert et al. (2005): both cut-offs at the 97.5 % quantile; on clean normal data about
    # 1 - 0.975^2 of the samples fall outside the regular region (binomial SD 0.2 % at n = 10,000).
    X = _latent_plane(np.random.default_rng(7), 10_000)
    robust = RobustPCAModel(n_components=2).fit(X)
    assert abs(robust.flags_.mean() - NOMINAL_FLAG_RATE) < 0.012
    for beyond in (robust.score_distance_ > robust.sd_cutoff_, robust.orthogonal_distance_ > robust.od_cutoff_):
        assert abs(beyond.mean() - 0.025) < 0.01


# ------------------------------------------------------ (2) MCD, scikit-learn
def _contaminated(seed, n=320, p=4):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((p, p))
    X = rng.multivariate_normal(np.zeros(p), A @ A.T + np.eye(p), size=n)
    X[:30] = rng.standard_normal((30, p)) + 8.0
    return X


@pytest.mark.skipif(
    tuple(int(v) for v in sklearn.__version__.split(".")[:2]) < (1, 8),
    reason="MinCovDet's reweighted estimate has the Croux-Haesbroeck factor from scikit-learn 1.8 (PR #32117)",
)
@pytest.mark.parametrize("seed", [0, 1])
def test_full_rank_fit_equals_scikit_learn_mincovdet(seed):
    # Hubert et al. (2005), stage 3: with k = p the robust scatter is the reweighted MCD of the
    # data, rotated; reference: scikit-learn MinCovDet with the same h (= 0.75 n here) and seed.
    X = _contaminated(seed)
    model = RobustPCAModel(n_components=4, scaling="none", alpha=0.75).fit(X)
    assert model.h_ == 240
    reference = MinCovDet(support_fraction=0.75, random_state=0).fit(X)

    np.testing.assert_allclose(model.eigenvalues_, np.linalg.eigvalsh(reference.covariance_)[::-1], rtol=1e-10)
    scores_cov = model.loadings_ @ np.diag(model.eigenvalues_) @ model.loadings_.T
    np.testing.assert_allclose(scores_cov * np.outer(model.scale_, model.scale_), reference.covariance_, atol=1e-10)
    np.testing.assert_allclose(model.location_ + model.center_ * model.scale_, reference.location_, atol=1e-10)
    np.testing.assert_array_equal(model.support_, reference.support_)
    # The scores' own covariance: reweighted MCD of the scores is diagonal with the eigenvalues.
    of_scores = MinCovDet(support_fraction=0.75, random_state=0).fit(model.scores_)
    np.testing.assert_allclose(of_scores.covariance_, np.diag(model.eigenvalues_), atol=1e-9)


def test_raw_mcd_equals_scikit_learn_on_any_version():
    # Rousseeuw & Van Driessen (1999): the raw MCD is the mean and covariance (divisor h) of the
    # best h-subset; reference: MinCovDet.raw_location_, raw_covariance_, raw_support_.
    X = _contaminated(3)
    fit = fit_mcd(X, h=240, random_state=0)
    reference = MinCovDet(support_fraction=0.75, random_state=0).fit(X)
    np.testing.assert_allclose(fit.raw_location, reference.raw_location_, atol=1e-12)
    np.testing.assert_allclose(fit.raw_covariance, reference.raw_covariance_, atol=1e-12)
    np.testing.assert_array_equal(fit.raw_support, reference.raw_support_)
    assert fit.support[:30].sum() == 0  # the 30 shifted rows get weight 0


# ------------------------------------------------------------- (3) cut-offs
@pytest.mark.parametrize("confidence", [0.975, 0.99])
def test_cutoffs_as_the_paper_writes_them(confidence):
    # Hubert et al. (2005): SD cut-off sqrt(chi2_{k, 0.975}); OD cut-off (mu + sigma z_0.975)^(3/2)
    # with mu, sigma the univariate MCD of OD^(2/3) (Wilson & Hilferty 1931). scipy quantiles.
    X, _ = _masked_group(4, n_clean=300, n_group=60)
    model = RobustPCAModel(n_components=3, confidence=confidence).fit(X)
    assert model.sd_cutoff_ == pytest.approx(np.sqrt(stats.chi2.ppf(confidence, 3)), rel=1e-12)
    mu, sigma = _univariate_reweighted_mcd(model.orthogonal_distance_ ** (2 / 3), model.h_)
    assert model.od_cutoff_ == pytest.approx((mu + sigma * stats.norm.ppf(confidence)) ** 1.5, rel=1e-10)
    # The h of the paper: max([alpha n], [(n + kmax + 1) / 2]), kmax = k.
    assert model.h_ == max(int(0.75 * 360), (360 + 3 + 1) // 2)


def test_od_cutoff_on_heavy_tailed_distances_matches_the_written_out_formula():
    # Same references as above, on ODs with a heavy tail (a planted 10 % at 5x the scale).
    rng = np.random.default_rng(11)
    od = np.sqrt(rng.chisquare(6, size=500))
    od[:50] *= 5
    mu, sigma = _univariate_reweighted_mcd(od ** (2 / 3), 376)
    assert od_cutoff(od, 376, 0.975) == pytest.approx((mu + sigma * stats.norm.ppf(0.975)) ** 1.5, rel=1e-10)


def test_h_rises_to_half_plus_k_for_small_alpha():
    # Hubert et al. (2005): h = max([alpha n], [(n + kmax + 1) / 2]); alpha = 0.5, n = 60, k = 5 -> 33.
    X = _latent_plane(np.random.default_rng(5), 60)
    assert RobustPCAModel(n_components=5, alpha=0.5).fit(X).h_ == 33


# ----------------------------------------------------------------- (4) p > n
def test_more_variables_than_samples():
    # Hubert et al. (2005), stage 1: the data are first reduced to the affine subspace they span
    # (an SVD of the centred data, rank <= n - 1), so ROBPCA works for p > n.
    rng = np.random.default_rng(3)
    n, p = 40, 200
    X = rng.standard_normal((n, 3)) @ rng.standard_normal((3, p)) + 0.1 * rng.standard_normal((n, p))
    X[0] += 3.0 * rng.standard_normal(p)  # one sample far off the plane
    model = RobustPCAModel(n_components=3).fit(X)

    assert model.rank_ == n - 1
    assert model.loadings_.shape == (p, 3)
    np.testing.assert_allclose(model.loadings_.T @ model.loadings_, np.eye(3), atol=1e-10)
    for values in (model.scores_, model.score_distance_, model.orthogonal_distance_):
        assert np.all(np.isfinite(values))
    assert np.isfinite(model.sd_cutoff_) and np.isfinite(model.od_cutoff_) and model.od_cutoff_ > 0
    # The loadings lie in the span of the centred (preprocessed) samples.
    z = model.preprocess(X)
    basis = np.linalg.svd(z - z.mean(axis=0), full_matrices=False)[2][: n - 1].T
    np.testing.assert_allclose(basis @ (basis.T @ model.loadings_), model.loadings_, atol=1e-10)
    assert model.regions_[0] in ("off the model plane", "far and off")


# --------------------------------------------------------------- (5) bad input
@pytest.mark.parametrize(
    "X, settings, message",
    [
        (np.ones((2, 4)) * [[1], [2]] + np.arange(4), {"n_components": 1}, "at least 3 samples"),
        (_latent_plane(np.random.default_rng(0), 30, p=4), {"n_components": 5}, "n_components=5 exceeds"),
        (_latent_plane(np.random.default_rng(0), 30, p=4), {"n_components": 0}, "n_components=0"),
        (_latent_plane(np.random.default_rng(0), 30, p=4), {"alpha": 0.3}, "alpha=0.3"),
        (_latent_plane(np.random.default_rng(0), 30, p=4), {"confidence": 1.5}, "1.5"),
    ],
)
def test_bad_settings_and_shapes_raise_input_error(X, settings, message):
    with pytest.raises(InputError, match=message):
        RobustPCAModel(**settings).fit(X)


def test_missing_values_raise_input_error_and_leave_the_model_as_it_was():
    # common practice: bad input gives a clear message and changes nothing.
    X = _latent_plane(np.random.default_rng(1), 50, p=5)
    model = RobustPCAModel(n_components=2).fit(X)
    loadings = model.loadings_.copy()
    bad = X.copy()
    bad[4, 2] = np.nan
    with pytest.raises(InputError, match="1 value\\(s\\) are missing"):
        model.fit(bad)
    np.testing.assert_array_equal(model.loadings_, loadings)


def test_rank_deficient_data_name_the_rank():
    X = _latent_plane(np.random.default_rng(2), 30, p=4)
    X = np.hstack([X, X[:, :1] + X[:, 1:2]])  # 5 variables spanning 4 dimensions
    with pytest.raises(InputError, match="exceeds the 4 dimensions"):
        RobustPCAModel(n_components=5, scaling="none").fit(X)


# ------------------------------------------------------------ (6) determinism
@pytest.mark.parametrize("n", [300, 6000])  # 6000: the subsampled projections and MCD (above 5000 / 500 rows)
def test_same_seed_same_fit(n):
    X, _ = _masked_group(9, n_clean=int(n * 0.8), n_group=n - int(n * 0.8))
    first = RobustPCAModel(n_components=2, random_state=5).fit(X)
    second = RobustPCAModel(n_components=2, random_state=5).fit(X)
    for name in ("loadings_", "eigenvalues_", "center_", "score_distance_", "orthogonal_distance_"):
        np.testing.assert_array_equal(getattr(first, name), getattr(second, name))
    assert first.od_cutoff_ == second.od_cutoff_
    np.testing.assert_array_equal(first.regions_, second.regions_)


# ------------------------------------- (7) the classical model's interface, for the web app
@pytest.mark.parametrize("confidence", [0.9, 0.99])
def test_cutoffs_at_another_level_follow_the_same_formulas(confidence):
    # Hubert et al. (2005) cut-offs at any level from one fit: sqrt(chi2_{k, conf}) (scipy) and
    # (mu + sigma z_conf)^(3/2) with mu, sigma the reweighted univariate MCD of the fit's OD^(2/3).
    X, _ = _masked_group(6, n_clean=400, n_group=80)
    model = RobustPCAModel(n_components=2).fit(X)
    sd_cut, od_cut = model.cutoffs(confidence)
    assert sd_cut == pytest.approx(np.sqrt(stats.chi2.ppf(confidence, 2)), rel=1e-12)
    mu, sigma = _univariate_reweighted_mcd(model.orthogonal_distance_ ** (2 / 3), model.h_)
    assert od_cut == pytest.approx((mu + sigma * stats.norm.ppf(confidence)) ** 1.5, rel=1e-10)
    # T2 / SPE of the interface are SD^2 / OD^2 with the squared cut-offs as limits.
    np.testing.assert_allclose(model.hotelling_t2(X), model.score_distance_**2, rtol=1e-10)
    np.testing.assert_allclose(model.spe(X), model.orthogonal_distance_**2, rtol=1e-10)
    assert model.t2_limit(confidence) == pytest.approx(sd_cut**2) and model.spe_limit(confidence) == pytest.approx(
        od_cut**2)
    regions = model.regions_at(confidence)
    np.testing.assert_array_equal(regions != "regular", (model.score_distance_ > sd_cut)
                                  | (model.orthogonal_distance_ > od_cut))


def test_explained_shares_are_those_of_the_regular_samples_written_out():
    # Our definition (docstring of RobustPCAModel._explained; no published counterpart): over the regular
    # samples, component a explains sum t_a^2 / sum ||z - c||^2, variable j 1 - sum e_j^2 / sum (z_j - c_j)^2.
    X, _ = _masked_group(8, n_clean=300, n_group=60)
    model = RobustPCAModel(n_components=2).fit(X)
    regular = model.regions_ == "regular"
    centred = model.preprocess(X)[regular] - model.center_
    scores = centred @ model.loadings_
    residual = centred - scores @ model.loadings_.T
    np.testing.assert_allclose(model.explained_variance_ratio_, (scores**2).sum(0) / (centred**2).sum(), rtol=1e-10)
    np.testing.assert_allclose(model.variable_explained_, 1 - (residual**2).sum(0) / (centred**2).sum(0),
                               rtol=1e-8, atol=1e-12)


def test_explanation_names_the_shifted_variable_and_sums_to_the_distances():
    # The planted group is shifted along variable 3 (index 2) off the plane: its OD drives the sentence,
    # and variable 3 carries most of OD^2 (contributions as Westerhuis, Gurden & Smilde 2000).
    X, group = _masked_group(0)
    model = RobustPCAModel(n_components=2).fit(X, variable_names=[f"v{j + 1}" for j in range(X.shape[1])])
    row = np.flatnonzero(group)[0]
    explained = model.explain(X[row], confidence=0.975)
    assert explained["driver"] == "spe" and explained["variables"][0]["variable"] == "v3"
    assert explained["sentence"].startswith("Off the robust model plane")
    assert explained["score_distance"] == pytest.approx(model.score_distance_[row], rel=1e-10)
    assert explained["orthogonal_distance"] == pytest.approx(model.orthogonal_distance_[row], rel=1e-10)
    assert sum(v["spe_contribution"] for v in explained["variables"]) == pytest.approx(
        model.orthogonal_distance_[row] ** 2, rel=1e-10)
    assert sum(v["t2_contribution"] for v in explained["variables"]) == pytest.approx(
        model.score_distance_[row] ** 2, rel=1e-9)


def test_rows_with_a_missing_value_get_no_distances_but_the_others_do():
    # ROBPCA has no rule for missing values (common practice: say so, do not guess).
    X = _latent_plane(np.random.default_rng(4), 60, p=5)
    model = RobustPCAModel(n_components=2).fit(X)
    new = X[:3].copy()
    new[1, 3] = np.nan
    sd = model.score_distance(new)
    assert np.isnan(sd[1]) and np.isfinite(sd[[0, 2]]).all()
    np.testing.assert_allclose(sd[[0, 2]], model.score_distance_[[0, 2]], rtol=1e-10)
    with pytest.raises(InputError, match="complete rows"):
        model.contributions(new[1])
