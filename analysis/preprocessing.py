"""Preprocessing: optional log10 per variable, then centring and scaling.

Everything is learned from the training data (``fit``) and re-applied unchanged
to new data (``transform``). Means and standard deviations ignore missing
values (NaN) and use ddof=1.

Scaling methods (van den Berg et al. 2006, BMC Genomics 7:142, compare them):

- ``none``: values as they are;
- ``center``: subtract the mean;
- ``autoscale``: subtract the mean, divide by the standard deviation;
- ``pareto``: subtract the mean, divide by the square root of the standard deviation.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from analysis.errors import InputError

SCALINGS = ("none", "center", "autoscale", "pareto")

def default_variable_names(p: int) -> list[str]:
    """Names used when the data come without column names: x1, x2, ..."""
    return [f"x{j + 1}" for j in range(p)]


def default_sample_ids(n: int) -> list[str]:
    """Ids used when the data come without sample ids: row numbers counted from 1."""
    return list(map(str, range(1, n + 1)))


def row_label(sample_ids, i: int) -> str:
    """The sample id of row i, or its row number counted from 1 when there are no ids."""
    return str(i + 1) if sample_ids is None else sample_ids[i]


def as_matrix(X, sample_ids=None, variable_names=None, default_ids=True):
    """Validate input and return (float64 matrix, sample ids, variable names); see ``validated``."""
    values, sample_ids, variable_names, _ = validated(X, sample_ids, variable_names, default_ids)
    return values, sample_ids, variable_names


def validated(X, sample_ids=None, variable_names=None, default_ids=True):
    """Validate input: (float64 matrix, sample ids, variable names, complete).

    ``complete`` is True when no value is missing. ``X`` is an ndarray or a
    DataFrame (index gives the sample ids and columns the variable names
    unless given explicitly). NaN marks a missing value; infinite or
    non-numeric values are an InputError naming row and column.
    With ``default_ids=False`` an ndarray without ids gets None instead of a
    list of row numbers (messages still name the row number).
    """
    if isinstance(X, pd.DataFrame):
        if sample_ids is None:
            sample_ids = [str(s) for s in X.index]
        if variable_names is None:
            variable_names = [str(c) for c in X.columns]
        try:
            values = X.to_numpy(dtype=np.float64)
        except (TypeError, ValueError) as exc:
            bad = [str(c) for c in X.columns if not pd.api.types.is_numeric_dtype(X[c])]
            raise InputError(f"non-numeric variable(s): {', '.join(bad[:10]) or exc}") from exc
    else:
        try:
            values = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"data must be numeric: {exc}") from exc
    if values.ndim != 2:
        raise InputError(f"data must be a 2-D table (samples x variables), got {values.ndim} dimension(s)")
    n, p = values.shape
    if sample_ids is not None:
        sample_ids = [str(s) for s in sample_ids]
    elif default_ids:
        sample_ids = default_sample_ids(n)
    variable_names = default_variable_names(p) if variable_names is None else [str(v) for v in variable_names]
    if sample_ids is not None and len(sample_ids) != n:
        raise InputError(f"{len(sample_ids)} sample ids given for {n} rows")
    if len(variable_names) != p:
        raise InputError(f"{len(variable_names)} variable names given for {p} columns")
    if len(set(variable_names)) != p:
        dup = sorted({v for v in variable_names if variable_names.count(v) > 1})
        raise InputError(f"duplicate variable name(s): {', '.join(dup[:10])}")
    # A finite total means every value is finite (fast path: no n x p temporary).
    complete = bool(np.isfinite(values.sum()))
    if not complete and np.isinf(values).any():
        i, j = np.argwhere(np.isinf(values))[0]
        raise InputError(
            f"infinite value {values[i, j]} in variable {variable_names[j]!r}, sample {row_label(sample_ids, i)!r}"
        )
    if not complete:
        complete = not np.isnan(values).any()  # a finite-valued sum can still overflow
    return values, sample_ids, variable_names, complete


def check_log10(values: np.ndarray, log_mask: np.ndarray, sample_ids, variable_names) -> None:
    """Raise InputError for the first non-positive value in a log10 variable."""
    if not log_mask.any():
        return
    sub = values[:, log_mask]
    bad = sub <= 0  # NaN compares False: missing stays missing
    if bad.any():
        i, k = np.argwhere(bad)[0]
        j = np.flatnonzero(log_mask)[k]
        raise InputError(
            f"log10 needs positive values: variable {variable_names[j]!r}, sample {row_label(sample_ids, i)!r} "
            f"has {values[i, j]:g}"
        )


class Preprocessor:
    """log10 (chosen variables), centring and scaling learned on training data.

    Parameters
    ----------
    scaling : {"none", "center", "autoscale", "pareto"}
    log10 : sequence of str
        Variables to replace by their base-10 logarithm before centring.
    drop_constant : bool
        When False (default) a constant variable is an InputError naming it
        if the scaling divides by the SD (autoscale, pareto) and is kept
        otherwise; when True every constant variable is dropped with a warning.

    Attributes
    ----------
    mean_ : ndarray (p,)   subtracted after log10 (0 for ``none``)
    sd_ : ndarray (p,)     standard deviation (ddof=1) after log10, for every scaling
    scale_ : ndarray (p,)  divisor after centring (1, sd or sqrt(sd))
    log_mask_ : ndarray of bool (p,)
    variable_names_ : list[str]   variables kept
    dropped_variables_ : list[str]
    warnings_ : list[str]
    """

    def __init__(self, scaling: str = "autoscale", log10: Sequence[str] = (), drop_constant: bool = False):
        self.scaling = scaling
        self.log10 = log10
        self.drop_constant = drop_constant

    def fit(
        self, values: np.ndarray, sample_ids: list[str], variable_names: list[str], gram: bool = False
    ) -> Preprocessor:
        """Learn log10 mask, means and scales from ``values`` (n, p); NaN ignored.

        With ``gram=True`` (complete data only) the same pass also accumulates
        ``gram_``, the p x p cross-product of the centred, unscaled kept
        variables, from which a PCA of tall data needs no further pass.
        """
        if self.scaling not in SCALINGS:
            raise InputError(f"scaling={self.scaling!r} is not one of {', '.join(SCALINGS)}")
        log10 = [self.log10] if isinstance(self.log10, str) else [str(v) for v in self.log10]
        unknown = [v for v in log10 if v not in variable_names]
        if unknown:
            raise InputError(f"log10 variable(s) not in the data: {', '.join(unknown[:10])}")
        log_mask = np.isin(np.asarray(variable_names, dtype=object), log10)
        check_log10(values, log_mask, sample_ids, variable_names)

        mean, sd, n_obs, cross = column_moments(values, log_mask, gram=gram)
        too_few = n_obs < 2
        constant = ~too_few & (sd <= 64 * np.finfo(float).eps * np.abs(mean))
        # Only scalings that divide by the SD are broken by a constant variable; when
        # dropping is allowed, constant variables go whatever the scaling (they carry nothing).
        divides = self.scaling in ("autoscale", "pareto")
        bad = too_few | (constant & (divides or self.drop_constant))
        self.warnings_ = []
        names = np.asarray(variable_names, dtype=object)
        if bad.any():
            described = [
                f"{v} ({'fewer than 2 values' if few else 'constant'})"
                for v, few in zip(names[bad], too_few[bad])
            ]
            if not self.drop_constant:
                raise InputError(
                    f"variable(s) that cannot be scaled: {', '.join(described[:10])}"
                    + (f" and {len(described) - 10} more" if len(described) > 10 else "")
                    + "; remove them or allow dropping constant variables"
                )
            self.warnings_.append(f"dropped variable(s) that cannot be scaled: {', '.join(described)}")
        keep = ~bad
        if not keep.any():
            raise InputError("no variable is left after dropping constant variables")
        self.keep_ = keep
        self.input_variables_ = list(variable_names)
        self.variable_names_ = [str(v) for v in names[keep]]
        self.dropped_variables_ = [str(v) for v in names[bad]]
        self.log_mask_ = log_mask[keep]
        self.gram_ = cross[np.ix_(keep, keep)] if cross is not None else None
        self.sd_ = sd[keep]
        if self.scaling == "none":
            self.mean_ = np.zeros(keep.sum())
        else:
            self.mean_ = mean[keep]
        if self.scaling == "autoscale":
            self.scale_ = self.sd_.copy()
        elif self.scaling == "pareto":
            self.scale_ = np.sqrt(self.sd_)
        else:
            self.scale_ = np.ones(keep.sum())
        return self


def has_missing(values: np.ndarray) -> bool:
    """True when ``values`` (already checked for infinities) holds a NaN."""
    return not np.isfinite(values.sum()) and bool(np.isnan(values).any())


def block_rows(p: int) -> int:
    """Rows per block: about 8 MB of float64 per block, enough for efficient BLAS calls
    while the block stays far smaller than the data."""
    return max(256, (1 << 20) // max(p, 1))


def column_moments(values: np.ndarray, log_mask: np.ndarray, gram: bool = False):
    """Mean, SD (ddof=1), number of observed values per column after log10, and
    (``gram=True``, complete data) the cross-product matrix of the centred columns.

    Without ``gram``: two passes (centre, then sum squares) in row blocks.
    With ``gram`` (the caller guarantees complete data): ``shifted_cross_product``.
    Both avoid the cancellation of "sum of squares minus square of sums" and
    make no full-size copy.
    """
    n, p = values.shape
    step = block_rows(p)
    if gram:
        return shifted_cross_product(values, log_mask, step)
    missing = has_missing(values)
    n_obs = np.sum(~np.isnan(values), axis=0) if missing else np.full(p, n)
    total = np.zeros(p)
    for start in range(0, n, step):
        block = apply_log10(values[start : start + step], log_mask)
        total += np.nansum(block, axis=0) if missing else block.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / n_obs
    ss = np.zeros(p)
    for start in range(0, n, step):
        block = apply_log10(values[start : start + step], log_mask) - mean
        if missing:
            block = np.where(np.isnan(block), 0.0, block)
        ss += np.einsum("ij,ij->j", block, block)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(ss / (n_obs - 1))
    return mean, sd, n_obs, None


def shifted_cross_product(values: np.ndarray, log_mask: np.ndarray, step: int):
    """One pass over complete data: mean, SD and centred cross-product matrix.

    The data are shifted by the mean c of the first block (the "shifted data"
    algorithm recommended by Chan, Golub & LeVeque 1983, The American
    Statistician 37, 242-247), and a column of ones appended, so one
    cross-product per block gives both sum((x-c)(x-c)') and sum(x-c); then
    centred = shifted - n d d' with d = mean - c. The correction cancels about
    log10(n d^2 / centred sum of squares) digits, which is at most
    log10(n / rows of the first block) because the first block is part of the
    data; beyond 4 digits (only possible for tens of millions of rows) a
    second, exactly centred pass is made instead.
    """
    n, p = values.shape
    shift = apply_log10(values[:step], log_mask).mean(axis=0)
    buffer = np.empty((min(step, n), p + 1))
    buffer[:, p] = 1.0
    augmented = np.zeros((p + 1, p + 1))
    for start in range(0, n, step):
        block = apply_log10(values[start : start + step], log_mask)
        k = block.shape[0]
        np.subtract(block, shift, out=buffer[:k, :p])
        augmented += buffer[:k].T @ buffer[:k]
    d = augmented[p, :p] / n
    mean = shift + d
    cross = augmented[:p, :p] - n * np.outer(d, d)
    # Digits lost to cancellation ~ log10(shifted / centred sum of squares); accept up to 4.
    if np.any(n * d * d > 1e4 * np.maximum(np.diag(cross), 0.0)):
        cross = np.zeros((p, p))
        for start in range(0, n, step):
            block = apply_log10(values[start : start + step], log_mask) - mean
            cross += block.T @ block
    sd = np.sqrt(np.diag(cross) / (n - 1))
    return mean, sd, np.full(p, n), cross


def apply_log10(block: np.ndarray, log_mask: np.ndarray) -> np.ndarray:
    """``block`` with log10 applied to the masked columns (a copy when any column is logged)."""
    if not log_mask.any():
        return block
    out = np.array(block, dtype=np.float64, copy=True)
    out[:, log_mask] = np.log10(out[:, log_mask])
    return out


def scale_block(block: np.ndarray, log_mask: np.ndarray, mean: np.ndarray, scale: np.ndarray, out=None) -> np.ndarray:
    """log10, centre and scale one block of rows (NaN kept) into ``out`` (a new array by default).

    Passing a reusable ``out`` buffer spares a fresh allocation per block.
    """
    if out is None:
        out = np.empty(block.shape)
    np.subtract(apply_log10(block, log_mask), mean, out=out)
    if np.any(scale != 1.0):  # centring-only scalings skip a pass
        out *= 1.0 / scale  # one reciprocal per variable; multiplying is cheaper than dividing
    return out
