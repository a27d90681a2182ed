"""A plain-language sentence for one new sample against the warning and action limits.

Variables are ranked by their reconstruction-based contribution to the
statistic that drives the sentence.

References
----------
Alcala, C.F., Qin, S.J. (2009) Reconstruction-based contribution for process
    monitoring. Automatica 45, 1593-1600.
"""

from __future__ import annotations

import math

import numpy as np

from analysis.monitoring.contributions import reconstruction_contributions
from analysis.monitoring.limits import DEFAULT_CONFIDENCE_LEVELS, LEVELS, ChartLimits
from analysis.monitoring.run_rules import _check_count
from analysis.monitoring.scoring import score_new_samples
from analysis.pca import PCAModel


def _statistic_name(kind: str) -> str:
    return "T²" if kind == "t2" else "SPE"


def _exceeded(value: float, chart: ChartLimits) -> str | None:
    """The highest limit ``value`` exceeds: "action", "warning" or None."""
    return "action" if value > chart.action else "warning" if value > chart.warning else None


def _finite_or_none(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def explain_new_sample(model: PCAModel, x, *, confidence_levels=DEFAULT_CONFIDENCE_LEVELS,
                       spe_method: str = "jackson-mudholkar", top: int = 3) -> dict:
    """Plain-language explanation of one new sample against the warning and action limits.

    In the style of ``diagnostics.explain_sample`` (which uses the model's
    single confidence level and cannot take these limits), e.g. "SPE 31.2,
    action limit 9.6, mainly because Assay (%) is 4.1 SD lower than the
    model predicts." The statistic beyond the higher limit (then: by the
    larger ratio to its action limit) is explained: T² by the position within
    the model, SPE by the distance from it. Variables are ranked by their
    reconstruction-based contribution to that statistic (Alcala & Qin 2009),
    which points at a variable carrying a large single fault. Residuals and
    values are in SD of the training data (after log10 where chosen).

    Returns a dict: "sentence", "t2", "spe", "t2_limits" and "spe_limits"
    ({"warning", "action"}), "driver" ("t2" or "spe"), "level" ("action",
    "warning" or None: the highest limit the driver exceeds), "incomplete",
    "missing" (variable names), and "variables": per variable, ranked by the
    driver's RBC, the keys variable, rbc_spe, rbc_t2, spe_contribution,
    t2_contribution (``PCAModel.contributions``), residual_sd and
    standardized_value (None where missing or undefined).
    """
    _check_count("top", top, 1)
    row = model._one_row(x)
    scored = score_new_samples(model, row, confidence_levels, spe_method)
    rbc = reconstruction_contributions(model, row)
    with np.errstate(invalid="ignore", divide="ignore"):
        to_sd = model.scale_ / model.sd_
    standardized = model.preprocess(row)[0] * to_sd
    residual_sd = model.residuals(row)[0] * to_sd
    classical = {kind: model.contributions(row, kind=kind) for kind in ("spe", "t2")}
    value = {"t2": float(scored.t2[0]), "spe": float(scored.spe[0])}
    chart = {"t2": scored.t2_chart, "spe": scored.spe_chart}
    level = {kind: _exceeded(value[kind], chart[kind]) for kind in value}

    def rank(kind: str) -> tuple:
        limit = chart[kind].action
        ratio = value[kind] / limit if limit > 0 else (math.inf if value[kind] > 0 else 0.0)
        return (LEVELS.index(level[kind]) + 1 if level[kind] else 0, ratio)

    driver = "spe" if rank("spe") > rank("t2") else "t2"
    drive = rbc.spe[0] if driver == "spe" else rbc.t2[0]
    order = np.argsort(-np.nan_to_num(drive, nan=-np.inf), kind="stable")
    names = model.variable_names_

    def phrase(j: int) -> str:
        if driver == "spe":
            r = residual_sd[j]
            if not math.isfinite(r):
                return f"{names[j]} differs from what the model predicts"
            return f"{names[j]} is {abs(r):.1f} SD {'higher' if r > 0 else 'lower'} than the model predicts"
        s = standardized[j]
        if not math.isfinite(s):
            return f"{names[j]} is far from the training mean"
        return f"{names[j]} is {abs(s):.1f} SD {'above' if s > 0 else 'below'} the training mean"

    def stated(kind: str, at: str) -> str:
        text = f"{_statistic_name(kind)} {value[kind]:.3g}, {at} limit {chart[kind].upper(at):.3g}"
        return text + (f" (action limit {chart[kind].action:.3g})" if at == "warning" else "")

    if level[driver]:
        chosen = [j for j in order.tolist() if drive[j] > 0][:top]
        reasons = "; ".join(phrase(j) for j in chosen) or "no single variable stands out"
        sentence = f"{stated(driver, level[driver])}, mainly because {reasons}."
        other = "t2" if driver == "spe" else "spe"
        if level[other]:
            sentence += (
                f" {_statistic_name(other)} {value[other]:.3g} is also beyond its {level[other]} limit "
                f"{chart[other].upper(level[other]):.3g}."
            )
    else:
        sentence = (
            f"Within the warning limits: T² {value['t2']:.3g} (warning limit {chart['t2'].warning:.3g}); "
            f"SPE {value['spe']:.3g} (warning limit {chart['spe'].warning:.3g})."
        )
    missing = [names[j] for j in np.flatnonzero(np.isnan(row[0])).tolist()]
    if missing:
        sentence += f" Not measured: {', '.join(missing)}; scores by projection to the model plane."
    variables = [
        {
            "variable": names[j],
            "rbc_spe": _finite_or_none(rbc.spe[0, j]),
            "rbc_t2": _finite_or_none(rbc.t2[0, j]),
            "spe_contribution": float(classical["spe"][j]),
            "t2_contribution": float(classical["t2"][j]),
            "residual_sd": _finite_or_none(residual_sd[j]),
            "standardized_value": _finite_or_none(standardized[j]),
        }
        for j in order.tolist()
    ]
    return {
        "sentence": sentence,
        "t2": value["t2"],
        "spe": value["spe"],
        "t2_limits": {"warning": chart["t2"].warning, "action": chart["t2"].action},
        "spe_limits": {"warning": chart["spe"].warning, "action": chart["spe"].action},
        "driver": driver,
        "level": level[driver],
        "incomplete": bool(missing),
        "missing": missing,
        "variables": variables,
    }
