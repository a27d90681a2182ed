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
    return [f"{i}" for i in range(1, n + 1)]  # an f-string builds these about twice as fast as str()


def as_strings(labels) -> list[str]:
    """``labels`` (a sequence or pandas Index) as a list of str; no per-item conversion when already str."""
    items = labels.tolist() if hasattr(labels, "tolist") else list(labels)
    return items if all(type(s) is str for s in items) else [str(s) for s in items]


def row_label(sample_ids, i: int) -> str:
    """The sample id of row i, or its row number counted from 1 when there are no ids."""
    return str(i + 1) if sample_ids is None else sample_ids[i]


def as_matrix(X, sample_ids=None, variable_names=None, default_ids=True):
    """Validate input and return (float64 matrix, sample ids, variable names); see ``validated``."""
    values, sample_ids, variable_names, _, _ = validated(X, sample_ids, variable_names, default_ids)
    return values, sample_ids, variable_names


def validated(X, sample_ids=None, variable_names=None, default_ids=True):
    """Validate input: (float64 matrix, sample ids, variable names, complete, column sums).

    ``complete`` is True when no value is missing; ``column sums`` (p,) come
    from the finiteness check and are finite whenever ``complete`` is, except
    after overflow. ``X`` is an ndarray or a DataFrame (index gives the sample
    ids and columns the variable names unless given explicitly); a float64
    array or frame is used as it is, without a copy. NaN marks a missing
    value; infinite or non-numeric values are an InputError naming row and
    column. With ``default_ids=False`` data without ids get None instead of a
    list of row numbers (messages still name the row number).
    """
    if isinstance(X, pd.DataFrame):
        if sample_ids is None:
            sample_ids = X.index
        if variable_names is None:
            variable_names = X.columns
        try:
            values = X.to_numpy(dtype=np.float64, copy=False)
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
        sample_ids = as_strings(sample_ids)
    elif default_ids:
        sample_ids = default_sample_ids(n)
    variable_names = default_variable_names(p) if variable_names is None else as_strings(variable_names)
    if sample_ids is not None and len(sample_ids) != n:
        raise InputError(f"{len(sample_ids)} sample ids given for {n} rows")
    if len(variable_names) != p:
        raise InputError(f"{len(variable_names)} variable names given for {p} columns")
    if len(set(variable_names)) != p:
        dup = sorted({v for v in variable_names if variable_names.count(v) > 1})
        raise InputError(f"duplicate variable name(s): {', '.join(dup[:10])}")
    # Finite column sums mean every value is finite (fast path: no n x p temporary); the
    # sums are kept, so a fit gets its means from this pass.
    column_sums = values.sum(axis=0)
    complete = bool(np.isfinite(column_sums).all())
    if not complete and np.isinf(values).any():
        i, j = np.argwhere(np.isinf(values))[0]
        raise InputError(
            f"infinite value {values[i, j]} in variable {variable_names[j]!r}, sample {row_label(sample_ids, i)!r}"
        )
    if not complete:
        complete = not np.isnan(values).any()  # a finite-valued sum can still overflow
    return values, sample_ids, variable_names, complete, column_sums


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
        self, values: np.ndarray, sample_ids, variable_names: list[str], gram: bool = False, column_sums=None
    ) -> Preprocessor:
        """Learn log10 mask, means and scales from ``values`` (n, p); NaN ignored.

        With ``gram=True`` (complete data only) the same pass also accumulates
        ``gram_``, the p x p cross-product of the centred, unscaled kept
        variables, from which a PCA of tall data needs no further pass;
        ``column_sums`` of the raw values (from ``validated``), when given,
        supply the centre of that pass. ``sample_ids`` may be None (rows are
        then named by number in messages).
        """
        if self.scaling not in SCALINGS:
            raise InputError(f"scaling={self.scaling!r} is not one of {', '.join(SCALINGS)}")
        log10 = [self.log10] if isinstance(self.log10, str) else [str(v) for v in self.log10]
        unknown = [v for v in log10 if v not in variable_names]
        if unknown:
            raise InputError(f"log10 variable(s) not in the data: {', '.join(unknown[:10])}")
        log_mask = np.isin(np.asarray(variable_names, dtype=object), log10)
        check_log10(values, log_mask, sample_ids, variable_names)

        mean, sd, n_obs, cross = column_moments(values, log_mask, gram=gram, column_sums=column_sums)
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


def block_buffer(values: np.ndarray, rows: int) -> np.ndarray:
    """A reusable buffer for blocks of ``rows`` rows of ``values``, in the same memory order
    (column-major for the arrays pandas hands out), so filling it reads and writes in sequence."""
    order = "F" if values.flags.f_contiguous and not values.flags.c_contiguous else "C"
    return np.empty((min(rows, values.shape[0]), values.shape[1]), order=order)


def column_moments(values: np.ndarray, log_mask: np.ndarray, gram: bool = False, column_sums=None):
    """Mean, SD (ddof=1), number of observed values per column after log10, and
    (``gram=True``, complete data) the cross-product matrix of the centred columns.

    Without ``gram``: two passes (centre, then sum squares) in row blocks.
    With ``gram`` (the caller guarantees complete data): ``shifted_cross_product``,
    centred on ``column_sums / n`` where given.
    Both avoid the cancellation of "sum of squares minus square of sums" and
    make no full-size copy.
    """
    n, p = values.shape
    step = block_rows(p)
    if gram:
        shift = None if column_sums is None else np.asarray(column_sums, dtype=np.float64) / n
        return shifted_cross_product(values, log_mask, step, shift=shift)
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


def shifted_cross_product(values: np.ndarray, log_mask: np.ndarray, step: int, shift=None):
    """One pass over complete data: mean, SD and centred cross-product matrix.

    Each row block is shifted by a centre c into one reused buffer, and the
    buffer's cross-product (a symmetric rank-k update) and column sums are
    accumulated: sum((x-c)(x-c)') and sum(x-c). Then mean = c + d and
    centred = shifted - n d d' with d = sum(x-c) / n (the "shifted data"
    algorithm, Chan, Golub & LeVeque 1983, The American Statistician 37,
    242-247). The centre is ``shift`` (the column means from the finiteness
    check; d is then rounding-sized) for unlogged columns, and the mean of the
    first block otherwise. The correction cancels about log10(n d^2 / centred
    sum of squares) digits; beyond 4 digits a second, exactly centred pass is
    made instead.
    """
    n, p = values.shape
    centre = apply_log10(values[:step], log_mask).mean(axis=0)
    if shift is not None:  # an overflowed sum gives no usable centre
        centre = np.where(log_mask | ~np.isfinite(shift), centre, shift)
    buffer = block_buffer(values, step)
    shifted = np.zeros((p, p))
    shifted_sum = np.zeros(p)
    for start in range(0, n, step):
        block = apply_log10(values[start : start + step], log_mask)
        z = np.subtract(block, centre, out=buffer[: block.shape[0]])
        shifted += z.T @ z  # numpy hands Z'Z of one buffer to BLAS syrk
        shifted_sum += z.sum(axis=0)
    d = shifted_sum / n
    mean = centre + d
    cross = shifted - n * np.outer(d, d)
    # Digits lost to cancellation ~ log10(shifted / centred sum of squares); accept up to 4.
    if np.any(n * d * d > 1e4 * np.maximum(np.diag(cross), 0.0)):
        cross = np.zeros((p, p))
        for start in range(0, n, step):
            block = apply_log10(values[start : start + step], log_mask)
            z = np.subtract(block, mean, out=buffer[: block.shape[0]])
            cross += z.T @ z
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
