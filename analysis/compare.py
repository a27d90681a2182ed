"""What an exclusion changed: two fitted PCA models side by side.

``compare_fits(before, after)`` reports the principal angles between the two
loading subspaces, the explained variance per component before and after,
and the samples that are beyond a T2 or SPE limit in one fit but not in the
other. This is what a reviewer sees before signing off an exclusion.

References
----------
Björck, Å., Golub, G.H. (1973) Numerical methods for computing angles between
linear subspaces. Mathematics of Computation 27(123), 579-594.
Knyazev, A.V., Argentati, M.E. (2002) Principal angles between subspaces in an
A-based scalar product: algorithms and perturbation estimates. SIAM Journal on
Scientific Computing 23(6), 2008-2040 (sine-based formula for small angles).
"""

from __future__ import annotations

import math

import numpy as np

from analysis.errors import InputError
from analysis.preprocessing import as_matrix


def principal_angles(A, B) -> np.ndarray:
    """Principal angles (degrees, ascending) between the column spaces of A (p, a) and B (p, b).

    Björck & Golub (1973): with orthonormal bases Q_A, Q_B the cosines are
    the singular values of Q_A'Q_B. Angles below 45 degrees are taken from
    the sines, the singular values of Q_B - Q_A Q_A'Q_B (Knyazev & Argentati
    2002), which stay accurate for nearly equal subspaces. min(a, b) angles.
    """
    qa = np.linalg.qr(np.asarray(A, dtype=np.float64))[0]
    qb = np.linalg.qr(np.asarray(B, dtype=np.float64))[0]
    if qa.shape[0] != qb.shape[0]:
        raise InputError(f"subspaces live in different spaces ({qa.shape[0]} and {qb.shape[0]} variables)")
    if qa.shape[1] < qb.shape[1]:
        qa, qb = qb, qa
    cosines = np.clip(np.linalg.svd(qa.T @ qb, compute_uv=False), -1.0, 1.0)  # descending
    sines = np.clip(np.linalg.svd(qb - qa @ (qa.T @ qb), compute_uv=False), -1.0, 1.0)[::-1]  # ascending
    angles = np.where(cosines**2 >= 0.5, np.arcsin(sines), np.arccos(cosines))
    return np.degrees(angles)


def _number(value):
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _limit(model, **kwargs):
    try:
        return _number(model.t2_limit(**kwargs))
    except InputError:
        return None  # too few samples for this limit


def _limits(model) -> dict:
    return {
        "confidence": float(model.confidence),
        "t2_training": _limit(model),
        "t2_new": _limit(model, new=True),
        "spe": _number(model.spe_limit()),
    }


def _per_component(before: np.ndarray, after: np.ndarray) -> list[dict]:
    rows = []
    for k in range(max(before.size, after.size)):
        b = float(before[k]) if k < before.size else None
        a = float(after[k]) if k < after.size else None
        rows.append(
            {"component": k + 1, "before": b, "after": a, "delta": None if a is None or b is None else a - b}
        )
    return rows


def _statistics(model, X, ids) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """T2, SPE of X under ``model`` and each sample's limits (training limit for its own samples)."""
    limits = _limits(model)
    training = np.isin(np.asarray(ids, dtype=object), np.asarray(model.sample_ids_, dtype=object))
    t2_limits = np.where(training, _or_nan(limits["t2_training"]), _or_nan(limits["t2_new"]))
    spe_limits = np.full(len(ids), _or_nan(limits["spe"]))
    return model.hotelling_t2(X), model.spe(X), t2_limits, spe_limits


def _or_nan(value):
    return math.nan if value is None else value


def _training_statistics(model, ids) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    position = {s: i for i, s in enumerate(model.sample_ids_)}
    rows = np.array([position[s] for s in ids], dtype=int)
    limits = _limits(model)
    n = len(ids)
    return (
        np.asarray(model.t2_)[rows],
        np.asarray(model.spe_)[rows],
        np.full(n, _or_nan(limits["t2_training"])),
        np.full(n, _or_nan(limits["spe"])),
    )


def compare_fits(before, after, X=None, sample_ids=None) -> dict:
    """Compare two fitted PCAModels (typically: all samples, and without the excluded ones).

    Parameters
    ----------
    before, after : fitted analysis.pca.PCAModel
    X : DataFrame or ndarray, optional
        Samples to evaluate under both models, e.g. the whole dataset
        including the excluded samples. A DataFrame is matched to each
        model's variables by name (its index gives the sample ids); an
        ndarray must have the columns both models were fitted on.
        Each sample is judged against the training T2 limit of a model that
        was fitted on it and against the new-sample limit otherwise (Tracy,
        Young & Mason 1992). Without X, the training samples the two fits
        share are compared with their training statistics.
    sample_ids : sequence of str, optional
        Ids of the rows of an ndarray X.

    Returns
    -------
    dict (JSON-safe) with keys
        ``principal_angles`` (degrees, ascending, over the variables both
        models use), ``max_angle``, ``variables`` ({common, only_before,
        only_after}), ``explained`` and ``cumulative`` (lists of {component,
        before, after, delta}), ``n_components`` and ``n_samples``
        ({before, after}), ``excluded`` (training samples of before only),
        ``added`` (of after only), ``limits`` ({before, after}: confidence,
        t2_training, t2_new, spe), ``evaluated_on`` ("given data" or
        "training samples in both fits"), ``n_evaluated``, ``exceeding``
        ({before, after}: {t2, spe} counts) and ``crossings``: one dict per
        sample and statistic whose out-of-limit flag differs, with sample,
        statistic, before, before_limit, after, after_limit and change
        ("now beyond the limit" or "no longer beyond the limit").
    """
    for name, model in (("before", before), ("after", after)):
        if not hasattr(model, "loadings_"):
            raise InputError(f"the {name} model has not been fitted")
    after_names = set(after.variable_names_)
    common = [v for v in before.variable_names_ if v in after_names]
    if not common:
        raise InputError("the two fits share no variable; they cannot be compared")
    index_before = [before.variable_names_.index(v) for v in common]
    index_after = [after.variable_names_.index(v) for v in common]
    angles = principal_angles(before.loadings_[index_before], after.loadings_[index_after])

    if X is None:
        if not (hasattr(before, "t2_") and hasattr(after, "t2_")):
            raise InputError("a model read from a file has no training statistics; pass the data X to compare")
        in_after = set(after.sample_ids_)
        ids = [s for s in before.sample_ids_ if s in in_after]
        stats_before = _training_statistics(before, ids)
        stats_after = _training_statistics(after, ids)
        evaluated_on = "training samples in both fits"
    else:
        ids = _sample_ids(X, sample_ids)
        stats_before = _statistics(before, X, ids)
        stats_after = _statistics(after, X, ids)
        evaluated_on = "given data"

    crossings = []
    exceeding = {"before": {}, "after": {}}
    for k, statistic in enumerate(("t2", "spe")):
        values_b, limits_b = stats_before[k], stats_before[k + 2]
        values_a, limits_a = stats_after[k], stats_after[k + 2]
        flags_b = values_b > limits_b  # NaN limit (not available) never flags
        flags_a = values_a > limits_a
        exceeding["before"][statistic] = int(flags_b.sum())
        exceeding["after"][statistic] = int(flags_a.sum())
        for i in np.flatnonzero(flags_b != flags_a):
            crossings.append(
                (int(i), k, {
                    "sample": ids[i],
                    "statistic": statistic,
                    "before": _number(values_b[i]),
                    "before_limit": _number(limits_b[i]),
                    "after": _number(values_a[i]),
                    "after_limit": _number(limits_a[i]),
                    "change": "now beyond the limit" if flags_a[i] else "no longer beyond the limit",
                })
            )
    crossings = [row for _, _, row in sorted(crossings, key=lambda item: item[:2])]

    in_before, in_after = set(before.sample_ids_), set(after.sample_ids_)
    return {
        "principal_angles": [float(a) for a in angles],
        "max_angle": float(angles.max()) if angles.size else 0.0,
        "variables": {
            "common": len(common),
            "only_before": [v for v in before.variable_names_ if v not in after_names],
            "only_after": [v for v in after.variable_names_ if v not in set(before.variable_names_)],
        },
        "explained": _per_component(before.explained_variance_ratio_, after.explained_variance_ratio_),
        "cumulative": _per_component(before.cumulative_explained_, after.cumulative_explained_),
        "n_components": {"before": int(before.n_components_), "after": int(after.n_components_)},
        "n_samples": {"before": int(before.n_samples_), "after": int(after.n_samples_)},
        "excluded": [s for s in before.sample_ids_ if s not in in_after],
        "added": [s for s in after.sample_ids_ if s not in in_before],
        "limits": {"before": _limits(before), "after": _limits(after)},
        "evaluated_on": evaluated_on,
        "n_evaluated": len(ids),
        "exceeding": exceeding,
        "crossings": crossings,
    }


def _sample_ids(X, sample_ids) -> list[str]:
    if sample_ids is not None:
        ids = [str(s) for s in sample_ids]
        if len(ids) != len(X):
            raise InputError(f"{len(ids)} sample ids given for {len(X)} rows")
        return ids
    if hasattr(X, "index"):
        return [str(s) for s in X.index]
    return as_matrix(X)[1]
