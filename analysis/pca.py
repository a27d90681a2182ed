"""PCAModel: principal component analysis with published diagnostics.

Solvers (all give the same numbers on complete data; checked against LAPACK SVD):

- ``xtx``: eigendecomposition of the p x p matrix X'X, built in row blocks
  without a preprocessed copy of the data (tall data, n >= p);
- ``xxt``: eigendecomposition of the n x n matrix XX' (wide data, n < p);
  loadings follow as X't normalised;
- ``svd``: LAPACK SVD of the preprocessed data (the reference);
- ``auto``: ``xtx`` when n >= p, else ``xxt``.

With missing values (NaN) the model is fitted by iterative PCA imputation:
missing cells start at the column mean, the A-component model is fitted,
missing cells are replaced by the model's estimate, and this repeats until
the estimates stop changing; the mean is re-estimated in every round.
``imputation="regularised"`` (the default; Josse & Husson 2012) shrinks each
component's part of the estimate by (lambda_a - sigma2) / lambda_a, sigma2
the noise variance per cell from the discarded sum of squares, so components
that carry mostly noise cannot chase their own imputations (the over-fitting
that makes the classical method, ``"iterative"``, Walczak & Massart 2001;
Kiers 1997, slow and optimistic when A is too large). The rounds are
accelerated by SQUAREM (Varadhan & Roland 2008). Stopping rule: the RMS
change of the imputed cells in one round is at most IMPUTATION_RTOL times
the RMS of the observed preprocessed cells. The table is completed in
place; each round needs only the A leading eigenvectors. The final fit of
the completed data gives every eigenvalue the data allow (needed by the
SPE limit). Every incomplete sample, training or new, is scored by
projection of its observed values to the model plane (least squares on the
observed variables; Nelson, Taylor & MacGregor 1996), so a training sample
gets the same T2 and SPE when it is checked again later.

Conventions: eigenvalue lambda_a = t_a't_a / (n-1); the explained variance
ratio is relative to the total sum of squares of the preprocessed training
data; in every loading vector the element with the largest absolute value is
positive.

References
----------
Jolliffe, I.T. (2002) Principal Component Analysis, 2nd ed. Springer.
Walczak, B., Massart, D.L. (2001) Dealing with missing data: Part I.
    Chemometrics and Intelligent Laboratory Systems 58, 15-27.
Josse, J., Husson, F. (2012) Handling missing values in exploratory
    multivariate data analysis methods. Journal de la Societe Francaise de
    Statistique 153(2), 79-99.
Kiers, H.A.L. (1997) Weighted least squares fitting using ordinary least
    squares algorithms. Psychometrika 62, 251-266.
Varadhan, R., Roland, C. (2008) Simple and globally convergent methods for
    accelerating the convergence of any EM algorithm. Scandinavian Journal of
    Statistics 35, 335-353.
Nelson, P.R.C., Taylor, P.A., MacGregor, J.F. (1996) Missing data methods in
    PCA and PLS: score calculations with incomplete observations.
    Chemometrics and Intelligent Laboratory Systems 35, 45-65.
"""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd
from scipy import linalg
from scipy.linalg import lapack

from analysis import diagnostics
from analysis.errors import InputError
from analysis.preprocessing import (
    SCALINGS,
    Preprocessor,
    block_buffer,
    block_rows,
    check_log10,
    default_sample_ids,
    row_label,
    scale_block,
    validated,
)

SOLVERS = ("auto", "xtx", "xxt", "svd")
IMPUTATIONS = ("regularised", "iterative")
# Stop when the imputed cells move by less than a millionth of the data's RMS in a round: far below
# the 3-4 significant digits a lab or survey value carries, so the model no longer depends on it.
IMPUTATION_RTOL = 1e-6
IMPUTATION_MAX_ROUNDS = 1000
# P_o'P_o better conditioned than this is solved directly (>= 12 digits); worse goes to lstsq.
PROJECTION_COND_LIMIT = 1e4
SIGN_TIE = 1e-9  # loading magnitudes closer than this are tied for the sign convention
CANCELLATION_GUARD = 1e-4  # SPE below this share of ||z||^2 is recomputed from the residual
RANK_RTOL_FACTOR = 10.0  # eigenvalues below lambda_max * 10 * max(n, p) * eps are rounding noise


class PCAModel:
    """Principal component analysis with T2 / SPE diagnostics.

    Parameters
    ----------
    n_components : int
        Number of components A kept in the model.
    scaling : {"none", "center", "autoscale", "pareto"}
    log10 : sequence of str
        Variables replaced by their base-10 logarithm before scaling.
    solver : {"auto", "xtx", "xxt", "svd"}
    confidence : float
        Default confidence level of the T2 and SPE limits.
    drop_constant : bool
        Drop variables that cannot be scaled (with a warning) instead of
        raising InputError.
    imputation : {"regularised", "iterative"}
        Missing-value method (module docstring).

    Attributes
    ----------
    scores_ : ndarray (n, A)
    loadings_ : ndarray (p, A)            orthonormal columns
    eigenvalues_ : ndarray (r,)           every component the data allow, descending
    explained_variance_ratio_ : ndarray (A,)
    cumulative_explained_ : ndarray (A,)
    total_variance_ : float               total sum of squares / (n-1)
    mean_, scale_, sd_ : ndarray (p,)     centring, divisor, SD (ddof=1) after log10
    t2_, spe_ : ndarray (n,)              training-sample Hotelling's T2 and SPE
    variable_explained_ : ndarray (p,)    share of each variable's sum of squares explained
    sample_ids_, variable_names_, dropped_variables_, feature_names_in_ : list[str]
                                          (default sample ids "1", "2", ... are built on first use)
    warnings_ : list[str]
    solver_ : str                         solver used ("imputation+..." with missing values)
    n_samples_, n_components_, n_missing_, n_iter_ : int   (n_iter_: imputation rounds)
    imputation_ : dict or None            with missing values: method, rounds, tolerance,
                                          achieved (last round's relative RMS change), converged

    References
    ----------
    See the module docstring and analysis.diagnostics.
    """

    def __init__(
        self,
        n_components: int = 2,
        scaling: str = "autoscale",
        log10=(),
        solver: str = "auto",
        confidence: float = 0.95,
        drop_constant: bool = False,
        imputation: str = "regularised",
    ):
        self.n_components = n_components
        self.scaling = scaling
        self.log10 = log10
        self.solver = solver
        self.confidence = confidence
        self.drop_constant = drop_constant
        self.imputation = imputation

    # ------------------------------------------------------------------ fit
    def fit(self, X, sample_ids=None, variable_names=None) -> PCAModel:
        """Fit the model to X (n samples x p variables; ndarray or DataFrame, NaN allowed).

        ``sample_ids`` / ``variable_names`` override a DataFrame's index / columns
        (defaults for arrays: "1", "2", ... and "x1", "x2", ...). On InputError
        the model is left exactly as it was before the call.
        """
        before = dict(self.__dict__)
        try:
            return self._fit(X, sample_ids, variable_names)
        except InputError:
            self.__dict__.clear()
            self.__dict__.update(before)
            raise

    def _fit(self, X, sample_ids, variable_names) -> PCAModel:
        if self.solver not in SOLVERS:
            raise InputError(f"solver={self.solver!r} is not one of {', '.join(SOLVERS)}")
        if self.scaling not in SCALINGS:
            raise InputError(f"scaling={self.scaling!r} is not one of {', '.join(SCALINGS)}")
        if self.imputation not in IMPUTATIONS:
            raise InputError(f"imputation={self.imputation!r} is not one of {', '.join(IMPUTATIONS)}")
        diagnostics.check_confidence(self.confidence)
        a = self.n_components
        if isinstance(a, bool) or not isinstance(a, (int, np.integer)) or a < 1:
            raise InputError(f"n_components={a!r} must be a whole number of at least 1")
        a = int(a)
        values, ids, names, complete, column_sums = validated(X, sample_ids, variable_names, default_ids=False)
        n = values.shape[0]
        if n < 2:
            raise InputError(f"at least 2 samples are needed, got {n}")

        missing = None if complete else np.isnan(values)
        n_missing = 0 if missing is None else int(missing.sum())
        n, p = values.shape
        solver = self.solver if self.solver != "auto" else ("xtx" if n >= p else "xxt")
        # Tall complete data: the centred cross-product comes out of the moments pass.
        fused = not n_missing and solver == "xtx" and self.scaling != "none"
        prep = Preprocessor(self.scaling, self.log10, self.drop_constant).fit(
            values, ids, names, gram=fused, column_sums=column_sums
        )
        if prep.dropped_variables_:
            values = values[:, prep.keep_]
            if missing is not None:
                missing = missing[:, prep.keep_]
                n_missing = int(missing.sum())
        if n_missing:
            empty = np.flatnonzero(missing.all(axis=1))
            if empty.size:
                raise InputError(f"sample(s) with no values: {', '.join(row_label(ids, i) for i in empty[:10])}")

        self.feature_names_in_ = names
        if ids is None:
            self.__dict__.pop("sample_ids_", None)  # row numbers, built on first use
        else:
            self.sample_ids_ = ids
        self.variable_names_ = prep.variable_names_
        self.dropped_variables_ = prep.dropped_variables_
        self.warnings_ = list(prep.warnings_)
        self.mean_, self.scale_, self.sd_ = prep.mean_, prep.scale_, prep.sd_
        self.n_samples_ = n
        self.n_missing_ = n_missing
        self.n_iter_ = 0
        self.imputation_ = None
        p = values.shape[1]
        limit = min(n - 1, p) if self.scaling != "none" else min(n, p)
        if a > limit:
            raise InputError(
                f"n_components={a} exceeds the {limit} components {n} samples and {p} variables allow"
            )

        if n_missing:
            z = self.preprocess(values)
            self._impute(z, missing, a, solver)
            fit = _decompose_full(z, solver)
            self.solver_ = f"imputation+{solver}"
        elif fused:
            fit = _from_gram_features(prep.gram_ / np.outer(self.scale_, self.scale_), n)
            self.solver_ = solver
        elif solver == "xtx":
            fit = _decompose_xtx_blocks(values, self._log_mask(), self.mean_, self.scale_)
            self.solver_ = solver
        else:
            fit = _decompose_full(self.preprocess(values), solver)
            self.solver_ = solver

        eig = fit.eigenvalues
        rank = numerical_rank(eig, n, p, centred=self.scaling != "none")
        if a > rank:
            raise InputError(
                f"n_components={a} exceeds the rank of the preprocessed data ({rank} components allowed)"
            )
        loadings = _sign_convention(fit.loadings(a))
        if n_missing:
            z[missing] = np.nan  # score the observed values, as for a new sample
            scores = _project(z, loadings)
            z -= scores @ loadings.T
            residual_ss = diagnostics.spe_contributions(z).sum(axis=1)
        else:
            scores, residual_ss = _scores_and_spe_blocks(
                values, self._log_mask(), self.mean_, self.scale_, loadings, complete=True
            )
        if a == rank:
            residual_ss[:] = 0.0  # nothing discarded: the training data are reproduced exactly
        eigenvalues = eig[:rank].copy()
        eigenvalues[:a] = np.einsum("ia,ia->a", scores, scores) / (n - 1)

        self.n_components_ = a
        self.loadings_ = loadings
        self.scores_ = scores
        self.eigenvalues_ = eigenvalues
        self.total_variance_ = float(fit.total_ss / (n - 1))
        self.explained_variance_ratio_ = eigenvalues[:a] / self.total_variance_
        self.cumulative_explained_ = np.cumsum(self.explained_variance_ratio_)
        explained_ss = (loadings**2) @ (eigenvalues[:a] * (n - 1))
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(fit.column_ss > 0, explained_ss / fit.column_ss, 0.0)
        self.variable_explained_ = np.clip(share, 0.0, 1.0)
        self.t2_ = diagnostics.hotelling_t2(scores, eigenvalues)
        self.spe_ = residual_ss
        return self

    @functools.cached_property
    def sample_ids_(self) -> list[str]:
        """Training sample ids. Fitted without ids, the row numbers "1", "2", ... are built
        here on first use (fit stores given ids directly, which this then never overrides)."""
        if "n_samples_" not in self.__dict__:
            raise AttributeError("sample_ids_ is set by fit")
        return default_sample_ids(self.n_samples_)

    def _impute(self, z: np.ndarray, missing: np.ndarray, a: int, solver: str) -> None:
        """Complete the preprocessed z in place by (regularised) iterative PCA imputation and
        centre it; the completed-data mean goes into ``mean_`` (module docstring).

        One round maps the imputed values x to the model's estimate F(x). Only those cells
        change, so the column means follow from x and the centring stays implicit (z holds
        values centred on the observed means: no digits cancel); the table is written only at
        the imputed cells. The rounds are accelerated by SQUAREM (Varadhan & Roland 2008,
        scheme S3): two rounds give r = F(x) - x and v = F(F(x)) - 2F(x) + x, the next x is
        x - 2 alpha r + alpha^2 v with alpha = min(-|r| / |v|, -1); an extrapolation that makes
        the change grow tenfold is dropped for the plain second round.
        """
        centred = self.scaling != "none"
        n, p = z.shape
        rows, cols = np.nonzero(missing)
        cells = np.ravel_multi_index((rows, cols), z.shape)
        np.put(z, cells, 0.0)
        observed_sum = z.sum(axis=0)
        x = np.nanmean(np.where(missing, np.nan, z), axis=0)[cols]  # start: the observed column means
        observed_ss = np.einsum("ij,ij->", z, z) - (observed_sum @ observed_sum) / n if centred else \
            np.einsum("ij,ij->", z, z)
        observed_rms = max(np.sqrt(observed_ss / (z.size - cells.size)), np.finfo(float).tiny)
        # Degrees of freedom of the residual (Josse & Husson 2012, section 3.2): (n - 1 - A)(p - A).
        df = (n - int(centred) - a) * (p - a)
        regularised = self.imputation == "regularised" and df > 0

        def estimate(values: np.ndarray) -> np.ndarray:
            np.put(z, cells, values)
            m = (observed_sum + np.bincount(cols, weights=values, minlength=p)) / n if centred else np.zeros(p)
            top, loadings, total_ss = _leading_components(z, m, a, solver)
            t = z @ loadings
            t -= m @ loadings
            if regularised:
                sigma2_n = n * max(total_ss - top.sum(), 0.0) / df  # n * noise variance per cell
                with np.errstate(divide="ignore", invalid="ignore"):
                    t *= np.clip(np.where(top > 0, 1.0 - sigma2_n / top, 0.0), 0.0, 1.0)
            return np.einsum("ia,ia->i", t[rows], loadings[cols]) + m[cols]

        def relative_rms(change: np.ndarray) -> float:
            return float(np.sqrt(np.mean(change**2)) / observed_rms)

        rounds, achieved, previous, fallback = 0, np.inf, np.inf, None
        while rounds < IMPUTATION_MAX_ROUNDS:
            x1 = estimate(x)
            rounds += 1
            r = x1 - x
            achieved = relative_rms(r)
            if fallback is not None and achieved > 10 * previous:  # the extrapolation went astray
                x, fallback = fallback, None
                continue
            x = x1
            if achieved <= IMPUTATION_RTOL or rounds == IMPUTATION_MAX_ROUNDS:
                break
            x2 = estimate(x1)
            rounds += 1
            v = x2 - 2 * x1 + (x1 - r)
            norm_v = np.sqrt(v @ v)
            previous, fallback = relative_rms(x2 - x1), x2
            if norm_v == 0 or not np.isfinite(norm_v):
                x, fallback = x2, None
                continue
            alpha = min(-np.sqrt(r @ r) / norm_v, -1.0)
            x = (x1 - r) - 2 * alpha * r + alpha**2 * v
        np.put(z, cells, x)
        converged = achieved <= IMPUTATION_RTOL
        self.n_iter_ = rounds
        self.imputation_ = {"method": self.imputation, "rounds": rounds, "tolerance": IMPUTATION_RTOL,
                            "achieved": achieved, "converged": converged}
        if not converged:
            self.warnings_.append(
                f"missing-value imputation did not converge: after {rounds} rounds the imputed cells still "
                f"moved by {achieved:.1e} of the data's RMS per round (tolerance {IMPUTATION_RTOL:.0e}); "
                "the model may depend on where the imputation started. Fewer components or fewer "
                "missing cells help."
            )
        if centred:
            shift = z.mean(axis=0)
            z -= shift
            # Keep transform() consistent: new data are centred on the completed-data mean.
            self.mean_ = self.mean_ + shift * self.scale_

    # ------------------------------------------------------------- new data
    def _log_mask(self) -> np.ndarray:
        log10 = [self.log10] if isinstance(self.log10, str) else [str(v) for v in self.log10]
        return np.isin(np.asarray(self.variable_names_, dtype=object), log10)

    def _matrix(self, X) -> tuple[np.ndarray, list[str] | None, bool]:
        """Raw values of X in the model's variable order, sample ids (None for arrays) and completeness."""
        if isinstance(X, pd.Series):
            X = X.to_frame().T
        if isinstance(X, pd.DataFrame):
            columns = [str(c) for c in X.columns]
            absent = [v for v in self.variable_names_ if v not in columns]
            if absent:
                raise InputError(f"variable(s) missing from the data: {', '.join(absent[:10])}")
            label = dict(zip(columns, X.columns))
            frame = X[[label[v] for v in self.variable_names_]]
            values, ids, _, complete, _ = validated(frame, variable_names=self.variable_names_)
            return values, ids, complete
        values = np.asarray(X, dtype=np.float64) if not isinstance(X, np.ndarray) else X
        if values.ndim == 1:
            values = values[None, :]
        p_model = len(self.variable_names_)
        p_input = len(self.feature_names_in_)
        if values.ndim != 2 or values.shape[1] not in (p_model, p_input):
            raise InputError(
                f"data have {values.shape[-1]} columns; the model expects {p_model}"
                + (f" (or the {p_input} it was fitted on)" if p_input != p_model else "")
            )
        names = self.variable_names_ if values.shape[1] == p_model else self.feature_names_in_
        values, ids, _, complete, _ = validated(values, variable_names=names, default_ids=False)
        if values.shape[1] != p_model:
            keep = [names.index(v) for v in self.variable_names_]
            values = values[:, keep]
            complete = complete or not np.isnan(values).any()
        return values, ids, complete

    def _one_row(self, x) -> np.ndarray:
        if isinstance(x, pd.DataFrame) and len(x) != 1:
            raise InputError(f"expected one sample, got {len(x)}")
        values, _, _ = self._matrix(x)
        if values.shape[0] != 1:
            raise InputError(f"expected one sample, got {values.shape[0]}")
        return values

    def preprocess(self, X) -> np.ndarray:
        """log10, centring and scaling learned at fit, applied to X (NaN kept) -> (m, p)."""
        values, ids, _ = self._matrix(X)
        log_mask = self._log_mask()
        check_log10(values, log_mask, ids, self.variable_names_)
        return scale_block(values, log_mask, self.mean_, self.scale_)

    def _scores_of(self, z: np.ndarray) -> np.ndarray:
        """Scores of preprocessed rows; incomplete rows by projection to the model plane."""
        return _project(z, self.loadings_)

    def _scores_and_spe(self, X) -> tuple[np.ndarray, np.ndarray]:
        """Scores (m, A) and SPE (m,) of new samples, computed in row blocks (no full copy)."""
        values, ids, complete = self._matrix(X)
        log_mask = self._log_mask()
        check_log10(values, log_mask, ids, self.variable_names_)
        return _scores_and_spe_blocks(values, log_mask, self.mean_, self.scale_, self.loadings_, complete)

    def transform(self, X) -> np.ndarray:
        """Scores (m, A) of new samples; incomplete rows by projection to the model plane."""
        return self._scores_and_spe(X)[0]

    def residuals(self, X) -> np.ndarray:
        """Residuals z - t P' in preprocessed units (m, p); NaN where the input is missing."""
        z = self.preprocess(X)
        return z - self._scores_of(z) @ self.loadings_.T

    def reconstruct(self, X) -> np.ndarray:
        """Model estimate of X (m, p) in original units (log10 undone)."""
        zhat = self.transform(X) @ self.loadings_.T
        out = zhat * self.scale_ + self.mean_
        log_mask = self._log_mask()
        out[:, log_mask] = 10.0 ** out[:, log_mask]
        return out

    def hotelling_t2(self, X) -> np.ndarray:
        """Hotelling's T2 (m,) of the samples in X."""
        return diagnostics.hotelling_t2(self.transform(X), self.eigenvalues_)

    def spe(self, X) -> np.ndarray:
        """SPE (m,): sum of squared residuals over the observed variables."""
        return self._scores_and_spe(X)[1]

    def diagnose(self, X) -> dict:
        """Scores, T2 and SPE of new samples in one pass, with the new-sample T2 limit and SPE limit."""
        scores, spe = self._scores_and_spe(X)
        return {
            "scores": scores,
            "t2": diagnostics.hotelling_t2(scores, self.eigenvalues_),
            "spe": spe,
            "t2_limit": self.t2_limit(new=True),
            "spe_limit": self.spe_limit(),
        }

    # --------------------------------------------------------------- limits
    def t2_limit(self, confidence=None, new: bool = False) -> float:
        """T2 limit: training samples (beta, Tracy et al. 1992) or new samples (F, ``new=True``)."""
        conf = self.confidence if confidence is None else confidence
        return diagnostics.t2_limit(self.n_samples_, self.n_components_, conf, new=new)

    def spe_limit(self, confidence=None, method: str = "jackson-mudholkar") -> float:
        """SPE limit from the discarded eigenvalues (Jackson & Mudholkar 1979, or Box 1954)."""
        conf = self.confidence if confidence is None else confidence
        return diagnostics.spe_limit(self.eigenvalues_[self.n_components_ :], conf, method)

    # -------------------------------------------------------- contributions
    def _filled_row(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(z with missing cells replaced by the model estimate, residual with NaN there)."""
        t = self._scores_of(z[None, :])[0]
        estimate = self.loadings_ @ t
        missing = np.isnan(z)
        filled = np.where(missing, estimate, z)
        residual = z - estimate
        if self.n_components_ == len(self.variable_names_):
            residual = np.where(missing, np.nan, 0.0)
        return filled, residual

    def contributions(self, x, kind: str = "spe") -> np.ndarray:
        """Per-variable contributions (p,) of one raw row x to its SPE or T2.

        SPE: squared residuals. T2: c_j = sum_a (t_a/lambda_a) p_ja z_j
        (Westerhuis, Gurden & Smilde 2000). Missing cells take the model's
        estimate, so the contributions sum to the row's SPE / T2.
        """
        if kind not in ("spe", "t2"):
            raise InputError(f"kind={kind!r} must be 'spe' or 't2'")
        z = self.preprocess(self._one_row(x))[0]
        filled, residual = self._filled_row(z)
        if kind == "spe":
            return diagnostics.spe_contributions(residual)
        return diagnostics.t2_contributions(filled, self.loadings_, self.eigenvalues_)


class _Decomposition:
    """Eigenvalues (descending, clipped at 0, divided by n-1) and a way to get A loadings."""

    def __init__(self, eigenvalues, loadings_fn, total_ss, column_ss):
        self.eigenvalues = eigenvalues
        self.loadings = loadings_fn
        self.total_ss = total_ss
        self.column_ss = column_ss


def _project(z: np.ndarray, loadings: np.ndarray) -> np.ndarray:
    """Scores of preprocessed rows z; incomplete rows by projection to the model plane.

    Nelson, Taylor & MacGregor (1996): t = (P_o'P_o)^+ P_o'z_o over the observed
    variables. P_o'P_o = P'P - P_m'P_m is built for all incomplete rows at once from
    the missing variables and solved in one batch; rows where it is ill-conditioned
    (PROJECTION_COND_LIMIT) are solved by least squares on P_o.
    """
    if np.isfinite(z.sum()):
        return z @ loadings
    missing = np.isnan(z)
    rows = np.flatnonzero(missing.any(axis=1))
    if missing[rows].all(axis=1).any():
        raise InputError("a sample with no values cannot be scored")
    scores = np.where(missing, 0.0, z) @ loadings  # P_o'z_o for every row
    a = loadings.shape[1]
    outer = (loadings[:, :, None] * loadings[:, None, :]).reshape(loadings.shape[0], a * a)
    full_gram = loadings.T @ loadings
    # With orthonormal loadings P_o'P_o = I - P_m'P_m, and lambda_max(P_m'P_m) <= trace(P_m'P_m),
    # so a small sum of the missing variables' squared loadings proves the row well conditioned.
    orthonormal = np.allclose(full_gram, np.eye(a), rtol=0, atol=1e-10)
    trace_missing = missing[rows] @ np.einsum("ja,ja->j", loadings, loadings) if orthonormal else None
    step = max(1, 2**22 // (a * a))  # about 32 MB of a x a matrices per block
    for start in range(0, rows.size, step):
        block = rows[start : start + step]
        gram = full_gram[None] - (missing[block] @ outer).reshape(-1, a, a)
        if orthonormal:
            good = trace_missing[start : start + step] <= 1.0 - 1.0 / PROJECTION_COND_LIMIT
        else:
            good = np.zeros(block.size, dtype=bool)
        unsure = np.flatnonzero(~good)
        if unsure.size:
            eig = np.linalg.eigvalsh(gram[unsure])
            good[unsure] = eig[:, 0] * PROJECTION_COND_LIMIT > eig[:, -1]
        solved = block[good]
        scores[solved] = np.linalg.solve(gram[good], scores[solved][:, :, None])[:, :, 0]
        for i in block[~good]:
            obs = ~missing[i]
            scores[i] = np.linalg.lstsq(loadings[obs], z[i, obs], rcond=None)[0]
    return scores


def _leading_components(z: np.ndarray, m: np.ndarray, a: int, solver: str):
    """The A largest eigen-sums of squares (descending) of z - 1m', their loadings and the total
    sum of squares; z complete and preprocessed, m its column means (zeros: no centring). Only A
    eigenvectors are computed (``scipy.linalg.eigh`` with ``subset_by_index``)."""
    n, p = z.shape
    if solver == "svd":  # the reference: LAPACK SVD of the explicitly centred table
        _, s, vt = np.linalg.svd(z - m, full_matrices=False)
        return s[:a] ** 2, vt[:a].T, float(np.sum(s**2))
    if solver == "xtx":
        gram = z.T @ z
        gram -= n * np.outer(m, m)
        w, v = linalg.eigh(gram, subset_by_index=[p - a, p - 1])
        return np.clip(w[::-1], 0.0, None), v[:, ::-1], float(np.trace(gram))
    # (z - 1m')(z - 1m')' = zz' - r1' - 1r' + (m'm) 11' with r = zm
    gram = z @ z.T
    r = z @ m
    gram -= r[:, None]
    gram -= r[None, :]
    gram += m @ m
    w, u = linalg.eigh(gram, subset_by_index=[n - a, n - 1])
    u = u[:, ::-1]
    p_a = z.T @ u - np.outer(m, u.sum(axis=0))
    p_a /= np.maximum(np.linalg.norm(p_a, axis=0), np.finfo(float).tiny)
    return np.clip(w[::-1], 0.0, None), p_a, float(np.trace(gram))


def _scores_and_spe_blocks(values, log_mask, mean, scale, loadings, complete: bool):
    """Scores (m, A) and SPE (m,) of raw rows, one row block at a time in one reused buffer.

    Complete blocks: t = zP and SPE = ||z||^2 - ||t||^2 (P has orthonormal
    columns), recomputed from the explicit residual z - tP' for rows where
    that difference would lose digits to cancellation. Incomplete rows:
    scores by projection to the model plane, SPE over the observed variables.
    With as many components as variables the residual is 0.
    """
    m, p = values.shape
    a = loadings.shape[1]
    loadings = np.asfortranarray(loadings)  # column-major P: OpenBLAS multiplies z @ P a little faster
    scores = np.empty((m, a))
    spe = np.zeros(m)
    step = block_rows(p)
    buffer = block_buffer(values, step)
    for start in range(0, m, step):
        raw = values[start : start + step]
        stop = start + raw.shape[0]
        z = scale_block(raw, log_mask, mean, scale, out=buffer[: raw.shape[0]])
        if complete or np.isfinite(z.sum()):
            t = np.matmul(z, loadings, out=scores[start:stop])
            if a < p:
                spe[start:stop] = _residual_norms(z, t, loadings)
        else:
            t = scores[start:stop] = _project(z, loadings)
            if a < p:
                z -= t @ loadings.T
                spe[start:stop] = diagnostics.spe_contributions(z).sum(axis=1)
    return scores, spe


def _residual_norms(z: np.ndarray, t: np.ndarray, loadings: np.ndarray) -> np.ndarray:
    """||z - tP'||^2 per row as ||z||^2 - ||t||^2, explicit where fewer than 4 digits would survive."""
    total = np.einsum("ij,ij->i", z, z)
    q = total - np.einsum("ia,ia->i", t, t)
    fragile = q < CANCELLATION_GUARD * total
    if fragile.any():
        e = z[fragile] - t[fragile] @ loadings.T
        q[fragile] = np.einsum("ij,ij->i", e, e)
    return q


def _decompose_xtx_blocks(values, log_mask, mean, scale) -> _Decomposition:
    """Eigendecomposition of Z'Z accumulated over row blocks of the preprocessed data (one reused buffer)."""
    n, p = values.shape
    step = block_rows(p)
    buffer = block_buffer(values, step)
    gram = np.zeros((p, p))
    for start in range(0, n, step):
        raw = values[start : start + step]
        block = scale_block(raw, log_mask, mean, scale, out=buffer[: raw.shape[0]])
        gram += block.T @ block
    return _from_gram_features(gram, n)


def _from_gram_features(gram: np.ndarray, n: int) -> _Decomposition:
    w, v = np.linalg.eigh(gram)
    w, v = np.clip(w[::-1], 0.0, None), v[:, ::-1]
    return _Decomposition(w / (n - 1), lambda a: v[:, :a].copy(), float(np.trace(gram)), np.diag(gram).copy())


# LAPACK through numpy (syevd for eigh, gesdd for svd) and scipy (dsytrd, dstebz / dstein for the
# wide solver's partial eigendecomposition).
def _decompose_full(z: np.ndarray, solver: str) -> _Decomposition:
    """Decompose the preprocessed, complete matrix z with the named solver."""
    n, p = z.shape
    column_ss = np.einsum("ij,ij->j", z, z)
    total_ss = float(column_ss.sum())
    if solver == "xtx":
        return _from_gram_features(z.T @ z, n)
    if solver == "svd":
        _, s, vt = np.linalg.svd(z, full_matrices=False)
        return _Decomposition(s**2 / (n - 1), lambda a: vt[:a].T.copy(), total_ss, column_ss)
    # xxt: eigenvectors u of ZZ' give loadings Z'u / ||Z'u|| (= Z'u / sigma).
    w, leading = _partial_eigh(z @ z.T)

    def loadings(a: int) -> np.ndarray:
        p_a = z.T @ leading(a)
        return p_a / np.linalg.norm(p_a, axis=0)

    return _Decomposition(w / (n - 1), loadings, total_ss, column_ss)


def _partial_eigh(gram: np.ndarray):
    """Every eigenvalue of the symmetric ``gram`` (descending, clipped at 0) and a function giving
    its k leading eigenvectors, from one Householder tridiagonalisation (LAPACK dsytrd).

    The eigenvalues come from the tridiagonal matrix alone (``scipy.linalg.eigh_tridiagonal``),
    the k eigenvectors by bisection and inverse iteration on it (LAPACK dstebz / dstein), carried
    back with the Householder reflectors; so the cost of all n eigenvectors (syevd's
    back-transformation and divide and conquer) is never paid. Each vector is checked by its
    residual ||G u - lambda u|| <= 100 n eps lambda_max; one that fails sends the call to the
    full LAPACK solver, so the result is as exact as numpy.linalg.eigh (Golub & Van Loan 2013,
    Matrix Computations, 4th ed., sections 8.3-8.4).
    """
    n = gram.shape[0]
    lwork = int(lapack.dsytrd_lwork(n, lower=1)[0])
    reflectors, diagonal, off, tau, info = lapack.dsytrd(gram, lower=1, lwork=lwork)
    if info != 0:
        w, u = np.linalg.eigh(gram)
        return np.clip(w[::-1], 0.0, None), lambda k: u[:, ::-1][:, :k].copy()
    w = np.clip(linalg.eigh_tridiagonal(diagonal, off, eigvals_only=True)[::-1], 0.0, None)
    reflectors = np.asfortranarray(reflectors)

    def leading(k: int) -> np.ndarray:
        values, y = linalg.eigh_tridiagonal(diagonal, off, select="i", select_range=(n - k, n - 1))
        values, y = values[::-1], y[:, ::-1].copy()
        for i in range(n - 2, -1, -1):  # y <- H(0) ... H(n-2) y, H(i) = I - tau_i v v'
            v = reflectors[i + 1 :, i].copy()
            v[0] = 1.0
            y[i + 1 :] -= tau[i] * np.outer(v, v @ y[i + 1 :])
        residual = np.linalg.norm(gram @ y - y * values, axis=0)
        if residual.max(initial=0.0) > 100 * n * np.finfo(float).eps * max(w[0], np.finfo(float).tiny):
            return np.linalg.eigh(gram)[1][:, ::-1][:, :k].copy()
        return y

    return w, leading


def numerical_rank(eigenvalues: np.ndarray, n: int, p: int, centred: bool = True) -> int:
    """Components above rounding level: lambda > lambda_max * 10 * max(n, p) * eps.

    ``eigenvalues`` descending, of data with n rows and p columns (``centred``:
    one degree of freedom went to the mean). The Gram-matrix solvers resolve
    eigenvalues only to a few times eps * lambda_max, so the same tolerance is
    used on every solver, and by analysis.rank, to give the same count
    (common practice; cf. numpy.linalg.matrix_rank).
    """
    if eigenvalues.size == 0 or eigenvalues[0] <= 0:
        return 0
    tol = eigenvalues[0] * RANK_RTOL_FACTOR * max(n, p) * np.finfo(float).eps
    rank = int(np.sum(eigenvalues > tol))
    return min(rank, n - 1 if centred else n, p)


def _sign_convention(loadings: np.ndarray) -> np.ndarray:
    """Flip each loading vector so that its largest-magnitude element is positive.

    Elements within SIGN_TIE of the largest magnitude count as tied and the
    first of them decides, so rounding differences between solvers cannot
    change the choice (e.g. the exact ties of two autoscaled variables).
    """
    magnitude = np.abs(loadings)
    tied = magnitude >= magnitude.max(axis=0) - SIGN_TIE
    idx = np.argmax(tied, axis=0)
    signs = np.sign(loadings[idx, np.arange(loadings.shape[1])])
    signs[signs == 0] = 1.0
    return loadings * signs
