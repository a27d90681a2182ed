"""Classical and robust fits side by side: the samples one method flags and the other does not.

A group of outliers can pull a classical PCA towards itself, so that its
members look ordinary (masking), while a robust fit (ROBPCA, Hubert, Rousseeuw
& Vanden Branden 2005; ``analysis.robust``) describes the majority and flags
them. Both fits here use the same preprocessing, variables, exclusions and
number of components; a sample is flagged when it is beyond either limit at
the settings' confidence (classical: Hotelling's T² and SPE; robust: the score-
and orthogonal-distance cut-offs). Every sample of the dataset is judged,
samples left out of the fit by projection (``modelling.sample_flags``).
Both fits come from the model cache when they have been fitted before.
"""

from __future__ import annotations

from typing import Any, Mapping

import numpy as np

from analysis.errors import InputError
from analysis.robust import compare_flags
from webapp.services import ingest, modelling
from webapp.services.fit_settings import CLASSICAL, ROBUST

SUPPORT_WORDS = {
    (True, True): "both fits",
    (False, True): "the robust fit only",
    (True, False): "the classical fit only",
    (False, False): "neither fit",
}


def _side(info: Mapping[str, Any], n_flagged: int) -> dict[str, Any]:
    side = {"model_id": info["id"], "fingerprint": info["fingerprint"], "n_flagged": n_flagged,
            "t2_limit": info["t2_limit"], "spe_limit": info["spe_limit"]}
    robust = info.get("robust")
    if robust:
        side.update(h=robust["h"], sd_cutoff=robust["sd_cutoff"], od_cutoff=robust["od_cutoff"])
    return side


def _flags(dataset_id: int, settings: Mapping[str, Any], user_id: int | None):
    """(sample ids, classical (flags, severity), classical info, robust (flags, severity) or None,
    robust info or None, robust error); severity = the larger statistic / limit ratio."""
    base = {k: v for k, v in settings.items() if k != "method"}
    table = ingest.load_table(dataset_id)
    classical_model, classical = modelling.get_model(dataset_id, {**base, "method": CLASSICAL}, user_id=user_id)
    ids, classical_flags, classical_severity = modelling.sample_flags(classical_model, classical, table)
    robust_settings = {**base, "method": ROBUST, "components": classical["n_components"]}
    try:
        robust_model, robust = modelling.get_model(dataset_id, robust_settings, user_id=user_id)
    except InputError as exc:  # e.g. missing values: ROBPCA needs complete data
        return ids, (classical_flags, classical_severity), classical, None, None, str(exc)
    robust_ids, robust_flags, robust_severity = modelling.sample_flags(robust_model, robust, table)
    if robust_ids != ids:
        raise InputError("the classical and robust fits list different samples; fit both again")
    return ids, (classical_flags, classical_severity), classical, (robust_flags, robust_severity), robust, None


def side_by_side(dataset_id: int, settings: Mapping[str, Any], user_id: int | None = None) -> dict[str, Any]:
    """Which samples the robust fit flags that the classical fit does not, and the reverse.

    ``settings`` are fit settings (``FitSettings.parse``); their ``method`` is
    ignored, both methods are fitted. Returns ``confidence``, ``n_components``,
    ``classical`` and ``robust`` (model id, fingerprint, number flagged,
    limits; robust also h and both cut-offs; None when the robust fit is not
    possible, with ``robust_error`` saying why), ``robust_only``,
    ``classical_only``, ``both`` (sample ids) and ``counts``
    (``analysis.robust.compare_flags``) over the samples both fits score, and
    ``robust_unscored``: samples the robust fit cannot score (a missing value).
    Each list runs from the sample furthest beyond its limits (in the fit that
    flags it; for ``both``, the robust fit) to the nearest, ties in file order.
    """
    ids, (classical_flags, classical_severity), classical, robust_part, robust, error = _flags(
        int(dataset_id), settings, user_id)
    out: dict[str, Any] = {
        "confidence": classical["confidence"],
        "n_components": classical["n_components"],
        "classical": _side(classical, int(classical_flags.sum())),
        "robust": None,
        "robust_error": error,
    }
    if robust_part is None:
        return {**out, "robust_only": [], "classical_only": [], "both": [], "counts": None, "robust_unscored": []}
    robust_flags, robust_severity = robust_part
    out["robust"] = _side(robust, int(robust_flags.sum()))
    scored = np.isfinite(robust_severity)
    out["robust_unscored"] = [sid for sid, ok in zip(ids, scored) if not ok]
    compared = compare_flags(classical_flags[scored], robust_flags[scored], [s for s, ok in zip(ids, scored) if ok])
    severity = {"robust_only": robust_severity, "classical_only": classical_severity, "both": robust_severity}
    position = {sid: i for i, sid in enumerate(ids)}
    for name, values in severity.items():
        compared[name] = sorted(compared[name], key=lambda sid: -values[position[sid]])  # stable: ties in file order
    return {**out, **compared}


def proposal_support(dataset_id: int, samples: list[str], settings: Mapping[str, Any],
                     user_id: int | None = None) -> dict[str, Any]:
    """For each proposed sample, whether the classical and the robust fit flag it.

    ``settings`` are those of the fit the proposal starts from (its exclusions
    included). Returns ``confidence``, ``n_components``, the two fits'
    fingerprints, ``robust_error`` (None, or why there is no robust fit) and
    ``samples``: one ``{"sample", "classical", "robust", "supported_by"}`` per
    proposed sample, ``robust`` None without a robust fit or for a sample it cannot
    score (a missing value).
    """
    ids, (classical_flags, _), classical, robust_part, robust, error = _flags(int(dataset_id), settings, user_id)
    position = {sid: i for i, sid in enumerate(ids)}
    rows = []
    for sample in samples:
        i = position[str(sample)]
        by_classical = bool(classical_flags[i])
        scored = robust_part is not None and bool(np.isfinite(robust_part[1][i]))
        by_robust = bool(robust_part[0][i]) if scored else None
        unscored = "the robust fit cannot score it" if robust_part is not None else "no robust fit"
        words = (SUPPORT_WORDS[(by_classical, by_robust)] if by_robust is not None
                 else f"{'the classical fit' if by_classical else 'neither fit'} ({unscored})")
        rows.append({"sample": str(sample), "classical": by_classical, "robust": by_robust, "supported_by": words})
    return {
        "confidence": classical["confidence"],
        "n_components": classical["n_components"],
        "classical_fingerprint": classical["fingerprint"],
        "robust_fingerprint": robust["fingerprint"] if robust else None,
        "robust_error": error,
        "samples": rows,
    }
