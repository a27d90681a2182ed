"""Choosing the number of principal components.

Three published rules are computed side by side, one table row per component
count, and one of them decides the recommendation:

* Cross-validated explained variance by element-wise k-fold cross-validation
  ("ekf"): rows are left out in folds, a PCA is fitted on the remaining rows,
  and every cell of a left-out row is predicted from the *other* cells of that
  row (least-squares scores on the loadings without that variable), so no
  value ever helps to predict itself. The scheme goes back to Eastment &
  Krzanowski (1982); this element-wise form is the one reviewed and
  recommended by Bro, Kjeldahl, Smilde & Kiers (2008). For a row with
  loadings P and residual e_j of its full least-squares projection, the
  leave-one-cell-out residual is e_j / (1 - h_j), h_j the j-th diagonal
  element of the projection (hat) matrix of the row's observed loadings,
  the usual leave-one-out identity of least squares.
* Parallel analysis (Horn 1965): a component is worth keeping while its
  eigenvalue exceeds the 95th percentile of the same eigenvalue of seeded
  random normal data of the same shape, preprocessed the same way (for tall
  data drawn through the Wishart distribution of its cross-product, Bartlett
  1933).
* Broken stick (Jackson 1993): the expected share of component k among p if
  the total variance were split at random, (1/p) * sum_{i=k..p} 1/i.

Recommendation: the cross-validation rule, "keep adding components while each
raises the cross-validated explained variance by at least one percentage
point"; when cross-validation is impossible (too few rows or variables), the
parallel-analysis count.

References
----------
Wold, H. (1966) Estimation of principal components and related models by
iterative least squares. In Krishnaiah, P.R. (ed.) Multivariate Analysis,
Academic Press, 391-420.
Nelson, P.R.C., Taylor, P.A., MacGregor, J.F. (1996) Missing data methods in
PCA and PLS: score calculations with incomplete observations. Chemometrics and
Intelligent Laboratory Systems 35, 45-65.
Eastment, H.T., Krzanowski, W.J. (1982) Cross-validatory choice of the number
of components from a principal component analysis. Technometrics 24, 73-77.
Bro, R., Kjeldahl, K., Smilde, A.K., Kiers, H.A.L. (2008) Cross-validation of
component models: a critical look at current methods. Analytical and
Bioanalytical Chemistry 390, 1241-1251.
Horn, J.L. (1965) A rationale and test for the number of factors in factor
analysis. Psychometrika 30, 179-185.
Bartlett, M.S. (1933) On the theory of statistical regression. Proceedings
of the Royal Society of Edinburgh 53, 260-283.
Anderson, T.W. (2003) An Introduction to Multivariate Statistical Analysis,
3rd ed. Wiley.
Jackson, D.A. (1993) Stopping rules in principal components analysis: a
comparison of heuristical and statistical approaches. Ecology 74(8), 2204-2214.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import linalg

from analysis.errors import InputError
from analysis.pca import PCAModel, numerical_rank
from analysis.preprocessing import Preprocessor, as_matrix, scale_block

MAX_COMPONENTS = 20
MAX_FOLDS = 7
CV_MAX_ROWS = 2000
CV_MIN_GAIN = 0.01
PA_QUANTILE = 95.0
PA_MIN_SIMULATIONS, PA_MAX_SIMULATIONS = 5, 100
PA_WORK_BUDGET = 2e9  # multiply-adds spent on random eigenvalues, unless PA_MIN_SIMULATIONS need more
CV_WORK_BUDGET = 1e10  # multiply-adds for the fold decompositions; more rows are subsampled
NIPALS_TOL, NIPALS_MAX_ITER = 1e-10, 500
_CHUNK_ROWS = 8192

TABLE_COLUMNS = [
    "components",
    "eigenvalue",
    "explained",
    "cumulative",
    "cv_explained",
    "parallel_threshold",
    "broken_stick",
]


@dataclass(frozen=True)
class RankResult:
    """The component-count table and the recommendation.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per component count a = 1..A with columns ``components``,
        ``eigenvalue`` (lambda_a = t_a't_a/(n-1)), ``explained`` (share of the
        total variance), ``cumulative``, ``cv_explained`` (cumulative
        cross-validated explained variance, NaN where not computed),
        ``parallel_threshold`` (95th percentile of the a-th random eigenvalue)
        and ``broken_stick`` (expected share of component a).
    recommended : int
        Recommended number of components (at least 1).
    rule : str
        The rule that decided, in plain words.
    method : str
        ``"cross-validation"`` or ``"parallel analysis"``.
    notes : list of str
        How the table was computed where it departs from the plain definition
        (row subsampling, capped counts, skipped rows).
    """

    table: pd.DataFrame
    recommended: int
    rule: str
    method: str
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """JSON-safe dict: ``table`` as a list of row dicts (NaN -> None)."""
        rows = []
        for record in self.table.to_dict(orient="records"):
            rows.append(
                {
                    key: (int(value) if key == "components" else _finite_or_none(value))
                    for key, value in record.items()
                }
            )
        return {
            "table": rows,
            "recommended": int(self.recommended),
            "rule": self.rule,
            "method": self.method,
            "notes": list(self.notes),
        }


def with_model(rank: dict, model) -> dict:
    """The table of ``rank`` (``RankResult.to_dict()``) with its eigenvalue, explained and cumulative
    columns taken from a fitted classical ``model`` of the same samples and preprocessing, so the
    table and the model show one number for one thing.

    On complete data the values are the same to rounding. With missing cells the rules ran on a
    preliminary decomposition of the mean-filled data (cross-validation leaves the missing cells
    out); the model's columns replace those values and a note says so. A robust model (not a
    PCAModel) leaves the table as it is: its table is that of a classical analysis.
    """
    if not isinstance(model, PCAModel):
        return rank
    eigenvalues = model.eigenvalues_
    rows, cumulative = [], 0.0
    for row in rank["table"]:
        k = row["components"]
        row = dict(row)
        if k <= eigenvalues.size:
            explained = float(eigenvalues[k - 1] / model.total_variance_)
            cumulative += explained
            row.update(eigenvalue=float(eigenvalues[k - 1]), explained=explained, cumulative=cumulative)
        else:
            row.update(eigenvalue=None, explained=None, cumulative=None)
        rows.append(row)
    notes = list(rank.get("notes") or [])
    if model.n_missing_:
        notes.append(
            f"eigenvalue and explained columns: the fitted model ({model.n_components_} components, missing "
            "cells filled by its imputation); parallel analysis compared the eigenvalues of a preliminary "
            "decomposition with missing cells at their column means"
        )
    return {**rank, "table": rows, "notes": notes}


def _finite_or_none(value):
    value = float(value)
    return value if math.isfinite(value) else None


def choose_components(
    X, scaling="autoscale", log10=(), max_components=None, random_state=0, drop_constant=False
) -> RankResult:
    """Table of component-count rules and a recommended number of components.

    Parameters
    ----------
    X : ndarray or DataFrame of shape (n_samples, n_variables)
        Raw data, NaN allowed; preprocessed exactly as ``PCAModel`` would.
    scaling, log10, drop_constant :
        As for ``analysis.pca.PCAModel``.
    max_components : int or None
        Largest component count in the table; default and upper cap 20,
        further capped by what the data allow.
    random_state : int
        Seed for fold assignment, row subsampling and the random data of
        parallel analysis; equal seeds give equal tables.

    Returns
    -------
    RankResult

    Missing values: eigenvalue-based columns use the preprocessed data with
    missing cells replaced by their column mean; cross-validation never
    predicts or counts a missing cell.
    """
    limit = _check_max_components(max_components)
    Z = _preprocess(X, scaling, log10, drop_constant)
    return rank_table(Z, scaling, limit, random_state)


def _check_max_components(max_components) -> int:
    if max_components is None:
        return MAX_COMPONENTS
    if isinstance(max_components, bool) or not isinstance(max_components, (int, np.integer)):
        raise InputError(f"max_components must be a whole number, got {max_components!r}")
    if max_components < 1:
        raise InputError(f"max_components must be at least 1, got {max_components}")
    return int(min(max_components, MAX_COMPONENTS))


def _preprocess(X, scaling, log10, drop_constant=False) -> np.ndarray:
    """The data as PCAModel preprocesses them before fitting (log10, centring, scaling; NaN kept)."""
    values, ids, names = as_matrix(X)
    prep = Preprocessor(scaling, log10, drop_constant).fit(values, ids, names)
    kept = values if prep.keep_.all() else values[:, prep.keep_]  # no copy unless a variable was dropped
    return scale_block(kept, prep.log_mask_, prep.mean_, prep.scale_)


def rank_table(Z, scaling, max_components=MAX_COMPONENTS, random_state=0) -> RankResult:
    """The rank table for already preprocessed data ``Z`` (NaN allowed).

    ``scaling`` names the preprocessing ``Z`` went through; parallel analysis
    applies the same one to its random data.
    """
    Z = np.asarray(Z, dtype=np.float64)
    n, p = Z.shape
    notes: list[str] = []
    eigenvalues, total = _mean_filled_eigenvalues(Z, max_components)
    rank = numerical_rank(eigenvalues, n, p, centred=scaling != "none")
    n_rows = min(max_components, rank)
    if n_rows < 1:
        raise InputError("the data have no variance left after preprocessing; no component can be fitted")
    if n_rows < max_components:
        notes.append(f"the data allow at most {n_rows} component(s)")

    explained = eigenvalues[:n_rows] / total
    cv = np.full(n_rows, np.nan)
    cv_values, cv_notes = ekf_cross_validation(Z, n_rows, random_state=random_state, centre=scaling != "none")
    cv[: cv_values.size] = cv_values
    notes.extend(cv_notes)
    thresholds = parallel_analysis(Z, scaling, n_rows, random_state=random_state)
    table = pd.DataFrame(
        {
            "components": np.arange(1, n_rows + 1),
            "eigenvalue": eigenvalues[:n_rows],
            "explained": explained,
            "cumulative": np.cumsum(explained),
            "cv_explained": cv,
            "parallel_threshold": thresholds,
            "broken_stick": broken_stick(p)[:n_rows],
        },
        columns=TABLE_COLUMNS,
    )
    recommended, rule, method = _recommend(table, cv_values.size, cv_notes)
    return RankResult(table, recommended, rule, method, notes)


def _recommend(table: pd.DataFrame, n_cv: int, cv_notes: list[str]):
    if n_cv >= 1:
        cv = table["cv_explained"].to_numpy()[:n_cv]
        gains = np.diff(np.concatenate([[0.0], cv]))
        kept = 0
        while kept < n_cv and gains[kept] >= CV_MIN_GAIN:
            kept += 1
        citation = "element-wise k-fold, Eastment & Krzanowski 1982; Bro et al. 2008"
        if kept == 0:
            return (
                1,
                f"cross-validation ({citation}): no component raised the cross-validated explained "
                "variance by 1 percentage point or more, so the data look like noise; "
                "1 component is the smallest model",
                "cross-validation",
            )
        if kept == n_cv:
            ending = (
                f"each of the {n_cv} component(s) that could be cross-validated raised it by at least "
                "1 percentage point"
            )
        else:
            ending = (
                f"component {kept + 1} would change it by {100 * gains[kept]:+.1f} percentage points"
            )
        return (
            kept,
            f"cross-validation ({citation}): keep adding components while each raises the "
            f"cross-validated explained variance by at least 1 percentage point; {ending}",
            "cross-validation",
        )
    above = table["eigenvalue"].to_numpy() > table["parallel_threshold"].to_numpy()
    kept = int(np.argmin(above)) if not above.all() else int(above.size)
    reason = cv_notes[-1] if cv_notes else "cross-validation was not possible"
    return (
        max(kept, 1),
        f"parallel analysis (Horn 1965): {kept} leading component(s) have an eigenvalue above the "
        "95th percentile of random data of the same shape"
        + ("; 1 component is the smallest model" if kept == 0 else "")
        + f" ({reason})",
        "parallel analysis",
    )


# --- pure parts: broken stick, eigenvalues, parallel analysis, cross-validation ---------


def broken_stick(n_variables: int) -> np.ndarray:
    """Expected variance share of components 1..p under the broken-stick model.

    b_k = (1/p) * sum_{i=k..p} 1/i (Jackson 1993, Ecology 74(8), 2204-2214).
    """
    p = int(n_variables)
    inverse = 1.0 / np.arange(1, p + 1)
    return np.cumsum(inverse[::-1])[::-1] / p


def mean_imputed(Z) -> np.ndarray:
    """Copy of ``Z`` with each missing cell replaced by its column mean (0 for an empty column)."""
    Z = np.array(Z, dtype=np.float64)
    missing = np.isnan(Z)
    if missing.any():
        counts = (~missing).sum(axis=0)
        sums = np.where(missing, 0.0, Z).sum(axis=0)
        means = np.divide(sums, counts, out=np.zeros_like(sums), where=counts > 0)
        Z[missing] = np.take(means, np.nonzero(missing)[1])
    return Z


def _mean_filled_eigenvalues(Z: np.ndarray, k: int) -> tuple[np.ndarray, float]:
    """Largest k eigenvalues and the total variance of Z with missing cells at their column
    means; tall data accumulate the cross-product over row blocks (no copy of Z)."""
    n, p = Z.shape
    if n < p:
        filled = mean_imputed(Z) if np.isnan(Z).any() else Z
        return data_eigenvalues(filled, k), float(np.einsum("ij,ij->", filled, filled)) / max(n - 1, 1)
    means, _ = _observed_column_stats(Z)
    gram = np.zeros((p, p))
    for start in range(0, n, _CHUNK_ROWS):
        block = Z[start : start + _CHUNK_ROWS]
        missing = np.isnan(block)
        if missing.any():
            block = np.where(missing, means, block)
        gram += block.T @ block
    return _gram_eigenvalues(gram, n, k), float(np.trace(gram)) / max(n - 1, 1)


def data_eigenvalues(Z, k=None) -> np.ndarray:
    """Largest k (default all min(n, p)) eigenvalues lambda = t't/(n-1) of complete data, descending."""
    Z = np.asarray(Z, dtype=np.float64)
    n = Z.shape[0]
    return _gram_eigenvalues(Z.T @ Z if n >= Z.shape[1] else Z @ Z.T, n, k)


def _gram_eigenvalues(gram: np.ndarray, n: int, k=None) -> np.ndarray:
    values = _top_eigh(gram, gram.shape[0] if k is None else k)[0] / max(n - 1, 1)
    return np.clip(values, 0.0, None)


def _top_eigh(gram: np.ndarray, k: int, vectors: bool = False):
    """Largest k eigenvalues (descending) of a symmetric matrix, and their vectors when asked.

    LAPACK's MRRR driver computes only the eigenpairs asked for, which saves
    most of the work for eigenvectors when k is small.
    """
    size = gram.shape[0]
    k = min(int(k), size)
    wanted = [size - k, size - 1]
    if not vectors:
        return linalg.eigh(gram, eigvals_only=True, subset_by_index=wanted, driver="evr")[::-1], None
    values, vecs = linalg.eigh(gram, subset_by_index=wanted, driver="evr")
    return values[::-1], vecs[:, ::-1]


def parallel_analysis(
    Z, scaling, n_components, quantile=PA_QUANTILE, n_simulations=None, random_state=0
) -> np.ndarray:
    """Horn's (1965) parallel-analysis thresholds for components 1..n_components.

    Each simulation draws an (n, p) matrix N of independent standard normal
    values (``numpy.random.default_rng(random_state)``, one simulation after
    the other, rows in order) and preprocesses it like the data, column by
    column, with m_j and s_j the mean and standard deviation (ddof=1) of the
    observed cells of column j of ``Z``:

    * ``none``: m_j + s_j N_j (no centring, as the data);
    * ``center``: s_j (N_j - mean N_j);
    * ``autoscale``: (N_j - mean N_j) / sd(N_j);
    * ``pareto``: s_j (N_j - mean N_j) / sqrt(sd(N_j)).

    These are distributed as random normal columns with the data's mean and
    spread before scaling, put through the same scaling. The threshold of
    component a is the ``quantile`` percentile of the a-th eigenvalue over the
    simulations.

    Tall data (n - 1 >= p) never draw N: its centred cross-product N'HN is
    Wishart(n - 1, I_p) and independent of the column sums u = N'1 ~ N(0, n I_p)
    (Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd ed.,
    sections 3.3 and 7.2), so each simulation draws the p x p Wishart matrix by
    Bartlett's (1933) decomposition and u, at O(p^2) random numbers instead of
    n p, and every preprocessing above follows from them. Wide data draw N
    itself. Without ``n_simulations`` the count is 100, lowered (not below 5)
    to keep the work bounded where N must be drawn for large data, where the
    random eigenvalues scatter less and fewer simulations pin the percentile
    down. The column statistics of ``Z`` are computed in row blocks, so no
    copy of the data is made.
    """
    Z = np.asarray(Z, dtype=np.float64)
    n, p = Z.shape
    if scaling not in ("none", "center", "autoscale", "pareto"):
        raise InputError(f"unknown scaling {scaling!r}; use none, center, autoscale or pareto")
    means, spreads = _observed_column_stats(Z)
    bartlett = n - 1 >= p
    if n_simulations is None:
        work = float(p) ** 3 if bartlett else float(n) * p * min(n, p)
        n_simulations = int(np.clip(PA_WORK_BUDGET // max(work, 1.0), PA_MIN_SIMULATIONS, PA_MAX_SIMULATIONS))
    rng = np.random.default_rng(random_state)
    draw = _random_eigenvalues_tall if bartlett else _random_eigenvalues_wide
    simulated = np.empty((n_simulations, n_components))
    for s in range(n_simulations):
        simulated[s] = draw(rng, n, p, means, spreads, scaling, n_components)
    return np.percentile(simulated, quantile, axis=0)


def _observed_column_stats(Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and SD (ddof=1) of the observed cells of each column (0 where undefined), in two
    passes over row blocks (mean, then squared deviations), so no copy of Z is made."""
    n, p = Z.shape
    counts, sums = np.zeros(p), np.zeros(p)
    for start in range(0, n, _CHUNK_ROWS):
        block = Z[start : start + _CHUNK_ROWS]
        observed = ~np.isnan(block)
        counts += observed.sum(axis=0)
        sums += np.where(observed, block, 0.0).sum(axis=0)
    means = np.where(counts > 0, sums / np.maximum(counts, 1), 0.0)
    squares = np.zeros(p)
    for start in range(0, n, _CHUNK_ROWS):
        deviations = Z[start : start + _CHUNK_ROWS] - means
        squares += np.where(np.isnan(deviations), 0.0, deviations * deviations).sum(axis=0)
    spreads = np.sqrt(np.divide(squares, counts - 1, out=np.zeros(p), where=counts > 1))
    return means, spreads


def _wishart_identity(rng, df: int, p: int) -> np.ndarray:
    """One Wishart(df, I_p) matrix by Bartlett's (1933) decomposition W = L L': L lower triangular,
    L_ii = sqrt(chi-square with df - i degrees of freedom), i = 0..p-1, L_ij ~ N(0, 1) for i > j
    (Anderson 2003, section 7.2). Needs df >= p."""
    lower = np.tril(rng.standard_normal((p, p)), -1)
    lower[np.diag_indices(p)] = np.sqrt(rng.chisquare(df - np.arange(p)))
    return lower @ lower.T


def _random_eigenvalues_tall(rng, n, p, means, spreads, scaling, k) -> np.ndarray:
    """Largest k eigenvalues of one preprocessed random normal (n, p) matrix, n - 1 >= p, from its
    Wishart cross-product and column sums (see parallel_analysis)."""
    centred = _wishart_identity(rng, n - 1, p)  # N'HN
    if scaling == "none":
        # R = m + s N, so R'R = S N'N S + S u m' + m u' S + n m m' with N'N = N'HN + u u'/n, u = N'1.
        sums = np.sqrt(n) * rng.standard_normal(p)
        gram = centred + np.outer(sums, sums) / n
        scaled = spreads[:, None] * gram * spreads[None, :]
        cross = np.outer(spreads * sums, means)
        return _gram_eigenvalues(scaled + cross + cross.T + n * np.outer(means, means), n, k)
    factors = _column_factors(np.sqrt(np.clip(np.diag(centred), 0.0, None) / (n - 1)), spreads, scaling)
    return _gram_eigenvalues(factors[:, None] * centred * factors[None, :], n, k)


def _random_eigenvalues_wide(rng, n, p, means, spreads, scaling, k) -> np.ndarray:
    """Largest k eigenvalues of one preprocessed random normal (n, p) matrix drawn in full."""
    N = rng.standard_normal((n, p))
    if scaling == "none":
        R = means + spreads * N
    else:
        centred = N - N.mean(axis=0)
        R = centred * _column_factors(centred.std(axis=0, ddof=1), spreads, scaling)
    return _gram_eigenvalues(R @ R.T if n < p else R.T @ R, n, k)


def _column_factors(random_sd, spreads, scaling) -> np.ndarray:
    if scaling == "center":
        return spreads
    if scaling == "autoscale":
        return 1.0 / random_sd
    return spreads / np.sqrt(random_sd)  # pareto


def ekf_cross_validation(
    Z, max_components, n_folds=MAX_FOLDS, random_state=0, max_rows=CV_MAX_ROWS, centre=True
) -> tuple[np.ndarray, list[str]]:
    """Cumulative cross-validated explained variance for 1..A components (element-wise k-fold).

    Rows go to ``min(n_folds, n)`` folds by a seeded permutation. For each
    fold the remaining rows are centred (by their own column means; not with
    ``centre=False``, for data scaled without centring) and a PCA is fitted
    to them; every observed cell x_ij of a left-out row is then
    predicted from the other observed cells of row i (least-squares scores
    on the loadings without variable j), which gives the residual
    e_ij / (1 - h_ij) (see the module docstring). With PRESS_a the sum of
    squared prediction errors over all predicted cells and PRESS_0 that of
    predicting each cell by its fold's training mean (by 0 without centring), the result for a
    components is 1 - PRESS_a / PRESS_0 (Eastment & Krzanowski 1982;
    Bro et al. 2008, "ekf").

    Missing cells are neither predicted nor used as predictors. With more
    than ``max_rows`` rows a seeded random subset of ``max_rows`` rows is
    used. A is capped at p - 2 and at the numerical rank of every training
    fold: a left-out cell is predicted through scores fitted to the row's
    other p - 1 cells, and with A >= p - 1 components those cells are fitted
    exactly (a square or under-determined system), so nothing checks the
    prediction and its error is amplified without bound (common practice);
    such counts are reported as not estimable.

    Returns
    -------
    cv_explained : ndarray of shape (A',), A' <= max_components (empty when
        cross-validation was impossible)
    notes : list of str explaining subsampling, caps and skipped rows
    """
    Z = np.asarray(Z, dtype=np.float64)
    n, p = Z.shape
    notes: list[str] = []
    rng = np.random.default_rng(random_state)
    # Each fold decomposes an (m x m) Gram matrix of m ~ n training rows built from p columns.
    max_rows = min(int(max_rows), max(200, int(math.sqrt(CV_WORK_BUDGET / (MAX_FOLDS * max(p, 1))))))
    if n > max_rows:
        rows = np.sort(rng.choice(n, size=max_rows, replace=False))
        Z = Z[rows]
        notes.append(f"cross-validation used a random subset of {max_rows} of the {n} samples (seeded)")
        n = max_rows
    n_folds = min(int(n_folds), n)
    limit = min(int(max_components), p - 2)
    if p < 3:
        return np.empty(0), notes + ["cross-validation needs at least 3 variables"]
    if int(max_components) > limit:
        notes.append(f"cross-validated value not estimable from {p - 1} components on: a row's other "
                     f"{p - 1} cells then fix its scores exactly, so nothing checks the prediction")
    if n_folds < 3 or n - int(math.ceil(n / n_folds)) < 3:
        return np.empty(0), notes + ["cross-validation needs at least 4 samples"]
    folds = rng.permutation(n) % n_folds

    fitted = []
    for fold in range(n_folds):
        train = Z[folds != fold]
        offset = _nanmean_or_zero(train) if centre else np.zeros(p)
        loadings = _fold_loadings(train - offset, min(limit, train.shape[0] - 1))
        fitted.append((fold, offset, loadings))
        limit = min(limit, loadings.shape[1])
    if limit < 1:
        return np.empty(0), notes + ["cross-validation found no component it could fit"]
    if limit < max_components:
        notes.append(f"cross-validation covers components 1..{limit}")

    press = np.zeros(limit + 1)
    skipped = 0
    for fold, offset, loadings in fitted:
        part, n_skipped = ekf_press(Z[folds == fold] - offset, loadings[:, :limit])
        press += part
        skipped += n_skipped
    if skipped:
        notes.append(
            f"cross-validation skipped {skipped} sample(s) with fewer than {limit + 1} observed values"
        )
    if press[0] <= 0:
        return np.empty(0), notes + ["cross-validation found no variance to predict"]
    return 1.0 - press[1:] / press[0], notes


def _nanmean_or_zero(X: np.ndarray) -> np.ndarray:
    observed = ~np.isnan(X)
    counts = observed.sum(axis=0)
    return np.where(counts > 0, np.where(observed, X, 0.0).sum(axis=0) / np.maximum(counts, 1), 0.0)


def _fold_loadings(centred: np.ndarray, n_components: int) -> np.ndarray:
    """Orthonormal loadings (p, <=n_components) of centred training rows."""
    if n_components < 1:
        return np.empty((centred.shape[1], 0))
    if np.isnan(centred).any():
        return _incomplete_loadings(centred, n_components)
    n, p = centred.shape
    if n >= p:
        values, vectors = _top_eigh(centred.T @ centred, n_components, vectors=True)
    else:
        values, left = _top_eigh(centred @ centred.T, n_components, vectors=True)
        keep = values > 0
        vectors = np.zeros((p, values.size))
        vectors[:, keep] = (centred.T @ left[:, keep]) / np.sqrt(values[keep])
    kept = min(n_components, numerical_rank(np.clip(values, 0.0, None), n, p))
    return vectors[:, :kept]


def _incomplete_loadings(centred: np.ndarray, n_components: int) -> np.ndarray:
    """Loadings of training rows with missing cells: NIPALS skipping missing cells.

    Each component is fitted by alternating least squares over the observed
    cells only and then deflated, so the first a loadings are those of the
    a-component model, as nested cross-validation needs (Wold 1966; the
    missing-data NIPALS reviewed by Nelson, Taylor & MacGregor 1996). The
    columns are orthonormalised (QR keeps the nested spans).
    """
    observed = ~np.isnan(centred)
    weights = observed.astype(np.float64)
    residual = np.where(observed, centred, 0.0)
    columns = []
    for _ in range(n_components):
        strength = np.einsum("ij,ij->j", residual, residual)
        if strength.max() <= 0:
            break
        scores = residual[:, int(np.argmax(strength))].copy()
        for _ in range(NIPALS_MAX_ITER):
            loading = residual.T @ scores / np.maximum(weights.T @ scores**2, np.finfo(float).tiny)
            loading /= np.linalg.norm(loading)
            updated = residual @ loading / np.maximum(weights @ loading**2, np.finfo(float).tiny)
            converged = np.linalg.norm(updated - scores) <= NIPALS_TOL * np.linalg.norm(updated)
            scores = updated
            if converged:
                break
        columns.append(loading)
        residual -= weights * np.outer(scores, loading)
    if not columns:
        return np.empty((centred.shape[1], 0))
    q, r = np.linalg.qr(np.column_stack(columns))
    kept = int(np.count_nonzero(np.abs(np.diag(r)) > 1e-10))
    return q[:, :kept]


def ekf_press(test: np.ndarray, loadings: np.ndarray) -> tuple[np.ndarray, int]:
    """PRESS for 0..A components over the observed cells of centred left-out rows.

    For each row with observed cells O, Q R = P_O (thin QR) spans the same
    nested column spaces as P_O[:, :a] for every a, so the least-squares fit
    with a components is the sum of the first a terms q_k (q_k' x_O) and the
    hat-matrix diagonal is the cumulative sum of q_k^2.
    """
    n_components = loadings.shape[1]
    press = np.zeros(n_components + 1)
    observed = ~np.isnan(test)
    complete = observed.all(axis=1)
    skipped = 0
    blocks = []
    if complete.any():
        blocks.append((test[complete], loadings))
    for row, mask in zip(test[~complete], observed[~complete]):
        if mask.sum() <= n_components:
            skipped += 1
            continue
        q, r = np.linalg.qr(loadings[mask])
        # A (near) zero R_kk: column k of P_O adds no direction to the fit, so from
        # there on the least-squares fit stays that of the fewer components.
        singular = np.abs(np.diag(r)) <= 1e-10
        if singular.any():
            q[:, int(np.argmax(singular)) :] = 0.0
        blocks.append((row[mask][None, :], q))
    for X, Q in blocks:
        press[0] += np.sum(X**2)
        coefficients = X @ Q  # (m, A)
        fitted = np.zeros_like(X)
        leverage = np.zeros(X.shape[1])
        for a in range(n_components):
            fitted += np.outer(coefficients[:, a], Q[:, a])
            leverage += Q[:, a] ** 2
            denominator = np.maximum(1.0 - leverage, 1e-12)
            press[a + 1] += np.sum(((X - fitted) / denominator) ** 2)
    return press, skipped
