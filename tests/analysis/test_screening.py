"""Respondent screening (analysis.screening) against hand-worked values, scipy and scikit-learn.

Sources named beside each check:
- long-string index: the longest run of identical consecutive answers (Johnson, J.A.
  2005, Journal of Research in Personality 39, 103-129; Curran, P.G. 2016, Journal of
  Experimental Social Psychology 66, 4-19, section on long-string analysis); the
  values below are counted by hand from the matrices written out in the tests.
- IRV: the standard deviation of a respondent's answers, divisor k - 1 (Dunn,
  Heggestad, Shanock & Theilacker 2018, Journal of Business and Psychology 33,
  105-121; divisor from memory); the values below are worked out by hand.
- robust distance: scikit-learn ``sklearn.covariance.MinCovDet`` as the reference
  FastMCD (Rousseeuw & Van Driessen 1999, Technometrics 41, 212-223); its
  reweighted estimate carries the Croux & Haesbroeck consistency factor from
  scikit-learn 1.8 on (scikit-learn pull request #32117).
- cut-offs: scipy.stats.chi2 quantiles, and the printed chi-square table of the
  NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4 (from memory);
  numpy's default quantile (Hyndman & Fan 1996, definition 7).
"""

from __future__ import annotations

import numpy as np
import pytest
import sklearn
from scipy import stats
from sklearn.covariance import MinCovDet

from analysis import screening
from analysis.errors import InputError

NAN = np.nan
# Four respondents, six items on a 1-5 scale (invented for these tests).
SMALL = np.array([
    [3, 3, 3, 3, 3, 3],    # the same answer throughout
    [1, 2, 3, 4, 5, 1],    # never twice in a row
    [2, 2, 4, 4, 4, 1],    # runs of 2, 3 and 1
    [5, 5, NAN, 5, 5, 2],  # a blank in the middle of the 5s
], dtype=float)


# ------------------------------------------------------------- long string
def test_long_string_counts_runs_by_hand():
    longest, mean_run = screening.long_string(SMALL)
    # row 1: one run of six 3s -> longest 6; 6 answers / 1 run = 6
    # row 2: six runs of length 1 -> longest 1; 6 / 6 = 1
    # row 3: runs (2, 2), (4, 4, 4), (1) -> longest 3; 6 answers / 3 runs = 2
    # row 4: the blank ends the first run: (5, 5), blank, (5, 5), (2) -> longest 2;
    #        5 answers / 3 runs = 1.6667
    assert longest.tolist() == [6, 1, 3, 2]
    np.testing.assert_allclose(mean_run, [6.0, 1.0, 2.0, 5 / 3])


def test_long_string_of_a_row_without_answers_is_zero():
    longest, mean_run = screening.long_string(np.array([[NAN, NAN, NAN], [1, 1, NAN]]))
    # row 1: no answer, no run; row 2: one run (1, 1), then a blank -> longest 2, 2 answers / 1 run
    assert longest.tolist() == [0, 2]
    assert np.isnan(mean_run[0]) and mean_run[1] == 2.0


def test_long_string_run_at_the_end_of_the_row():
    # 1, 2, then four 4s at the end: the longest run closes the row -> 4; runs (1), (2), (4 4 4 4) -> 6 / 3 = 2
    longest, mean_run = screening.long_string(np.array([[1, 2, 4, 4, 4, 4]], dtype=float))
    assert longest.tolist() == [4] and mean_run.tolist() == [2.0]


# -------------------------------------------------------------------- IRV
def test_irv_by_hand():
    irv = screening.response_variability(SMALL)
    # row 1: all 3 -> 0
    # row 2: mean 16/6 = 2.6667; squared deviations 2.7778 + 0.4444 + 0.1111 + 1.7778 + 5.4444 + 2.7778
    #        = 13.3333; / (6 - 1) = 2.6667; sqrt = 1.63299
    # row 3: mean 17/6 = 2.8333; squared deviations 0.6944 * 2 + 1.3611 * 3 + 3.3611 = 8.8333;
    #        / 5 = 1.76667; sqrt = 1.32916
    # row 4: the blank left out: 5, 5, 5, 5, 2, mean 4.4; 0.36 * 4 + 5.76 = 7.2; / 4 = 1.8; sqrt = 1.34164
    np.testing.assert_allclose(irv, [0.0, 1.63299, 1.32916, 1.34164], atol=5e-6)


def test_irv_needs_two_answers():
    irv = screening.response_variability(np.array([[4, NAN, NAN], [NAN, NAN, NAN], [2, 4, NAN]]))
    # rows 1 and 2 have fewer than 2 answers; row 3: 2 and 4, mean 3, (1 + 1) / 1 = 2, sqrt 2 = 1.41421
    assert np.isnan(irv[0]) and np.isnan(irv[1])
    assert irv[2] == pytest.approx(np.sqrt(2.0))


def test_irv_matches_the_sample_sd_of_numpy():
    # the k - 1 divisor is numpy's ddof=1 standard deviation of the answered items
    rng = np.random.default_rng(5)
    X = rng.integers(1, 8, size=(50, 12)).astype(float)
    np.testing.assert_allclose(screening.response_variability(X), X.std(axis=1, ddof=1))


# --------------------------------------------------------------- the scale
@pytest.mark.parametrize(("low", "high"), [(1, 5), (1, 7), (0, 10)])
def test_common_rating_scales_are_items(low, high):
    rng = np.random.default_rng(1)
    X = rng.integers(low, high + 1, size=(40, 6)).astype(float)
    X[0, 0], X[1, 1] = low, high  # both ends used
    check = screening.check_item_scale(X)
    assert check.is_items and (check.low, check.high) == (low, high)


def test_twelve_points_are_not_one_scale():
    X = np.tile(np.arange(12, dtype=float), (3, 1)).T  # 0..11 in three columns: 12 points
    check = screening.check_item_scale(X, ["a", "b", "c"])
    assert not check.is_items and "12 points" in check.reason


def test_a_fraction_is_named_with_its_column_and_row():
    X = np.array([[1, 2, 3], [2, 2.5, 4], [5, 1, 1]], dtype=float)
    check = screening.check_item_scale(X, ["Q1", "Q2", "Q3"])
    assert not check.is_items
    assert "'Q2'" in check.reason and "2.5" in check.reason and "row 2" in check.reason


def test_too_few_items_and_no_answers():
    assert not screening.check_item_scale(np.ones((5, 2))).is_items
    assert not screening.check_item_scale(np.full((5, 4), NAN)).is_items
    assert not screening.check_item_scale(np.full((5, 4), 3.0)).is_items  # one value: no scale


def test_blanks_do_not_spoil_the_check():
    X = np.array([[1, NAN, 3], [4, 5, NAN], [2, 2, 2]], dtype=float)
    assert screening.check_item_scale(X).is_items


# ----------------------------------------------------------------- cut-offs
@pytest.mark.parametrize("df", [1, 5, 16, 40])
def test_distance_cutoff_is_the_chi_square_quantile(df):
    assert screening.distance_cutoff([df], 0.999)[0] == pytest.approx(stats.chi2.ppf(0.999, df), rel=1e-12)


@pytest.mark.parametrize(("df", "printed"), [(10, 29.588), (16, 39.252), (20, 45.315)])
def test_distance_cutoff_against_the_printed_table(df, printed):
    # NIST/SEMATECH e-Handbook 1.3.6.7.4, upper-tail critical values of chi-square at alpha = 0.001 (from memory)
    assert screening.distance_cutoff([df])[0] == pytest.approx(printed, abs=5e-4)


def test_distance_cutoff_of_no_answers_is_missing():
    assert np.isnan(screening.distance_cutoff([0])[0])


def test_long_string_cutoff_is_half_the_items():
    rule = screening.long_string_cutoff(16)
    assert rule.value == 8.0 and "8 of 16" in rule.rule and "Curran (2016)" in rule.basis


def test_irv_cutoff_is_the_numpy_quantile():
    # linear quantile (Hyndman & Fan definition 7): position (5 - 1) * 0.25 = 1 -> the second value, 1.0
    rule = screening.irv_cutoff(np.array([0.0, 1.0, 2.0, 3.0, 4.0, NAN]), 0.25)
    assert rule.value == pytest.approx(1.0) and "common practice" in rule.basis


# ---------------------------------------------------------- robust distance
def _contaminated(seed=3, n=200, k=5, outliers=12):
    """n respondents' continuous answers with correlated items and a few far-off rows."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 2)) @ rng.standard_normal((2, k)) + rng.standard_normal((n, k))
    X[:outliers] += 6.0
    return X


@pytest.mark.skipif(
    tuple(int(p) for p in sklearn.__version__.split(".")[:2]) < (1, 8),
    reason="MinCovDet's reweighted estimate has the Croux-Haesbroeck factor from scikit-learn 1.8 (PR #32117)",
)
def test_robust_distance_matches_scikit_learn():
    X = _contaminated()  # n = 200, k = 5: h = (200 + 5 + 1) // 2 = 103 = scikit-learn's default ceil(206 / 2)
    ours = screening.robust_distances(X)
    reference = MinCovDet(random_state=0).fit(X)
    np.testing.assert_allclose(ours.location, reference.location_, rtol=1e-10)
    np.testing.assert_allclose(ours.covariance, reference.covariance_, rtol=1e-10)
    np.testing.assert_allclose(ours.d2, reference.mahalanobis(X), rtol=1e-9)
    assert ours.df.tolist() == [5] * 200


def test_robust_distance_finds_the_group_the_classical_one_misses():
    # A group of 30 (15 %) around (5, -5, 5, -5, 5) inflates the classical covariance towards
    # itself and hides (masking; Rousseeuw & Van Driessen 1999, section 1); the MCD of the other
    # 85 % does not. Seeded data (invented).
    rng = np.random.default_rng(2)
    X = rng.standard_normal((200, 2)) @ rng.standard_normal((2, 5)) + rng.standard_normal((200, 5))
    X[:30] = rng.standard_normal((30, 5)) + np.array([5.0, -5.0, 5.0, -5.0, 5.0])
    limit = screening.distance_cutoff([5])[0]
    robust = screening.robust_distances(X).d2
    centred = X - X.mean(axis=0)
    classical = np.einsum("ij,ij->i", centred @ np.linalg.inv(np.cov(X, rowvar=False)), centred)
    assert (robust[:30] > limit).all() and (robust[30:] > limit).sum() <= 2
    assert (classical[:30] > limit).sum() == 0


def test_row_with_blanks_uses_the_marginal_of_the_fit():
    X = _contaminated()
    X[50, 1] = NAN  # one blank: the partitioned-inverse shortcut
    X[55, 4] = NAN
    X[60, [0, 4]] = NAN  # two blanks: the sub-matrix itself
    fit = screening.robust_distances(X)
    for row in (50, 55, 60):
        seen = np.isfinite(X[row])
        diff = X[row, seen] - fit.location[seen]
        expected = diff @ np.linalg.solve(fit.covariance[np.ix_(seen, seen)], diff)
        assert fit.d2[row] == pytest.approx(expected, rel=1e-10)
        assert fit.df[row] == seen.sum()


def test_too_few_complete_rows_give_a_note_not_a_failure():
    X = np.array([[1, 2, 3], [2, 3, 4], [3, 3, 3]], dtype=float)
    fit = screening.robust_distances(X)
    assert np.isnan(fit.d2).all() and "at least 6 respondents" in fit.note


# ------------------------------------------------------------------ screen
def test_screen_flags_by_the_stated_rules():
    result = screening.screen(SMALL, ["r1", "r2", "r3", "r4"])
    table = result.table
    # long string: longer than 6 / 2 = 3 items -> r1 (6) only; r3 (3) is not longer than 3
    assert table["long_string_flag"].tolist() == [True, False, False, False]
    # IRV: at or below the 5 % quantile of (0, 1.633, 1.329, 1.342): 0 + 0.15 * (1.329 - 0) = 0.199 -> r1
    assert table["irv_flag"].tolist() == [True, False, False, False]
    assert result.cutoffs[1].value == pytest.approx(0.15 * 1.32916, rel=1e-4)
    # 3 complete rows cannot carry a robust fit of 6 items: no distance, no flag, a note
    assert not table["distance_flag"].any() and result.notes
    assert table["n_flags"].tolist() == [2, 0, 0, 0] and result.flagged == ["r1"]
    assert result.scale.is_items


def test_screen_takes_ids_and_names_from_a_data_frame():
    import pandas as pd

    frame = pd.DataFrame(SMALL, index=["a", "b", "c", "d"], columns=[f"Q{j}" for j in range(1, 7)])
    result = screening.screen(frame)
    assert list(result.table.index) == ["a", "b", "c", "d"] and result.table.index.name == "sample_id"


def test_screen_refuses_bad_settings():
    with pytest.raises(InputError, match="between 0 and 1"):
        screening.screen(SMALL, irv_quantile=1.5)
    with pytest.raises(InputError, match="at least 2 items"):
        screening.screen(SMALL[:, :1])
