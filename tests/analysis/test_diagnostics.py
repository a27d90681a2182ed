"""T2 / SPE limits against their papers (computed with scipy), Monte Carlo checks,
identities of the diagnostics, contributions and the plain-language explanation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from analysis import diagnostics
from analysis.errors import InputError
from analysis.pca import PCAModel


# ------------------------------------------------------------------ limits
@pytest.mark.parametrize("n,a", [(10, 1), (10, 3), (25, 2), (200, 5), (5000, 10)])
@pytest.mark.parametrize("confidence", [0.95, 0.99])
def test_t2_training_limit_is_tracy_young_mason_beta(n, a, confidence):
    # Tracy, Young & Mason (1992), J. Quality Technology 24(2) 88-95:
    # T2 ~ ((n-1)^2/n) Beta(A/2, (n-A-1)/2), quantile from scipy.stats.beta.
    expected = (n - 1) ** 2 / n * stats.beta.ppf(confidence, a / 2, (n - a - 1) / 2)
    assert diagnostics.t2_limit(n, a, confidence) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("n,a", [(10, 1), (10, 3), (25, 2), (200, 5), (5000, 10)])
@pytest.mark.parametrize("confidence", [0.95, 0.99])
def test_t2_new_sample_limit_is_nist_f_formula(n, a, confidence):
    # NIST/SEMATECH e-Handbook 6.5.4.3 (citing Ryan 2000): UCL = p(m+1)(m-1)/(m^2 - m p) F(alpha; p, m-p)
    # with p -> A components and m -> n training samples; quantile from scipy.stats.f.
    expected = a * (n + 1) * (n - 1) / (n**2 - n * a) * stats.f.ppf(confidence, a, n - a)
    assert diagnostics.t2_limit(n, a, confidence, new=True) == pytest.approx(expected, rel=1e-12)


def test_t2_limit_needs_enough_samples():
    with pytest.raises(InputError, match="at least A\\+2 samples"):
        diagnostics.t2_limit(4, 3, 0.95)
    with pytest.raises(InputError, match="more samples than components"):
        diagnostics.t2_limit(3, 3, 0.95, new=True)
    with pytest.raises(InputError, match="confidence=0"):
        diagnostics.t2_limit(30, 2, 0)


DISCARDED = [
    np.array([0.9, 0.5, 0.3, 0.1]),
    np.array([2.0]),
    np.linspace(1.0, 0.01, 50),
    np.array([1.0] + [0.01] * 1000),  # h0 < 0: one dominant discarded eigenvalue
]


@pytest.mark.parametrize("lam", DISCARDED, ids=["four", "one", "fifty", "h0-negative"])
@pytest.mark.parametrize("confidence", [0.95, 0.99])
def test_spe_limit_jackson_mudholkar_formula(lam, confidence):
    # Jackson & Mudholkar (1979), Technometrics 21(3) 341-349, eq. for Q_alpha with
    # theta_i = sum lambda^i, h0 = 1 - 2 theta1 theta3 / (3 theta2^2), c = normal quantile (scipy).
    t1, t2, t3 = (np.sum(lam**i) for i in (1, 2, 3))
    h0 = 1 - 2 * t1 * t3 / (3 * t2**2)
    if h0 <= 0:
        # The normal approximation of (Q/theta1)^h0 needs h0 > 0; our documented fallback is Box (1954).
        expected = t2 / t1 * stats.chi2.ppf(confidence, t1**2 / t2)
        assert diagnostics.spe_limit(lam, confidence) == pytest.approx(expected, rel=1e-12)
        return
    c = stats.norm.ppf(confidence)
    expected = t1 * (c * np.sqrt(2 * t2 * h0**2) / t1 + 1 + t2 * h0 * (h0 - 1) / t1**2) ** (1 / h0)
    assert diagnostics.spe_limit(lam, confidence) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("lam", DISCARDED, ids=["four", "one", "fifty", "h0-negative"])
def test_spe_limit_box_chi_square(lam):
    # Box (1954), Ann. Math. Statist. 25 290-302, as used by Nomikos & MacGregor (1995):
    # Q ~ g chi2(h), g = theta2/theta1, h = theta1^2/theta2 (scipy.stats.chi2).
    t1, t2 = lam.sum(), (lam**2).sum()
    expected = t2 / t1 * stats.chi2.ppf(0.95, t1**2 / t2)
    assert diagnostics.spe_limit(lam, 0.95, method="box") == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("method", ["jackson-mudholkar", "box"])
@pytest.mark.parametrize("lam", DISCARDED[:3], ids=["four", "one", "fifty"])
def test_spe_limit_covers_weighted_chi_square(lam, method):
    # Jackson & Mudholkar (1979): for x ~ N(0, diag(lambda)) the residual Q = sum lambda_j z_j^2.
    # Seeded Monte Carlo, 200,000 draws: the 95% limit is exceeded 5% of the time. Binomial SD
    # sqrt(0.05*0.95/200000) = 0.00049; tolerance 0.004 also allows for the approximation error of
    # both formulas (their papers report agreement with the exact quantile to a few tenths of a percent).
    rng = np.random.default_rng(7)
    q = np.zeros(200_000)
    for value in lam:
        q += value * rng.standard_normal(q.size) ** 2
    rate = np.mean(q > diagnostics.spe_limit(lam, 0.95, method=method))
    assert abs(rate - 0.05) < 0.004


def test_spe_limit_is_zero_when_nothing_is_discarded():
    # Documented convention: no discarded components -> no residual space -> limit 0.
    assert diagnostics.spe_limit(np.array([]), 0.95) == 0.0
    with pytest.raises(InputError, match="method='chi'"):
        diagnostics.spe_limit([1.0], 0.95, method="chi")


# ------------------------------------------------------------- Monte Carlo
def test_monte_carlo_t2_limits_beta_and_f():
    # Tracy, Young & Mason (1992): with A = p components T2 is the Mahalanobis distance with the
    # sample covariance, so training T2 follows the scaled Beta and a new sample's T2 the scaled F
    # exactly. 3000 seeded datasets (n=15, p=3) drawn from the model's own (normal) distribution.
    # Training: 45,000 T2 values (binomial SD 0.0010, smaller as they are negatively correlated
    # within a dataset); new samples: 3,000 values (binomial SD 0.0040). Tolerance 4 SD.
    rng = np.random.default_rng(2024)
    n, p, runs = 15, 3, 3000
    cov = np.array([[4.0, 1.5, 0.5], [1.5, 2.0, 0.3], [0.5, 0.3, 1.0]])
    chol = np.linalg.cholesky(cov)
    train_hits = new_hits = 0
    for _ in range(runs):
        X = rng.standard_normal((n + 1, p)) @ chol.T + 10.0
        model = PCAModel(n_components=p, scaling="autoscale").fit(X[:n])
        train_hits += int(np.sum(model.t2_ > model.t2_limit(0.95)))
        new_hits += int(model.hotelling_t2(X[n:])[0] > model.t2_limit(0.95, new=True))
    assert abs(train_hits / (runs * n) - 0.05) < 4 * np.sqrt(0.05 * 0.95 / (runs * n))
    assert abs(new_hits / runs - 0.05) < 4 * np.sqrt(0.05 * 0.95 / runs)


def test_monte_carlo_spe_limit_on_fitted_model():
    # Jackson & Mudholkar (1979) for a fitted model: training data (n=4000) and 20,000 new samples
    # from one normal population with two strong components and six weaker ones; A = 2.
    # Binomial SD of the rate 0.0015; tolerance 0.008 = 4 SD plus 0.002 for the estimation error of
    # the discarded eigenvalues from n=4000 samples (relative SD about sqrt(2/n) = 2%).
    rng = np.random.default_rng(99)
    p = 8
    basis = np.linalg.qr(rng.standard_normal((p, p)))[0]
    sd = np.sqrt([20.0, 10.0, 1.0, 0.8, 0.6, 0.4, 0.3, 0.2])
    draw = lambda m: (rng.standard_normal((m, p)) * sd) @ basis.T + 5.0  # noqa: E731
    model = PCAModel(n_components=2, scaling="center").fit(draw(4000))
    new = draw(20_000)
    for method in ("jackson-mudholkar", "box"):
        rate = np.mean(model.spe(new) > model.spe_limit(0.95, method=method))
        assert abs(rate - 0.05) < 0.008, method


# --------------------------------------------------------------- identities
@pytest.fixture(scope="module")
def wine_model():
    from sklearn.datasets import load_wine

    X = load_wine().data
    return PCAModel(n_components=3).fit(X), X


def test_training_t2_and_spe_sums(wine_model):
    # docs/references.md, "Checks that are theory": sum of training T2 = (n-1)A; sum of SPE =
    # (n-1) * sum of discarded eigenvalues (follows from lambda_a = t_a't_a/(n-1)).
    model, X = wine_model
    n = len(X)
    assert model.t2_.sum() == pytest.approx((n - 1) * 3, rel=1e-10)
    assert model.spe_.sum() == pytest.approx((n - 1) * model.eigenvalues_[3:].sum(), rel=1e-9)


def test_t2_is_sum_of_squared_standardised_scores(wine_model):
    # Definition (Jackson 1991, A User's Guide to Principal Components, section 1.7): T2 = sum t_a^2/lambda_a.
    model, X = wine_model
    expected = np.sum(model.scores_**2 / model.eigenvalues_[:3], axis=1)
    np.testing.assert_allclose(model.t2_, expected, rtol=1e-12)
    np.testing.assert_allclose(diagnostics.hotelling_t2(model.scores_, model.eigenvalues_), expected, rtol=1e-12)


def test_contributions_sum_to_t2_and_spe(wine_model):
    # Westerhuis, Gurden & Smilde (2000): T2 contributions c_j = sum_a (t_a/lambda_a) p_ja z_j sum to T2;
    # SPE contributions (squared residuals) sum to SPE.
    model, X = wine_model
    for i in (0, 17, 100, 177):
        c_t2 = model.contributions(X[i], kind="t2")
        c_spe = model.contributions(X[i], kind="spe")
        assert c_t2.shape == c_spe.shape == (13,)
        assert c_t2.sum() == pytest.approx(model.t2_[i], rel=1e-10)
        assert c_spe.sum() == pytest.approx(model.spe_[i], rel=1e-10)
        z = model.preprocess(X[i : i + 1])[0]
        t = z @ model.loadings_
        by_hand = np.array([np.sum(t / model.eigenvalues_[:3] * model.loadings_[j]) * z[j] for j in range(13)])
        np.testing.assert_allclose(c_t2, by_hand, rtol=1e-10, atol=1e-14)
        np.testing.assert_allclose(c_spe, model.residuals(X[i : i + 1])[0] ** 2, rtol=1e-12)
    with pytest.raises(InputError, match="kind='q'"):
        model.contributions(X[0], kind="q")
    with pytest.raises(InputError, match="one sample"):
        model.contributions(X[:2])


def test_contributions_of_incomplete_sample_sum_to_its_t2_and_spe(wine_model):
    # Missing cells take the model estimate (projection, Nelson, Taylor & MacGregor 1996),
    # so the Westerhuis et al. (2000) contributions still sum to the row's T2 and SPE.
    model, X = wine_model
    x = X[5].copy()
    x[[2, 7]] = np.nan
    t2 = model.hotelling_t2(x[None, :])[0]
    spe = model.spe(x[None, :])[0]
    assert model.contributions(x, "t2").sum() == pytest.approx(t2, rel=1e-10)
    c_spe = model.contributions(x, "spe")
    assert c_spe.sum() == pytest.approx(spe, rel=1e-10)
    assert c_spe[2] == 0 and c_spe[7] == 0


# -------------------------------------------------------------- explanation
def test_explain_sample_names_the_shifted_variable():
    # A sample pushed 6 SD along variable "x7" of the wine data (scikit-learn) must be explained by x7
    # first; the quoted SD is (x - mean)/SD (ddof=1) of the training data, computed here by hand.
    from sklearn.datasets import load_wine

    X = load_wine().data
    names = [f"x{j + 1}" for j in range(13)]
    model = PCAModel(n_components=3).fit(X)
    x = X.mean(0).copy()
    x[6] += 6 * X[:, 6].std(ddof=1)
    result = diagnostics.explain_sample(model, x, top=2)
    assert result["variables"][0]["variable"] == "x7"
    assert result["variables"][0]["standardized_value"] == pytest.approx(6.0, rel=1e-9)
    assert result["t2"] == pytest.approx(model.hotelling_t2(x[None, :])[0], rel=1e-12)
    assert result["spe"] == pytest.approx(model.spe(x[None, :])[0], rel=1e-12)
    assert result["t2_limit"] == pytest.approx(model.t2_limit(new=True))
    assert result["spe_limit"] == pytest.approx(model.spe_limit())
    driver = result["driver"]
    key = f"{driver}_contribution"
    ranked = [abs(v[key]) for v in result["variables"]]
    assert ranked == sorted(ranked, reverse=True)
    assert {v["variable"] for v in result["variables"]} == set(names)
    assert "mainly because of x7" in result["sentence"]
    if driver == "t2":
        assert "x7, 6.0 SD above the mean" in result["sentence"]


def test_explain_training_sample_uses_training_limit(wine_model):
    model, X = wine_model
    result = diagnostics.explain_sample(model, X[3], sample_id="4")
    assert result["t2_limit"] == pytest.approx(model.t2_limit())
    assert result["t2"] == pytest.approx(model.t2_[3], rel=1e-12)
    inside = result["t2"] <= result["t2_limit"] and result["spe"] <= result["spe_limit"]
    assert result["sentence"].startswith("Within both limits") == inside


def test_explain_sample_spe_driver_and_missing_value():
    # A sample that breaks the correlation structure (x1 up, x2 unchanged although the wine data
    # tie them loosely) must be driven by SPE once the break is large; the residual quoted in SD
    # units is e_j * scale_j / s_j (definitions in docs/methods.md; Westerhuis et al. 2000).
    from sklearn.datasets import load_wine

    X = load_wine().data
    model = PCAModel(n_components=4).fit(X)
    x = X.mean(0).copy()
    # Move along a direction orthogonal to the model plane: pure residual.
    direction = np.linalg.qr(np.column_stack([model.loadings_, np.eye(13)[:, 0]]))[0][:, 4]
    x += 8 * direction * model.scale_
    result = diagnostics.explain_sample(model, x, top=3)
    assert result["driver"] == "spe"
    assert result["sentence"].startswith("Poorly described by the model")
    top = result["variables"][0]
    j = model.variable_names_.index(top["variable"])
    expected_res = model.residuals(x[None, :])[0, j]
    assert top["residual"] == pytest.approx(expected_res, rel=1e-10)
    assert f"{abs(expected_res):.1f} SD" in result["sentence"]
    # A missing variable is reported as such, with no standardised value.
    x_missing = X[10].copy()
    x_missing[4] = np.nan
    missing = diagnostics.explain_sample(model, x_missing)
    row = next(v for v in missing["variables"] if v["variable"] == "x5")
    assert row["standardized_value"] is None and row["residual"] is None and row["spe_contribution"] == 0.0


def test_diagnose_matches_separate_calls(wine_model):
    # One pass over the data gives what transform / hotelling_t2 / spe / limits give one by one.
    model, X = wine_model
    out = model.diagnose(X[:50])
    np.testing.assert_allclose(out["scores"], model.transform(X[:50]))
    np.testing.assert_allclose(out["t2"], model.t2_[:50], rtol=1e-10)
    np.testing.assert_allclose(out["spe"], model.spe_[:50], rtol=1e-8)
    assert out["t2_limit"] == model.t2_limit(new=True) and out["spe_limit"] == model.spe_limit()
