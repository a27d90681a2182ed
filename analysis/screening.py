"""Respondent screening for questionnaire files: long-string index, IRV, robust Mahalanobis distance.

A file qualifies when its variables are items answered on one common scale
(``check_item_scale``: every answer a whole number, all answers within one range
of at most ``MAX_SCALE_POINTS`` points, such as 1-5, 1-7 or 0-10), or when the
user declares it so. Per respondent (row):

- **long-string index** (``long_string``): the longest run of identical
  consecutive answers in form order, and the mean length of the runs
  (Johnson 2005; Curran 2016, section on long-string analysis). A blank
  answer ends a run and starts none.
- **intra-individual response variability** (IRV, ``response_variability``):
  the standard deviation of a respondent's answers across the items, divisor
  k - 1 for k answers (Dunn, Heggestad, Shanock & Theilacker 2018). Zero means
  the same answer to every item.
- **robust Mahalanobis distance** (``robust_distances``): squared distance D²
  from the reweighted MCD location under the MCD scatter of the complete rows
  (Rousseeuw & Van Driessen 1999, through ``analysis.robust.fit_mcd``); a row
  with blanks is measured on the items it answered, under the matching part of
  the location and scatter. Meade & Craig (2012) recommend multivariate outlier
  analysis among the careless-response indices; the robust fit keeps a block of
  outliers from hiding itself by inflating the classical covariance.

Cut-offs (``cutoffs``), each with its basis:

- long string: a run longer than ``LONG_STRING_FRACTION`` (half) of the items.
  Curran (2016) recommends scale-specific cut-offs, with about half the scale
  length as a conservative rule of thumb (``from memory``); Johnson (2005)
  gives cut-offs per answer option for a 300-item inventory.
- IRV: at or below the ``IRV_QUANTILE`` quantile of all respondents
  (``common practice``: Dunn et al. 2018 read the lowest tail of IRV and give
  no fixed value).
- D²: above the ``DISTANCE_LEVEL`` (0.999) quantile of chi-square with as many
  degrees of freedom as answered items (Meade & Craig 2012 flag at p < .001,
  ``from memory``).

Above ``MCD_SAMPLE_ROWS`` complete rows the MCD is fitted to a seeded random
subsample of them and every row is measured against it: a speed-up that is
ours (scikit-learn's FastMCD plus C-steps on all 100,000 rows of 40 items take
about 2 s; the subsample, under 0.2 s).

References
----------
Curran, P.G. (2016) Methods for the detection of carelessly invalid responses in
    survey data. Journal of Experimental Social Psychology 66, 4-19.
Dunn, A.M., Heggestad, E.D., Shanock, L.R., Theilacker, N. (2018) Intra-individual
    response variability as an indicator of insufficient effort responding.
    Journal of Business and Psychology 33, 105-121.
Johnson, J.A. (2005) Ascertaining the validity of individual protocols from
    Web-based personality inventories. Journal of Research in Personality 39, 103-129.
Meade, A.W., Craig, S.B. (2012) Identifying careless responses in survey data.
    Psychological Methods 17, 437-455.
Rousseeuw, P.J., Van Driessen, K. (1999) A fast algorithm for the minimum
    covariance determinant estimator. Technometrics 41(3), 212-223.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from analysis.errors import InputError
from analysis.robust import fit_mcd, mahalanobis_sq

MIN_ITEMS = 3  # fewer items give no run or spread worth reading (common practice)
MAX_SCALE_POINTS = 11  # 0-10 is the widest common rating scale (common practice)
LONG_STRING_FRACTION = 0.5
IRV_QUANTILE = 0.05
DISTANCE_LEVEL = 0.999
MCD_SAMPLE_ROWS = 2000
SCALE_RULE = (
    f"items on one scale: at least {MIN_ITEMS} variables, every answer a whole number, and all answers "
    f"within one range of at most {MAX_SCALE_POINTS} points (such as 1-5, 1-7 or 0-10)"
)
FLAG_COLUMNS = ("long_string_flag", "irv_flag", "distance_flag")


# --------------------------------------------------------------- the scale
@dataclass(frozen=True)
class ItemScale:
    """Whether a matrix looks like items on one common scale, and why (``SCALE_RULE``).

    low, high: the lowest and highest answer seen (None when there is none);
    reason: a sentence naming what qualifies the file or what keeps it out.
    """

    is_items: bool
    low: float | None
    high: float | None
    reason: str


def check_item_scale(X, item_names=None) -> ItemScale:
    """Check ``SCALE_RULE`` on X (n respondents, k items; NaN = blank)."""
    X = np.asarray(X, dtype=np.float64)
    names = list(item_names) if item_names is not None else [f"column {j + 1}" for j in range(X.shape[1])]
    if X.ndim != 2 or X.shape[1] < MIN_ITEMS:
        return ItemScale(False, None, None, f"{X.shape[-1] if X.ndim == 2 else 0} variable(s): {SCALE_RULE}")
    answered = np.isfinite(X)
    if not answered.any():
        return ItemScale(False, None, None, "no answers at all")
    fractional = answered & (X != np.round(np.where(answered, X, 0.0)))
    if fractional.any():
        row, col = np.argwhere(fractional)[0]
        return ItemScale(False, None, None,
                         f"column {names[col]!r} holds {X[row, col]:g} (row {row + 1}), not a whole number; "
                         f"{SCALE_RULE}")
    low, high = float(np.min(X[answered])), float(np.max(X[answered]))
    points = int(high - low) + 1
    if points > MAX_SCALE_POINTS:
        col = int(np.argmax(np.nanmax(X, axis=0, initial=-np.inf) - np.nanmin(X, axis=0, initial=np.inf)))
        return ItemScale(False, low, high,
                         f"answers run from {low:g} to {high:g} ({points} points; column {names[col]!r} spans the "
                         f"most); {SCALE_RULE}")
    if points < 2:
        return ItemScale(False, low, high, f"every answer is {low:g}: no scale to read")
    return ItemScale(True, low, high, f"{X.shape[1]} items, whole-number answers from {low:g} to {high:g}")


# ----------------------------------------------------------------- indices
def long_string(X) -> tuple[np.ndarray, np.ndarray]:
    """(longest run, mean run length) of identical consecutive answers per row of X (NaN = blank).

    A blank ends a run and is no run itself. With a answers and e equal
    neighbouring pairs a row has a - e runs, so the mean run length is
    a / (a - e). A row without answers gives (0, NaN).
    """
    X = np.asarray(X, dtype=np.float64)
    n, k = X.shape
    answered = np.count_nonzero(np.isfinite(X), axis=1)
    if k < 2:
        longest = answered.astype(np.int64)
        return longest, np.where(answered > 0, 1.0, np.nan)
    same = X[:, 1:] == X[:, :-1]  # NaN never equals: a blank breaks the run
    position = np.arange(k - 1)
    last_break = np.maximum.accumulate(np.where(same, -1, position), axis=1)
    streak = position - last_break  # equal pairs in a row ending at each position
    longest = np.where(answered > 0, streak.max(axis=1) + 1, 0)
    runs = answered - np.count_nonzero(same, axis=1)
    mean_run = np.where(runs > 0, answered / np.maximum(runs, 1), np.nan)
    return longest.astype(np.int64), mean_run


def response_variability(X) -> np.ndarray:
    """IRV per row: the standard deviation of its answers (divisor k - 1; NaN below 2 answers).

    Dunn, Heggestad, Shanock & Theilacker (2018); blanks are left out.
    """
    X = np.asarray(X, dtype=np.float64)
    answered = np.isfinite(X)
    count = np.count_nonzero(answered, axis=1)
    values = np.where(answered, X, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = values.sum(axis=1) / count
        centred = np.where(answered, X - mean[:, None], 0.0)
        variance = np.einsum("ij,ij->i", centred, centred) / (count - 1)
    return np.where(count >= 2, np.sqrt(variance), np.nan)


@dataclass(frozen=True)
class RobustDistances:
    """Squared robust Mahalanobis distances per row and the chi-square degrees of freedom (answered items).

    d2 is NaN (and ``note`` says why) where no distance could be computed.
    """

    d2: np.ndarray
    df: np.ndarray
    location: np.ndarray | None
    covariance: np.ndarray | None
    fitted_rows: int
    note: str | None = None


def robust_distances(X, random_state: int = 0, sample_rows: int = MCD_SAMPLE_ROWS) -> RobustDistances:
    """D² of every row from the reweighted MCD of the complete rows (h = [(m + k + 1) / 2]).

    h is the maximal-breakdown choice of Rousseeuw & Van Driessen (1999), as
    scikit-learn's ``MinCovDet`` default. Above ``sample_rows`` complete rows the
    MCD is fitted to a seeded subsample of them (see the module docstring). A
    row with blanks gets the distance of its answered items under the matching
    sub-vector and sub-matrix (the marginal of the fitted normal model), with
    that many degrees of freedom. Rows with fewer than 2 answers stay NaN.
    """
    X = np.asarray(X, dtype=np.float64)
    n, k = X.shape
    answered = np.isfinite(X)
    df = np.count_nonzero(answered, axis=1)
    d2 = np.full(n, np.nan)
    complete = np.flatnonzero(df == k)
    fitted = complete
    if len(fitted) > sample_rows:
        fitted = np.sort(np.random.default_rng(random_state).choice(complete, size=sample_rows, replace=False))
    m = len(fitted)
    h = (m + k + 1) // 2
    if h <= k or m < 2 * k:
        return RobustDistances(d2, df, None, None, m,
                               f"the robust distance needs at least {2 * k} respondents who answered all {k} items; "
                               f"{len(complete)} did")
    try:
        mcd = fit_mcd(X[fitted], h, random_state=random_state)
    except InputError as exc:
        return RobustDistances(d2, df, None, None, m, f"the robust distance was not computed: {exc}")
    location, covariance = mcd.location, mcd.covariance
    d2[complete] = mahalanobis_sq(X[complete], location, covariance)
    one_blank = np.flatnonzero(df == k - 1)
    if len(one_blank) and k >= 3:
        d2[one_blank] = _one_blank_distances(X[one_blank], location, covariance)
    partial = np.flatnonzero((df < k - 1) & (df >= 2))
    if len(partial):
        patterns, which = np.unique(answered[partial], axis=0, return_inverse=True)
        for p, pattern in enumerate(patterns):
            rows = partial[which.ravel() == p]
            d2[rows] = mahalanobis_sq(X[np.ix_(rows, pattern)], location[pattern],
                                      covariance[np.ix_(pattern, pattern)])
    return RobustDistances(d2, df, location, covariance, m)


def _one_blank_distances(rows: np.ndarray, location: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """D² of rows with exactly one blank each, on their answered items, all at once.

    With P the inverse of the covariance, z the centred row with 0 in the blank
    item j, the inverse of the covariance of the other items is
    P_oo - P_oj P_jo / P_jj (the inverse of a partitioned matrix), so
    D² = z' P z - (P z)_j² / P_jj.
    """
    z = np.where(np.isfinite(rows), rows - location, 0.0)
    blank = np.argmax(~np.isfinite(rows), axis=1)
    precision = np.linalg.inv(covariance)
    pz = z @ precision
    picked = pz[np.arange(len(rows)), blank]
    return np.einsum("ij,ij->i", pz, z) - picked**2 / precision[blank, blank]


# ----------------------------------------------------------------- cut-offs
@dataclass(frozen=True)
class Cutoff:
    """One cut-off: its value, the rule in words and its published basis (or ``common practice``)."""

    name: str
    value: float | None
    rule: str
    basis: str


def long_string_cutoff(n_items: int, fraction: float = LONG_STRING_FRACTION) -> Cutoff:
    """Flag a longest run longer than ``fraction`` of the items (value: that many items)."""
    value = fraction * n_items
    return Cutoff("long string", value, f"longest run of identical answers longer than {value:g} of {n_items} items",
                  "Curran (2016): scale-specific cut-offs, about half the scale length as a conservative "
                  "rule of thumb (from memory)")


def irv_cutoff(irv: np.ndarray, quantile: float = IRV_QUANTILE) -> Cutoff:
    """Flag IRV at or below the ``quantile`` of the respondents' IRV (NaN left out)."""
    known = irv[np.isfinite(irv)]
    value = float(np.quantile(known, quantile)) if len(known) else None
    shown = "not computed" if value is None else f"{value:.3g}"
    return Cutoff("low IRV", value, f"IRV at or below its {quantile:.0%} quantile ({shown})",
                  "common practice: Dunn et al. (2018) read the lowest tail of IRV and give no fixed value")


def distance_cutoff(df, level: float = DISTANCE_LEVEL) -> np.ndarray:
    """The chi-square quantile at ``level`` for each row's degrees of freedom (NaN where df < 1)."""
    df = np.asarray(df, dtype=np.float64)
    return np.where(df >= 1, stats.chi2.ppf(level, np.maximum(df, 1)), np.nan)


def distance_cutoff_rule(n_items: int, level: float = DISTANCE_LEVEL) -> Cutoff:
    """The D² rule in words, its value for a respondent who answered all ``n_items``."""
    value = float(stats.chi2.ppf(level, n_items))
    return Cutoff("robust distance", value,
                  f"D² above the {level:.1%} chi-square quantile for the answered items "
                  f"({value:.4g} with all {n_items} answered)",
                  "Meade & Craig (2012): Mahalanobis distance flagged at p < .001 (from memory); MCD as "
                  "Rousseeuw & Van Driessen (1999)")


# -------------------------------------------------------------- the screen
@dataclass
class Screening:
    """The screening of one item matrix.

    table: one row per respondent (index = respondent ids): ``answered``,
    ``long_string``, ``mean_run``, ``irv``, ``distance_sq``, ``distance_df``,
    ``distance_cutoff``, the three flags (``FLAG_COLUMNS``) and ``n_flags``;
    cutoffs: the three ``Cutoff`` rules; scale: the ``check_item_scale`` answer;
    notes: what could not be computed.
    """

    table: pd.DataFrame
    cutoffs: list[Cutoff]
    scale: ItemScale
    notes: list[str] = field(default_factory=list)

    @property
    def flagged(self) -> list[str]:
        """Ids of the respondents with at least one flag, in table order."""
        return [str(i) for i in self.table.index[self.table["n_flags"].to_numpy() > 0]]


def screen(X, sample_ids=None, item_names=None, *, long_string_fraction: float = LONG_STRING_FRACTION,
           irv_quantile: float = IRV_QUANTILE, level: float = DISTANCE_LEVEL, random_state: int = 0) -> Screening:
    """Long string, IRV and robust D² with their flags for every row of X (items in form order).

    X may be a DataFrame (its index gives the ids, its columns the item
    names). Nothing here checks the scale: call ``check_item_scale`` first
    unless the user declared the items; its answer is kept in ``scale``.
    """
    if isinstance(X, pd.DataFrame):
        sample_ids = list(X.index) if sample_ids is None else sample_ids
        item_names = list(X.columns) if item_names is None else item_names
    values = np.asarray(X, dtype=np.float64)
    if values.ndim != 2 or values.shape[1] < 2:
        raise InputError(f"screening needs at least 2 items, got {values.shape[-1] if values.ndim == 2 else 0}")
    if not 0 < long_string_fraction < 1 or not 0 < irv_quantile < 1 or not 0 < level < 1:
        raise InputError("the long-string fraction, the IRV quantile and the level must each lie between 0 and 1")
    n, k = values.shape
    ids = [str(s) for s in (sample_ids if sample_ids is not None else range(1, n + 1))]
    longest, mean_run = long_string(values)
    irv = response_variability(values)
    distances = robust_distances(values, random_state=random_state)
    limit = distance_cutoff(distances.df, level)
    rules = [long_string_cutoff(k, long_string_fraction), irv_cutoff(irv, irv_quantile),
             distance_cutoff_rule(k, level)]
    irv_value = rules[1].value
    flags = {
        "long_string_flag": longest > rules[0].value,
        "irv_flag": np.isfinite(irv) & (irv <= (irv_value if irv_value is not None else -np.inf)),
        "distance_flag": np.isfinite(distances.d2) & (distances.d2 > limit),
    }
    table = pd.DataFrame(
        {
            "answered": distances.df,
            "long_string": longest,
            "mean_run": mean_run,
            "irv": irv,
            "distance_sq": distances.d2,
            "distance_df": distances.df,
            "distance_cutoff": limit,
            **flags,
        },
        index=pd.Index(ids, name="sample_id"),
    )
    table["n_flags"] = np.sum([flags[c] for c in FLAG_COLUMNS], axis=0).astype(np.int64)
    notes = [distances.note] if distances.note else []
    return Screening(table, rules, check_item_scale(values, item_names), notes)
