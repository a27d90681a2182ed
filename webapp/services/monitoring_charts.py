"""Charts derived from a reference model's continuing series, for small persistent shifts.

Computed on request from the checked samples in run order (nothing stored):

- ``ewma-t2``: EWMA of T² (Roberts 1959; exact-variance limits of Lucas &
  Saccucci 1990), centred on the mean of the new-sample T² distribution with
  its SD (``analysis.monitoring.new_sample_t2_moments``); lambda 0.2 and
  width 3 are common practice.  T² is skewed, so the limits are a normal
  approximation (common practice).
- ``mewma``: the multivariate EWMA of the scores (Lowry, Woodall, Champ &
  Rigdon 1992), lambda 0.1, limit h4 for an in-control average run length
  of 200 by a seeded simulation (``analysis.monitoring.mewma_limit``).
- ``combined``: the combined index phi of Yue & Qin (2001) with its
  warning and action limits.

Statistics support, never replace, QA judgement and local procedures.
"""

from __future__ import annotations

import functools
from typing import Any, Mapping

import numpy as np

from analysis import monitoring as mon
from analysis.errors import InputError
from analysis.modelfile import model_from_dict
from webapp.services import reference_models as reference

EWMA_LAMBDA, EWMA_WIDTH = 0.2, 3.0
MEWMA_LAMBDA, MEWMA_ARL0 = 0.1, 200.0
DERIVED = {
    "ewma-t2": ("EWMA of Hotelling's T²", "Roberts (1959); Lucas & Saccucci (1990); lambda 0.2, width 3: "
                "common practice"),
    "mewma": ("MEWMA of the scores", "Lowry, Woodall, Champ & Rigdon (1992); lambda 0.1, in-control ARL 200"),
    "combined": ("Combined index φ", "Yue & Qin (2001)"),
}


@functools.lru_cache(maxsize=32)
def _mewma_limit(n_components: int) -> float:
    return mon.mewma_limit(n_components, MEWMA_LAMBDA, MEWMA_ARL0)


def derived_chart(info: Mapping[str, Any], series: Mapping[str, list], statistic: str) -> dict[str, Any]:
    """One derived chart of the checked samples (``batches.chart()["series"]``) in run order.

    Returns {"statistic", "title", "source", "values", "upper", "lower",
    "warning", "action", "exceeds"}: ``upper``/``lower`` are per-point limits
    (EWMA) or None, ``warning``/``action`` single limits (combined index; the
    MEWMA's h4 as ``action``) or None.  InputError for an unknown statistic or
    a model the chart cannot be drawn for.
    """
    if statistic not in DERIVED:
        raise InputError(f"chart {statistic!r} is not one of {', '.join(DERIVED)}", field="statistic")
    title, source = DERIVED[statistic]
    answer: dict[str, Any] = {"statistic": statistic, "title": title, "source": source, "values": [],
                              "upper": None, "lower": None, "warning": None, "action": None, "exceeds": []}
    if not series["t2"]:
        return answer
    model = model_from_dict(reference.model_document(info["id"]))
    t2 = np.asarray(series["t2"], dtype=np.float64)
    if statistic == "ewma-t2":
        centre, sigma = mon.new_sample_t2_moments(model)
        found = mon.ewma(t2, EWMA_LAMBDA, target=centre, sigma=sigma, width=EWMA_WIDTH)
        answer.update(values=found.statistic.tolist(), upper=found.upper.tolist(), lower=found.lower.tolist(),
                      exceeds=found.exceeds.tolist())
    elif statistic == "mewma":
        scores = np.asarray(series["scores"], dtype=np.float64).T
        found = mon.mewma(scores, model.eigenvalues_[: scores.shape[1]], MEWMA_LAMBDA,
                          limit=_mewma_limit(scores.shape[1]))
        answer.update(values=found.statistic.tolist(), action=found.limit, exceeds=found.exceeds.tolist())
    else:
        spe = np.asarray(series["spe"], dtype=np.float64)
        levels = (info["confidence"]["warning"], info["confidence"]["action"])
        phi, limits = mon.combined_index(model, t2, spe, levels, info["limits"]["spe_method"])
        answer.update(values=phi.tolist(), warning=limits.warning, action=limits.action,
                      exceeds=(phi > limits.action).tolist())
    return answer
