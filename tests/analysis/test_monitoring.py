"""Phase II monitoring (analysis.monitoring) against published formulas, an open dataset
with scikit-learn and numpy as references, and hand-made run-rule sequences."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from analysis import monitoring as mon
from analysis.errors import InputError
from analysis.modelfile import load_model, model_from_dict, model_to_dict, save_model
from analysis.pca import PCAModel

A = 3


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def wine():
    """scikit-learn's wine data (Forina et al.; UCI), rows in a seeded random order:
    the first 120 rows train the reference model, the other 58 are new samples."""
    from sklearn.datasets import load_wine

    data = load_wine(as_frame=True).frame.drop(columns="target")
    order = np.random.default_rng(7).permutation(len(data))
    data = data.iloc[order].reset_index(drop=True)
    data.index = [f"W{i:03d}" for i in range(len(data))]
    train, new = data.iloc[:120], data.iloc[120:]
    return PCAModel(n_components=A).fit(train), train, new


def by_hand_preprocess(train: pd.DataFrame, rows: pd.DataFrame) -> np.ndarray:
    """Autoscaling by hand: training mean and SD with ddof=1."""
    return ((rows - train.mean()) / train.std(ddof=1)).to_numpy()


# ------------------------------------------------------------------ limits
@pytest.mark.parametrize("levels", [(0.95, 0.99), (0.9, 0.995)])
def test_new_sample_t2_limits_are_the_nist_f_formula(wine, levels):
    # NIST/SEMATECH e-Handbook 6.5.4.3 (Tracy, Young & Mason 1992): UCL for a new observation
    # = A(n+1)(n-1)/(n(n-A)) F(c; A, n-A); quantiles from scipy.stats.f.ppf.
    model, train, new = wine
    n = len(train)
    result = mon.score_new_samples(model, new, confidence_levels=levels)
    expected = [A * (n + 1) * (n - 1) / (n * (n - A)) * stats.f.ppf(c, A, n - A) for c in (*levels, 0.5)]
    chart = result.t2_chart
    assert [chart.warning, chart.action, chart.centre] == pytest.approx(expected, rel=1e-12)
    assert np.array_equal(result.t2_exceeds_warning, result.t2 > expected[0])
    assert np.array_equal(result.t2_exceeds_action, result.t2 > expected[1])


@pytest.mark.parametrize("method", ["jackson-mudholkar", "box"])
def test_spe_limits_follow_the_discarded_eigenvalues(wine, method):
    # Jackson & Mudholkar (1979) Technometrics 21(3) 341-349 and Box (1954) Ann. Math. Stat. 25
    # 290-302: theta_i = sum of discarded lambda^i; quantiles from scipy.stats.norm / chi2.
    model, _, new = wine
    lam = model.eigenvalues_[A:]
    t1, t2, t3 = (np.sum(lam**i) for i in (1, 2, 3))
    h0 = 1 - 2 * t1 * t3 / (3 * t2**2)

    def limit(c):
        if method == "box":
            return t2 / t1 * stats.chi2.ppf(c, t1**2 / t2)
        z = stats.norm.ppf(c)
        return t1 * (z * np.sqrt(2 * t2 * h0**2) / t1 + 1 + t2 * h0 * (h0 - 1) / t1**2) ** (1 / h0)

    result = mon.score_new_samples(model, new, spe_method=method)
    chart = result.spe_chart
    assert [chart.warning, chart.action] == pytest.approx([limit(0.95), limit(0.99)], rel=1e-12)
    assert np.array_equal(result.spe_exceeds_action, result.spe > limit(0.99))
    assert np.array_equal(result.flagged, (result.t2 > result.t2_chart.action) | (result.spe > limit(0.99)))


def test_score_chart_limits_are_prediction_intervals(wine):
    # One new observation from a normal sample of n: mean +- t(n-1, (1+c)/2) s sqrt(1 + 1/n)
    # (Hahn & Meeker 1991, Statistical Intervals, section 4.4); here s^2 = lambda_a, mean 0.
    model, train, new = wine
    n = len(train)
    result = mon.score_new_samples(model, new)
    for a, chart in enumerate(result.score_charts):
        half = [stats.t.ppf((1 + c) / 2, n - 1) * np.sqrt(model.eigenvalues_[a] * (1 + 1 / n)) for c in (0.95, 0.99)]
        # rel 1e-9: the code takes the F(1, n-1) quantile, this check the t quantile (F = t^2); scipy 1.11's
        # inverse incomplete beta behind the F quantile agrees with t^2 only to about 1.4e-10.
        assert [chart.warning, chart.action] == pytest.approx(half, rel=1e-9)
        assert [chart.lower_warning, chart.lower_action] == pytest.approx([-half[0], -half[1]], rel=1e-9)
        assert chart.centre == 0.0 and chart.two_sided


# ----------------------------------------------------- scores of new samples
def test_held_out_wine_samples_match_sklearn_and_numpy(wine):
    # Reference: sklearn.decomposition.PCA(svd_solver="full") on the training rows autoscaled by
    # hand (ddof=1); T2 = sum t_a^2 / lambda_a with sklearn's explained_variance_ (Jackson 1991,
    # A User's Guide to Principal Components, 1.7); SPE = ||z - t P'||^2 with numpy.
    from sklearn.decomposition import PCA

    model, train, new = wine
    reference = PCA(n_components=A, svd_solver="full").fit(by_hand_preprocess(train, train))
    z_new = by_hand_preprocess(train, new)
    t_ref = reference.transform(z_new)
    result = mon.score_new_samples(model, new)
    signs = np.sign(np.sum(result.scores * t_ref, axis=0))
    np.testing.assert_allclose(result.scores, t_ref * signs, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(result.t2, np.sum(t_ref**2 / reference.explained_variance_, axis=1), rtol=1e-9)
    residual = z_new - (t_ref @ reference.components_)
    np.testing.assert_allclose(result.spe, np.sum(residual**2, axis=1), rtol=1e-9)
    assert result.sample_ids == list(new.index)
    assert not result.incomplete.any()


def test_scores_equal_the_model_methods_bit_for_bit(wine, tmp_path):
    # The offline "latentdesk apply" uses transform / hotelling_t2 / spe; the server must agree exactly,
    # also with a model read back from its open model file.
    model, _, new = wine
    holey = new.copy()
    holey.iloc[3, 2] = np.nan
    holey.iloc[10, [0, 5]] = np.nan
    save_model(model, tmp_path / "model.json")
    models = [model, model_from_dict(model_to_dict(model)), load_model(tmp_path / "model.json")]
    for fitted in models:
        for data in (new, holey, new.to_numpy(), new[list(reversed(new.columns))]):
            result = mon.score_new_samples(fitted, data)
            assert np.array_equal(result.scores, model.transform(data))
            assert np.array_equal(result.t2, model.hotelling_t2(data))
            assert np.array_equal(result.spe, model.spe(data))


def test_bit_for_bit_with_log10_and_dropped_variables():
    rng = np.random.default_rng(3)
    X = pd.DataFrame(np.exp(rng.normal(size=(60, 5))), columns=list("abcde"))
    X["const"] = 1.0
    model = PCAModel(n_components=2, log10=["b"], drop_constant=True).fit(X)
    new = pd.DataFrame(np.exp(rng.normal(size=(25, 5))), columns=list("abcde")).assign(const=1.0)
    for data in (new, new.to_numpy()):
        result = mon.score_new_samples(model, data)
        assert np.array_equal(result.scores, model.transform(data))
        assert np.array_equal(result.spe, model.spe(data))


def test_missing_value_scores_are_projection_to_the_model_plane(wine):
    # Nelson, Taylor & MacGregor (1996) Chemometr. Intell. Lab. Syst. 35 45-65, projection to the
    # model plane: t = (P_o' P_o)^-1 P_o' z_o over the observed variables, computed with numpy.
    model, train, new = wine
    holey = new.copy()
    holey.iloc[0, 4] = np.nan
    holey.iloc[5, [1, 9]] = np.nan
    result = mon.score_new_samples(model, holey)
    assert result.incomplete.tolist() == [i in (0, 5) for i in range(len(new))]
    z = by_hand_preprocess(train, holey)
    p = model.loadings_
    lam = model.eigenvalues_[:A]
    for i in (0, 5):
        observed = ~np.isnan(z[i])
        p_o, z_o = p[observed], z[i, observed]
        t = np.linalg.solve(p_o.T @ p_o, p_o.T @ z_o)
        np.testing.assert_allclose(result.scores[i], t, rtol=1e-9, atol=1e-12)
        assert result.t2[i] == pytest.approx(np.sum(t**2 / lam), rel=1e-9)
        assert result.spe[i] == pytest.approx(np.sum((z_o - p_o @ t) ** 2), rel=1e-9)
    complete = mon.score_new_samples(model, new)
    np.testing.assert_array_equal(result.scores[1:5], complete.scores[1:5])


def test_to_frame_holds_every_column(wine):
    model, _, new = wine
    result = mon.score_new_samples(model, new, combined=True)
    frame = result.to_frame()
    assert list(frame.index) == list(new.index) and frame.index.name == "sample"
    assert list(frame.columns) == [
        "PC1", "PC2", "PC3", "t2", "spe", "t2_exceeds_warning", "t2_exceeds_action",
        "spe_exceeds_warning", "spe_exceeds_action", "incomplete",
        "combined", "combined_exceeds_warning", "combined_exceeds_action",
    ]
    np.testing.assert_array_equal(frame["spe"], result.spe)
    np.testing.assert_array_equal(frame["PC2"], result.scores[:, 1])


# ------------------------------------------------------------ combined index
def test_combined_index_and_its_limit_follow_yue_and_qin(wine):
    # Yue & Qin (2001) Ind. Eng. Chem. Res. 40 4403-4414: phi = SPE/delta^2 + T2/tau^2,
    # tau^2 = chi2_c(A), delta^2 = SPE limit; limit g chi2(h), g = tr((S Phi)^2)/tr(S Phi),
    # h = tr(S Phi)^2/tr((S Phi)^2), with S Phi traced over the eigenvalues; quantiles from scipy.stats.chi2.
    model, _, new = wine
    result = mon.score_new_samples(model, new, combined=True)
    lam = model.eigenvalues_
    tau2 = stats.chi2.ppf(0.99, A)
    delta2 = result.spe_chart.action
    s_phi = np.concatenate([lam[:A] / lam[:A] / tau2, lam[A:] / delta2])  # eigenvalues of S Phi
    g = np.sum(s_phi**2) / np.sum(s_phi)
    h = np.sum(s_phi) ** 2 / np.sum(s_phi**2)
    chart = result.combined_chart
    assert [chart.warning, chart.action, chart.centre] == pytest.approx(
        [g * stats.chi2.ppf(c, h) for c in (0.95, 0.99, 0.5)], rel=1e-12
    )
    np.testing.assert_allclose(result.combined, result.spe / delta2 + result.t2 / tau2, rtol=1e-14)
    assert np.array_equal(result.combined_exceeds_action, result.combined > chart.action)
    assert mon.score_new_samples(model, new).combined is None


def test_combined_index_false_alarm_rate_near_nominal():
    # Monte Carlo check of the g chi2(h) approximation (Box 1954, used by Yue & Qin 2001):
    # in-control normal data, large reference set, the share beyond the 95 % limit is near 5 %.
    rng = np.random.default_rng(11)
    mixing = rng.normal(size=(8, 8))
    model = PCAModel(n_components=3, scaling="center").fit(rng.normal(size=(5000, 8)) @ mixing)
    result = mon.score_new_samples(model, rng.normal(size=(20000, 8)) @ mixing, combined=True)
    assert abs(np.mean(result.combined_exceeds_warning) - 0.05) < 0.01


def test_combined_index_needs_discarded_components():
    X = np.random.default_rng(2).normal(size=(30, 3))
    model = PCAModel(n_components=3, scaling="center").fit(X)
    with pytest.raises(InputError, match="combined index needs discarded components"):
        mon.score_new_samples(model, X[:5], combined=True)


# ----------------------------------------------- reconstruction contributions
def test_rbc_match_an_independent_computation_of_alcala_and_qin(wine):
    # Alcala & Qin (2009) Automatica 45 1593-1600: RBC_j = (xi_j' M x)^2 / (xi_j' M xi_j) with
    # M = C~ = I - PP' (SPE) and M = D = P Lambda^-1 P' (T2); matrices built explicitly with numpy.
    model, train, new = wine
    rbc = mon.reconstruction_contributions(model, new)
    z = by_hand_preprocess(train, new)
    p = model.loadings_
    c_tilde = np.eye(13) - p @ p.T
    d = p @ np.diag(1 / model.eigenvalues_[:A]) @ p.T
    for i in (0, 7, 31, 57):
        for j in range(13):
            xi = np.eye(13)[j]
            assert rbc.spe[i, j] == pytest.approx((xi @ c_tilde @ z[i]) ** 2 / (xi @ c_tilde @ xi), rel=1e-8)
            assert rbc.t2[i, j] == pytest.approx((xi @ d @ z[i]) ** 2 / (xi @ d @ xi), rel=1e-8, abs=1e-14)
    assert rbc.variable_names == list(new.columns) and rbc.sample_ids == list(new.index)


def test_a_large_single_fault_has_the_largest_spe_rbc(wine):
    # Alcala & Qin (2009), section 3: for a fault x = x* + f xi_i with |f| large enough,
    # RBC_i >= RBC_j for every j (Cauchy-Schwarz on the quadratic form). In-control sample:
    # a held-out sample inside both warning limits; fault of 25 training SD.
    model, _, new = wine
    result = mon.score_new_samples(model, new)
    quiet = np.flatnonzero(~result.t2_exceeds_warning & ~result.spe_exceeds_warning)
    assert quiet.size
    base = new.iloc[[quiet[0]]]
    for j, name in enumerate(new.columns):
        faulty = base.copy()
        faulty[name] += 25 * model.sd_[j]
        rbc = mon.reconstruction_contributions(model, faulty).spe[0]
        assert np.argmax(rbc) == j, name


def test_rbc_of_an_incomplete_sample(wine):
    # Missing cells take the model estimate P t (t by projection to the model plane, Nelson et
    # al. 1996); then C~ x is the residual over the observed variables: checked with numpy.
    model, train, new = wine
    holey = new.iloc[[2]].copy()
    holey.iloc[0, 6] = np.nan
    rbc = mon.reconstruction_contributions(model, holey)
    z = by_hand_preprocess(train, holey)[0]
    observed = ~np.isnan(z)
    p = model.loadings_
    t = np.linalg.solve(p[observed].T @ p[observed], p[observed].T @ z[observed])
    filled = np.where(observed, z, p @ t)
    c_tilde = np.eye(13) - p @ p.T
    d = p @ np.diag(1 / model.eigenvalues_[:A]) @ p.T
    expected_spe = (c_tilde @ filled) ** 2 / np.diag(c_tilde)
    expected_t2 = (d @ filled) ** 2 / np.diag(d)
    assert np.isnan(rbc.spe[0, 6]) and np.isnan(rbc.t2[0, 6])
    np.testing.assert_allclose(rbc.spe[0, observed], expected_spe[observed], rtol=1e-8, atol=1e-14)
    np.testing.assert_allclose(rbc.t2[0, observed], expected_t2[observed], rtol=1e-8, atol=1e-14)


def test_rbc_of_a_variable_inside_the_model_plane_is_zero():
    # A variable uncorrelated with the others and of the largest variance is its own first
    # component: C~_jj = 1 - ||p_j||^2 = 0, a fault along it leaves SPE unchanged (documented rule: 0).
    rng = np.random.default_rng(5)
    others = rng.normal(size=(200, 3)) @ rng.normal(size=(3, 3))
    others -= others.mean(axis=0)
    alone = rng.normal(size=200)
    alone -= alone.mean()
    alone -= others @ np.linalg.lstsq(others, alone, rcond=None)[0]  # exactly orthogonal to the others
    alone *= 100 / alone.std()
    model = PCAModel(n_components=1, scaling="center").fit(np.column_stack([others, alone]))
    assert 1 - np.sum(model.loadings_[3] ** 2) < 1e-10
    rbc = mon.reconstruction_contributions(model, rng.normal(size=(5, 4)))
    assert np.all(rbc.spe[:, 3] == 0.0)
    assert np.all(np.isfinite(rbc.spe)) and np.all(rbc.spe[:, :3] > 0)


# ----------------------------------------------------------------- run rules
ONE_SIDED = mon.ChartLimits(warning=2.0, action=3.0, centre=1.0)
TWO_SIDED = mon.ChartLimits(warning=2.0, action=3.0, centre=0.0, lower_warning=-2.0, lower_action=-3.0)


def found(violations):
    return [(v.rule_id, v.indices, v.fired_at, v.side) for v in violations]


def test_run_rules_on_a_one_sided_chart():
    # Western Electric (1956) rules 1 and 2 / Nelson (1984) tests 1 and 5, applied to the upper
    # limits of a one-sided chart (common practice). Expected violations worked out by hand:
    #   position 1 (3.5) is beyond the action limit 3;
    #   beyond the warning limit 2: positions 1, 3, 5, 6, so 2 of 3 fires at 3 (1,3), 5 (3,5), 6 (5,6).
    x = [0.5, 3.5, 1.2, 2.5, 0.1, 2.4, 2.6, 0.2]
    assert found(mon.check_run_rules(x, ONE_SIDED)) == [
        ("beyond-action", (1,), 1, "above"),
        ("2-of-3-beyond-warning", (1, 2, 3), 3, "above"),
        ("2-of-3-beyond-warning", (3, 4, 5), 5, "above"),
        ("2-of-3-beyond-warning", (4, 5, 6), 6, "above"),
    ]


def test_run_rules_on_a_two_sided_score_chart():
    # Positions 0-7 rise and lie above the centre 0: Nelson (1984) test 3 (6 rising) fires at 5, 6, 7;
    # Western Electric (1956) rule 4 (8 on one side) at 7. Positions 9 and 10 (-2.5, -2.1) are below the
    # lower warning limit -2: 2 of 3 (Western Electric rule 2) fires at 10 on the lower side.
    # Position 11 lies on the centre line and ends any run.
    x = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, -0.1, -2.5, -2.1, 0.0, 1.0]
    assert found(mon.check_run_rules(x, TWO_SIDED)) == [
        ("6-trend", (0, 1, 2, 3, 4, 5), 5, "rising"),
        ("6-trend", (1, 2, 3, 4, 5, 6), 6, "rising"),
        ("8-one-side", (0, 1, 2, 3, 4, 5, 6, 7), 7, "above"),
        ("6-trend", (2, 3, 4, 5, 6, 7), 7, "rising"),
        ("2-of-3-beyond-warning", (8, 9, 10), 10, "below"),
    ]


def test_run_rules_lower_side_falling_trend_and_long_runs():
    # -3.5 is beyond the lower action limit; 6 falling points (positions 2-7); 9 points below the
    # centre (positions 1-9) fire the 8-in-a-row rule at 8 and again at 9.
    x = [0.5, -3.5, -0.2, -0.4, -0.6, -0.8, -1.0, -1.2, -0.1, -0.3, 0.4]
    assert found(mon.check_run_rules(x, TWO_SIDED)) == [
        ("beyond-action", (1,), 1, "below"),
        ("6-trend", (2, 3, 4, 5, 6, 7), 7, "falling"),
        ("8-one-side", (1, 2, 3, 4, 5, 6, 7, 8), 8, "below"),
        ("8-one-side", (2, 3, 4, 5, 6, 7, 8, 9), 9, "below"),
    ]


def test_ties_end_a_trend_and_the_window_is_short_at_the_start():
    # Equal neighbours are not "steadily increasing" (Nelson 1984 test 3); at the start the
    # 2-of-3 window holds the two points there are.
    assert mon.check_run_rules([1.0, 1.1, 1.2, 1.2, 1.3, 1.4, 1.5], ONE_SIDED, [mon.Trend(6)]) == []
    assert found(mon.check_run_rules([2.5, 2.6], ONE_SIDED, [mon.KOfMBeyond()])) == [
        ("2-of-3-beyond-warning", (0, 1), 1, "above")
    ]


def test_rule_labels_sources_and_configs():
    rules = mon.DEFAULT_RULES
    assert [r.id for r in rules] == ["beyond-action", "2-of-3-beyond-warning", "8-one-side", "6-trend"]
    assert rules[0].source.startswith("Western Electric (1956) rule 1")
    assert rules[3].source == "Nelson (1984) test 3"
    assert mon.KOfMBeyond(4, 5, "warning").source == "common practice"
    for rule in (*rules, mon.KOfMBeyond(4, 5, "action"), mon.RunOneSide(9), mon.BeyondLimit("warning")):
        assert mon.rule_from_config(rule.config()) == rule
    violation = mon.check_run_rules([5.0], ONE_SIDED)[0]
    assert (violation.label, violation.source) == (rules[0].label, rules[0].source)


@pytest.mark.parametrize(
    "config,message",
    [
        ({"rule": "zigzag"}, "unknown run rule 'zigzag'"),
        ({"rule": "run", "lenght": 8}, "no setting"),
        ({"rule": "k_of_m", "k": 4, "m": 3}, "m \\(window\\)=3"),
        ({"rule": "beyond", "level": "alarm"}, "level='alarm'"),
        ({"rule": "trend", "length": 2}, "length=2"),
        ("beyond", "'rule' key"),
    ],
)
def test_bad_rule_configs_are_input_errors(config, message):
    with pytest.raises(InputError, match=message):
        mon.rule_from_config(config)


def test_bad_run_rule_input_is_an_input_error():
    with pytest.raises(InputError, match="unknown run rule"):
        mon.check_run_rules([1.0, 2.0], ONE_SIDED, ["beyond-action"])
    with pytest.raises(InputError, match="position 1 is not a finite number"):
        mon.check_run_rules([1.0, np.nan], ONE_SIDED)
    with pytest.raises(InputError, match="needs a centre line"):
        mon.check_run_rules([1.0, 2.0], mon.ChartLimits(2.0, 3.0))
    with pytest.raises(InputError, match="beyond the action limit"):
        mon.ChartLimits(4.0, 3.0)


# ---------------------------------------------------------------------- EWMA
def test_ewma_follows_its_recursion_by_hand():
    # Roberts (1959) Technometrics 1(3): z_i = lambda x_i + (1-lambda) z_{i-1}, z_0 = target;
    # limits target +- L sigma sqrt(lambda/(2-lambda) [1-(1-lambda)^(2i)]) (Lucas & Saccucci 1990).
    x = [9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.2, 10.34]
    lam, target, sigma, width = 0.1, 10.0, 1.0, 2.7
    chart = mon.ewma(x, lam, target=target, sigma=sigma, width=width)
    z, expected = target, []
    for value in x:
        z = lam * value + (1 - lam) * z
        expected.append(z)
    np.testing.assert_allclose(chart.statistic, expected, rtol=1e-13)
    i = np.arange(1, len(x) + 1)
    half = width * sigma * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)))
    np.testing.assert_allclose(chart.upper, target + half, rtol=1e-13)
    np.testing.assert_allclose(chart.lower, target - half, rtol=1e-13)
    # Montgomery, Introduction to Statistical Quality Control, EWMA example (lambda 0.1, L 2.7,
    # mu0 10, sigma 1, first observation 9.45; from memory): z1 = 9.945, UCL1 = 10.27, LCL1 = 9.73.
    assert chart.statistic[0] == pytest.approx(9.945, abs=1e-12)
    assert (chart.upper[0], chart.lower[0]) == pytest.approx((10.27, 9.73), abs=1e-12)
    assert not chart.exceeds.any()
    # By hand: z = 10, 10.4, 10.66 against UCL = 10.27, 10.363, 10.424.
    assert mon.ewma([10.0, 14.0, 13.0], lam, target=target, sigma=sigma, width=width).exceeds.tolist() == [
        False, True, True
    ]


def test_ewma_of_t2_uses_the_f_moments(wine):
    # Mean and variance of F(d1, d2): d2/(d2-2) and 2 d2^2 (d1+d2-2) / (d1 (d2-2)^2 (d2-4))
    # (Johnson, Kotz & Balakrishnan 1995, Continuous Univariate Distributions vol. 2, ch. 27),
    # times the NIST 6.5.4.3 factor A(n+1)(n-1)/(n(n-A)).
    model, train, _ = wine
    n, d1, d2 = len(train), A, len(train) - A
    factor = A * (n + 1) * (n - 1) / (n * (n - A))
    mean = factor * d2 / (d2 - 2)
    sd = factor * np.sqrt(2 * d2**2 * (d1 + d2 - 2) / (d1 * (d2 - 2) ** 2 * (d2 - 4)))
    assert mon.new_sample_t2_moments(model) == pytest.approx((mean, sd), rel=1e-12)


def test_mewma_follows_lowry_et_al_by_hand():
    # Lowry, Woodall, Champ & Rigdon (1992) Technometrics 34(1) 46-53: z_i = lambda x_i + (1-lambda) z_{i-1},
    # T2_i = z_i' Sigma_zi^-1 z_i, Sigma_zi = lambda/(2-lambda) [1-(1-lambda)^(2i)] Sigma (inverse by numpy).
    rng = np.random.default_rng(4)
    variances = np.array([4.0, 1.5, 0.3])
    x = rng.normal(size=(12, 3)) * np.sqrt(variances)
    lam = 0.2
    chart = mon.mewma(x, variances, lam, limit=11.0)
    z, expected = np.zeros(3), []
    for i, row in enumerate(x, start=1):
        z = lam * row + (1 - lam) * z
        cov = lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)) * np.diag(variances)
        expected.append(z @ np.linalg.inv(cov) @ z)
    np.testing.assert_allclose(chart.statistic, expected, rtol=1e-12)
    assert chart.limit == 11.0 and np.array_equal(chart.exceeds, np.array(expected) > 11.0)


def test_mewma_limit_with_lambda_one_is_the_chi2_chart():
    # With lambda = 1 the MEWMA is the chi2 chart of Hotelling (1947): run lengths are geometric,
    # ARL0 = 1 / P(chi2_q > h), so h = chi2.ppf(1 - 1/ARL0, q) (scipy). Simulation error about 2 % of ARL.
    for q in (2, 4):
        assert mon.mewma_limit(q, 1.0, 200) == pytest.approx(stats.chi2.ppf(1 - 1 / 200, q), rel=0.015)


def test_mewma_limit_near_the_published_table():
    # Prabhu & Runger (1997), J. Quality Technology 29(1), reproduced in Montgomery's MEWMA table
    # (from memory): p = 2, lambda = 0.1, ARL0 = 200 -> H = 8.64. That table uses the asymptotic
    # covariance; with the exact covariance early points alarm a little more, so h4 is slightly higher.
    h4 = mon.mewma_limit(2, 0.1, 200)
    assert 8.64 <= h4 <= 8.64 * 1.04
    assert mon.mewma_limit(2, 0.1, 200) == h4  # seeded: the same limit every time


@pytest.mark.parametrize("lam", [0, -0.1, 1.5, "x"])
def test_lambda_outside_zero_one_is_an_input_error(lam):
    with pytest.raises(InputError, match="lambda"):
        mon.ewma([1.0, 2.0], lam)
    with pytest.raises(InputError, match="lambda"):
        mon.mewma(np.ones((3, 2)), [1.0, 1.0], lam, limit=10.0)
    with pytest.raises(InputError, match="lambda"):
        mon.mewma_limit(2, lam)


def test_bad_ewma_input_is_an_input_error():
    with pytest.raises(InputError, match="position 2 is not a finite number"):
        mon.ewma([1.0, 2.0, np.inf])
    with pytest.raises(InputError, match="sigma"):
        mon.ewma([1.0, 2.0], sigma=0)
    with pytest.raises(InputError, match="2 positive, finite variances"):
        mon.mewma(np.ones((3, 2)), [1.0], limit=10.0)
    with pytest.raises(InputError, match="component 2 is not finite"):
        mon.mewma(np.array([[1.0, 1.0], [1.0, np.nan]]), [1.0, 1.0], limit=10.0)


# --------------------------------------------------------------- explanation
def test_explanation_names_the_faulty_variable_with_its_sd(wine):
    # The SD in the sentence is checked with numpy: residual z - P P'z of the autoscaled row
    # (autoscaling: preprocessed units are training SD).
    model, train, new = wine
    result = mon.score_new_samples(model, new)
    quiet = np.flatnonzero(~result.t2_exceeds_warning & ~result.spe_exceeds_warning)[0]
    faulty = new.iloc[[quiet]].copy()
    faulty["magnesium"] -= 8 * model.sd_[list(new.columns).index("magnesium")]
    explained = mon.explain_new_sample(model, faulty)
    z = by_hand_preprocess(train, faulty)[0]
    residual = z - model.loadings_ @ (model.loadings_.T @ z)
    j = list(new.columns).index("magnesium")
    spe = mon.score_new_samples(model, faulty).spe[0]
    limit = mon.score_new_samples(model, faulty).spe_chart.action
    assert explained["sentence"].startswith(
        f"SPE {spe:.3g}, action limit {limit:.3g}, mainly because magnesium is {abs(residual[j]):.1f} SD lower "
        "than the model predicts"
    )
    assert explained["driver"] == "spe" and explained["level"] == "action"
    assert explained["variables"][0]["variable"] == "magnesium"
    assert explained["variables"][0]["residual_sd"] == pytest.approx(residual[j], rel=1e-9)
    assert explained["spe_limits"] == {"warning": result.spe_chart.warning, "action": result.spe_chart.action}


def test_explanation_of_a_quiet_and_of_an_incomplete_sample(wine):
    model, _, new = wine
    result = mon.score_new_samples(model, new)
    quiet = np.flatnonzero(~result.t2_exceeds_warning & ~result.spe_exceeds_warning)[0]
    row = new.iloc[[quiet]].copy()
    explained = mon.explain_new_sample(model, row)
    assert explained["sentence"].startswith("Within the warning limits: T² ")
    assert explained["level"] is None and not explained["incomplete"]
    row.iloc[0, 0] = np.nan
    explained = mon.explain_new_sample(model, row)
    assert explained["missing"] == ["alcohol"] and explained["incomplete"]
    assert explained["sentence"].endswith("Not measured: alcohol; scores by projection to the model plane.")
    alcohol = next(v for v in explained["variables"] if v["variable"] == "alcohol")
    assert alcohol["rbc_spe"] is None and alcohol["residual_sd"] is None


def test_explanation_needs_one_sample(wine):
    model, _, new = wine
    with pytest.raises(InputError, match="expected one sample"):
        mon.explain_new_sample(model, new.iloc[:2])


# ------------------------------------------------------------------ bad input
def test_bad_scoring_input_is_an_input_error(wine):
    model, _, new = wine
    with pytest.raises(InputError, match="data have 12 columns; the model expects 13"):
        mon.score_new_samples(model, new.to_numpy()[:, :12])
    with pytest.raises(InputError, match="missing from the data: proline"):
        mon.score_new_samples(model, new.drop(columns="proline"))
    bad = new.copy()
    bad.iloc[2, 3] = np.inf
    with pytest.raises(InputError, match="infinite value"):
        mon.score_new_samples(model, bad)
    empty = new.copy()
    empty.iloc[4] = np.nan
    with pytest.raises(InputError, match=f"none of the model's variables: {new.index[4]}"):
        mon.score_new_samples(model, empty)
    with pytest.raises(InputError, match="warning level 0.99 must be below the action level 0.95"):
        mon.score_new_samples(model, new, confidence_levels=(0.99, 0.95))
    with pytest.raises(InputError, match="two levels"):
        mon.score_new_samples(model, new, confidence_levels=0.95)
    with pytest.raises(InputError, match="SPE limit method"):
        mon.score_new_samples(model, new, spe_method="guess")
    with pytest.raises(InputError, match="fitted PCAModel"):
        mon.score_new_samples(PCAModel(), new)
    with pytest.raises(InputError, match="no samples"):
        mon.score_new_samples(model, new.iloc[:0])
    with pytest.raises(InputError, match="component 3 is not one"):
        mon.score_limits(model, 3)
    with pytest.raises(InputError, match=f"none of the model's variables: {new.index[4]}"):
        mon.reconstruction_contributions(model, empty)
