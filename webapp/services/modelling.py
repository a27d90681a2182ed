"""Fitted models for stored datasets: fingerprint, disk cache, model records, result tables.

A model is known by its fingerprint (docs/design.md section 3): SHA-256 of canonical JSON
of the dataset, the preprocessing settings, the variables, the number of
components, the excluded samples, the method (robust fits only) and the
analysis version (``analysis.modelfile.model_fingerprint``). The fitted
``PCAModel`` (or ROBPCA ``RobustPCAModel``) is kept in a diskcache under that
fingerprint in ``HOME/cache/models``, shared by every worker on the host; a
cache hit never refits. Each distinct fit is recorded in the ``models`` table
so the API can refer to it by id.

The confidence level is not part of the fingerprint: limits (for a robust fit,
the score- and orthogonal-distance cut-offs) are computed from the fitted model
at whatever level is asked for. A robust fit answers the classical model's
questions with SD^2 for T2 and OD^2 for SPE (``analysis.robust``), so the
tables and contributions below serve both methods.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import diskcache
import numpy as np
import pandas as pd

from analysis.diagnostics import explain_sample
from analysis.modelfile import model_fingerprint
from analysis.rank import with_model
from analysis.pca import PCAModel
from analysis.robust import REGIONS, RobustPCAModel
from analysis.table import Table
from webapp.services import ingest
from webapp.services.context import cache_folder, session_scope
from webapp.services.exclusions import exclusion_settings
from webapp.services.fit_settings import AUTO, CLASSICAL, ROBUST, FitSettings
from webapp.store import datasets as store

MODEL_CACHE_FOLDER = "models"
FIT_LOCK_SECONDS = 1800


class ModelNotFound(LookupError):
    """No recorded model with that id (the API answers 404)."""


class SampleNotFound(LookupError):
    """The model's dataset has no sample with that id (the API answers 404)."""


def _intake(dataset: Mapping[str, Any]) -> dict[str, Any] | None:
    """Intake options for the fingerprint: None for the defaults, so the command
    line and the web app agree on a file read the default way; other options
    give another Table from the same bytes, hence another fingerprint."""
    options = dataset["intake_options"]
    return None if options == ingest.intake_options() else dict(options)


def fingerprint_for(dataset: Mapping[str, Any], settings: FitSettings, n_components) -> str:
    """The model fingerprint of ``settings`` (``n_components`` may be "auto")."""
    return model_fingerprint(
        dataset["sha256"],
        settings.scaling,
        list(settings.log10),
        list(settings.variables),
        n_components,
        list(settings.exclude),
        intake=_intake(dataset),
        method=settings.method,
    )


def _auto_key(dataset: Mapping[str, Any], settings: FitSettings) -> str:
    """Cache key remembering how many components "auto" chose for these settings."""
    return "auto:" + fingerprint_for(dataset, settings, "auto")


def _cache() -> diskcache.Cache:
    return diskcache.Cache(str(cache_folder() / MODEL_CACHE_FOLDER))


def _cached(cache: diskcache.Cache, fingerprint: str) -> dict[str, Any] | None:
    try:
        entry = cache.get(fingerprint)
    except Exception:  # noqa: BLE001 - an entry from older code that no longer unpickles: refit
        return None
    if isinstance(entry, dict) and isinstance(entry.get("model"), (PCAModel, RobustPCAModel)):
        return entry
    return None


def _fit(cache: diskcache.Cache, dataset: Mapping[str, Any], settings: FitSettings) -> dict[str, Any]:
    """Fit once. A robust fit with "auto" components takes the number (and the
    component-choice table) of the classical "auto" fit with the same settings,
    from the cache when it is there."""
    from webapp.services.headless import fit_table

    rank = None
    if settings.method == ROBUST and settings.components == AUTO:
        classical, _, _ = _cached_or_fitted(cache, dataset, settings.replace(method=CLASSICAL))
        rank = classical["rank"]
        settings = settings.replace(components=int(classical["model"].n_components_))
    table = ingest.load_table(dataset["id"])
    model, _, table_rank = fit_table(
        table,
        scaling=settings.scaling,
        log10=list(settings.log10),
        components=settings.components,
        exclude=list(settings.exclude),
        confidence=settings.confidence,
        variables=list(settings.variables),
        method=settings.method,
    )
    if rank is not None:
        model.warnings_.append(f"{model.n_components_} component(s): the number the component-choice table "
                               "recommends (a classical analysis of the same samples)")
    elif table_rank is not None:
        rank = with_model(table_rank.to_dict(), model)
    return {"model": model, "rank": rank}


def _finite(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def describe(model: PCAModel | RobustPCAModel, confidence: float) -> dict[str, Any]:
    """The JSON-safe summary of a fitted model at a confidence level.

    ``method`` is "classical" or "robust"; a robust fit adds ``robust``
    (``RobustPCAModel.fit_summary``: h, alpha, the SD and OD cut-offs at
    ``confidence`` and their rules, region counts, how stage 1 reduced the
    dimension); its ``t2_limit`` / ``spe_limit`` are the squared cut-offs.
    """
    robust = isinstance(model, RobustPCAModel)
    summary = {
        "method": ROBUST if robust else CLASSICAL,
        "n_components": int(model.scores_.shape[1]),
        "n_samples": int(model.n_samples_),
        "n_variables": len(model.variable_names_),
        "variables": list(model.variable_names_),
        "dropped_variables": list(model.dropped_variables_),
        "explained_variance_ratio": [float(v) for v in model.explained_variance_ratio_],
        "cumulative": [float(v) for v in model.cumulative_explained_],
        "eigenvalues": [float(v) for v in model.eigenvalues_[: model.scores_.shape[1]]],
        "confidence": confidence,
        "t2_limit": _finite(model.t2_limit(confidence)),
        "spe_limit": _finite(model.spe_limit(confidence)),
        "solver": model.solver_,
        "n_missing": int(model.n_missing_),
        "imputation": getattr(model, "imputation_", None),
        "warnings": list(model.warnings_),
    }
    if robust:
        summary["robust"] = {k: v for k, v in model.fit_summary(confidence).items() if k != "eigenvalues"}
    return summary


def _record(dataset: Mapping[str, Any], fingerprint: str, settings: FitSettings, summary: dict, user_id) -> int:
    from sqlalchemy.exc import IntegrityError

    try:
        with session_scope() as session:
            row = store.record_model(
                session,
                dataset_id=dataset["id"],
                fingerprint=fingerprint,
                settings=settings.to_dict(),
                summary=summary,
                created_by=user_id if user_id is not None else dataset["uploaded_by"],
            )
            return row.id
    except IntegrityError:  # another worker recorded the same model a moment ago
        with session_scope() as session:
            return store.model_by_fingerprint(session, fingerprint).id


def _cached_or_fitted(cache: diskcache.Cache, dataset: Mapping[str, Any], settings: FitSettings):
    """(cache entry, fingerprint, cache_hit): from the cache, else fitted once and stored."""
    fingerprint = None
    if settings.components == "auto":
        chosen = cache.get(_auto_key(dataset, settings))
        if chosen is not None:
            fingerprint = fingerprint_for(dataset, settings, chosen)
    else:
        fingerprint = fingerprint_for(dataset, settings, settings.components)
    entry = _cached(cache, fingerprint) if fingerprint else None
    if entry is not None:
        return entry, fingerprint, True
    lock_name = fingerprint or _auto_key(dataset, settings)
    # One fit per fingerprint across workers: the others wait, then hit the cache.
    with diskcache.Lock(cache, f"lock:{lock_name}", expire=FIT_LOCK_SECONDS):
        entry = _cached(cache, fingerprint) if fingerprint else None
        if entry is not None:
            return entry, fingerprint, True
        entry = _fit(cache, dataset, settings)
        n_components = int(entry["model"].scores_.shape[1])
        fingerprint = fingerprint_for(dataset, settings, n_components)
        cache.set(fingerprint, entry)
        if settings.components == "auto":
            cache.set(_auto_key(dataset, settings), n_components)
    return entry, fingerprint, False


def get_model(
    dataset_id: int, settings: Mapping[str, Any] | FitSettings, *, user_id: int | None = None
) -> tuple[PCAModel, dict[str, Any]]:
    """The fitted model for a dataset and fit settings, from the cache when possible.

    Parameters
    ----------
    dataset_id : int
    settings : mapping or FitSettings
        Checked by :meth:`FitSettings.parse`: ``scaling`` (none|center|autoscale|pareto, default autoscale),
        ``components`` (int or "auto", default "auto"), ``variables`` (list, default
        all), ``log10`` (list), ``exclude`` (sample ids; absent means the dataset's
        approved exclusions), ``confidence`` (default 0.95), ``method`` (classical|robust,
        default classical).
    user_id : int, optional
        Recorded as the model's creator when the fit is new.

    Returns
    -------
    (PCAModel, info) where info holds ``id`` (models row), ``dataset_id``,
    ``fingerprint``, ``cache_hit``, ``settings`` (normalised), ``excluded``,
    ``rank`` (the component-choice table when "auto" was asked),
    ``approved_exclusions``, ``what_if`` (an explicit ``exclude`` differing
    from the approved exclusions) and the fields of :func:`describe`.
    """
    dataset = ingest.dataset_info(dataset_id)
    if isinstance(settings, FitSettings):
        settings = settings.to_dict()
    settings, exclusion_note = exclusion_settings(dataset_id, settings)
    settings = FitSettings.parse(settings, dataset["variables"])
    with _cache() as cache:
        entry, fingerprint, cache_hit = _cached_or_fitted(cache, dataset, settings)
    model = entry["model"]
    summary = describe(model, settings.confidence)
    model_id = _record(dataset, fingerprint, settings, {**summary, "rank": entry["rank"]}, user_id)
    info = {
        "id": model_id,
        "dataset_id": dataset_id,
        "fingerprint": fingerprint,
        "cache_hit": cache_hit,
        "settings": settings.to_dict(),
        "excluded": list(settings.exclude),
        **exclusion_note,
        **summary,
        "rank": entry["rank"],
    }
    return model, info


def model_by_id(model_id: int, *, confidence: float | None = None) -> tuple[PCAModel, dict[str, Any]]:
    """A recorded model (from the cache, refitted only when the cache lost it)."""
    with session_scope() as session:
        row = store.get_model_row(session, model_id)
        if row is None:
            raise ModelNotFound(model_id)
        dataset_id, settings, created_by = row.dataset_id, dict(row.settings), row.created_by
    if confidence is not None:
        settings["confidence"] = confidence
    return get_model(dataset_id, settings, user_id=created_by)


def recorded_models(dataset_id: int) -> list[dict[str, Any]]:
    """The models fitted so far for a dataset, newest first, as recorded (no refit).

    Each: ``id``, ``fingerprint``, ``settings``, ``created_by``, ``created_at`` and
    the summary recorded at the first fit (limits at that fit's confidence).
    """
    ingest.dataset_info(dataset_id)  # DatasetNotFound for an unknown id
    with session_scope() as session:
        return [
            {
                "id": row.id,
                "fingerprint": row.fingerprint,
                "settings": dict(row.settings),
                "created_by": row.created_by,
                "created_at": row.created_at.isoformat(),
                "summary": dict(row.summary),
            }
            for row in store.models_of_dataset(session, dataset_id)
        ]


def _rows_of(table: Table, model: PCAModel) -> pd.DataFrame:
    return table.data[list(model.variable_names_)]


def _sample_results(model: PCAModel, table: Table, info: Mapping[str, Any]):
    """Scores, T2, SPE and limits for every sample of the dataset, in file order.

    Training samples keep the values of the fit; excluded samples are
    projected onto the model and judged against the new-sample T2 limit.
    """
    ids = table.sample_ids
    position = {sid: i for i, sid in enumerate(model.sample_ids_)}
    n_comp = model.scores_.shape[1]
    scores = np.full((len(ids), n_comp), np.nan)
    t2 = np.full(len(ids), np.nan)
    spe = np.full(len(ids), np.nan)
    trained = np.array([sid in position for sid in ids], dtype=bool)
    if trained.any():
        rows = [position[sid] for sid, used in zip(ids, trained) if used]
        scores[trained] = model.scores_[rows]
        t2[trained] = model.t2_[rows]
        spe[trained] = model.spe_[rows]
    if (~trained).any():
        other = _rows_of(table, model).loc[~trained]
        scores[~trained] = model.transform(other)
        t2[~trained] = model.hotelling_t2(other)
        spe[~trained] = model.spe(other)
    confidence = info["confidence"]
    t2_limit = np.where(trained, model.t2_limit(confidence), model.t2_limit(confidence, new=True))
    spe_limit = model.spe_limit(confidence)
    return ids, trained, scores, t2, spe, t2_limit, spe_limit


def samples_table(model_id: int, *, confidence: float | None = None) -> pd.DataFrame:
    """One row per dataset sample: sample_id, metadata, PC scores, T2, SPE, limits, flags.

    Columns: ``sample_id``, the metadata columns, ``excluded`` (bool),
    ``PC1``..``PCk``, ``T2``, ``T2_limit``, ``SPE``, ``SPE_limit``,
    ``T2_flag``, ``SPE_flag`` (bool: above the limit) and ``flags`` (text,
    e.g. "T2;SPE"). A robust fit (T2 = SD^2, SPE = OD^2, limits the squared
    cut-offs) adds ``SD``, ``SD_cutoff``, ``OD``, ``OD_cutoff`` and ``region``
    (``analysis.robust.REGIONS``).
    """
    model, info = model_by_id(model_id, confidence=confidence)
    table = ingest.load_table(info["dataset_id"])
    ids, trained, scores, t2, spe, t2_limit, spe_limit = _sample_results(model, table, info)
    frame = pd.DataFrame({"sample_id": ids})
    for column in table.metadata_columns:
        frame[column] = table.metadata[column].to_numpy(dtype=object)
    frame["excluded"] = ~trained
    for a in range(scores.shape[1]):
        frame[f"PC{a + 1}"] = scores[:, a]
    frame["T2"] = t2
    frame["T2_limit"] = t2_limit
    frame["SPE"] = spe
    frame["SPE_limit"] = spe_limit
    frame["T2_flag"] = t2 > t2_limit
    frame["SPE_flag"] = spe > spe_limit
    frame["flags"] = [
        ";".join(name for name, hit in (("T2", a), ("SPE", b)) if hit)
        for a, b in zip(frame["T2_flag"], frame["SPE_flag"])
    ]
    if isinstance(model, RobustPCAModel):
        frame["SD"], frame["SD_cutoff"] = np.sqrt(t2), np.sqrt(t2_limit)
        frame["OD"], frame["OD_cutoff"] = np.sqrt(spe), np.sqrt(spe_limit)
        region = frame["T2_flag"].to_numpy(dtype=int) + 2 * frame["SPE_flag"].to_numpy(dtype=int)
        frame["region"] = np.asarray(REGIONS, dtype=object)[region]
    frame.attrs["model"] = info
    return frame


def variables_table(model_id: int) -> pd.DataFrame:
    """One row per model variable: ``variable``, loadings ``PC1``..``PCk``, ``explained``.

    ``explained`` is the fraction of the variable's (preprocessed) sum of
    squares the components reproduce (``PCAModel.variable_explained_``).
    """
    model, info = model_by_id(model_id)
    frame = pd.DataFrame({"variable": list(model.variable_names_)})
    for a in range(model.loadings_.shape[1]):
        frame[f"PC{a + 1}"] = model.loadings_[:, a]
    frame["explained"] = model.variable_explained_
    frame["log10"] = [v in set(info["settings"]["log10"]) for v in model.variable_names_]
    frame.attrs["model"] = info
    return frame


def sample_flags(model, info: Mapping[str, Any], table: Table) -> tuple[list[str], np.ndarray, np.ndarray]:
    """(every dataset sample id in file order, True where beyond a limit at the info's
    confidence, severity max(T2 / limit, SPE / limit)): training samples with their fit
    values, the others projected."""
    ids, _, _, t2, spe, t2_limit, spe_limit = _sample_results(model, table, info)
    with np.errstate(divide="ignore", invalid="ignore"):
        severity = np.fmax(t2 / t2_limit, np.where(spe_limit > 0, spe / spe_limit, np.where(spe > 0, np.inf, 0.0)))
    return list(ids), (t2 > t2_limit) | (spe > spe_limit), severity


def explain(model, x: np.ndarray, sample_id: str, confidence: float, top: int = 3) -> dict[str, Any]:
    """The plain-language explanation of one raw row: ``analysis.diagnostics.explain_sample``
    for a classical fit, ``RobustPCAModel.explain`` (score and orthogonal distances) for a robust one."""
    if isinstance(model, RobustPCAModel):
        return model.explain(x, sample_id=sample_id, top=top, confidence=confidence)
    return explain_sample(model, x, sample_id=sample_id, top=top)


def contributions(model_id: int, sample_id: str, *, confidence: float | None = None) -> dict[str, Any]:
    """Why one sample sits where it does: SPE and T2 contributions per variable.

    Uses ``PCAModel.contributions`` (SPE: squared residuals; T2: Westerhuis,
    Gurden & Smilde 2000, summing to T2) and ``explain`` for the
    plain-language sentence; a robust fit gives the same formulas on the robust
    centre and loadings (OD^2 and SD^2) and adds ``score_distance``,
    ``orthogonal_distance`` and both cut-offs. Raises SampleNotFound for an unknown id.
    """
    model, info = model_by_id(model_id, confidence=confidence)
    table = ingest.load_table(info["dataset_id"])
    sample_id = str(sample_id)
    if sample_id not in set(table.sample_ids):
        raise SampleNotFound(sample_id)
    x = _rows_of(table, model).loc[sample_id].to_numpy(dtype=np.float64)
    excluded = sample_id not in set(model.sample_ids_)
    confidence = info["confidence"]
    explained = explain(model, x, sample_id, confidence)
    spe_parts = model.contributions(x, kind="spe")
    t2_parts = model.contributions(x, kind="t2")
    distances = {}
    if isinstance(model, RobustPCAModel):
        distances = {key: _finite(explained[key])
                     for key in ("score_distance", "orthogonal_distance", "sd_cutoff", "od_cutoff")}
    return {
        "method": info["method"],
        **distances,
        "sample_id": sample_id,
        "excluded": excluded,
        "sentence": explained["sentence"],
        "t2": _finite(np.sum(t2_parts)),
        "spe": _finite(np.sum(spe_parts)),
        "t2_limit": _finite(model.t2_limit(confidence, new=excluded)),
        "spe_limit": _finite(model.spe_limit(confidence)),
        "variables": [
            {
                "variable": name,
                "value": _finite(value),
                "spe_contribution": _finite(spe),
                "t2_contribution": _finite(t2),
            }
            for name, value, spe, t2 in zip(model.variable_names_, x, spe_parts, t2_parts)
        ],
        "ranked": explained["variables"],
    }


def rank_summary(dataset_id: int, settings: Mapping[str, Any], user_id: int | None = None) -> dict | None:
    """The component-choice table (``analysis.rank``) for the settings of a fit on
    screen: the "Recommended" fit with the same preprocessing (cached like any fit)."""
    _, auto = get_model(int(dataset_id), {**settings, "components": "auto"}, user_id=user_id)
    return auto.get("rank")
