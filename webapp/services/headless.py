"""Fitting and applying models without the web app: the ``latentdesk fit`` / ``apply`` work.

``fit_table`` turns a Table and settings into a fitted PCAModel (or, with
``method="robust"``, a ROBPCA ``RobustPCAModel``) and a JSON-safe summary (the
web services reuse it). ``fit_to_folder`` reads a file and writes
summary.json, scores.csv, loadings.csv, samples.csv and model.json;
``apply_to_folder`` scores new samples against a saved model.json and writes
samples.csv. Every problem with the input raises InputError before anything
is written. CSV text cells are neutralised against spreadsheet formula
injection (see webapp.services.exports).
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

import analysis
from analysis.diagnostics import check_confidence
from analysis.errors import InputError
from analysis.intake import read_table
from analysis.modelfile import model_fingerprint, read_model_file, save_model
from analysis.pca import PCAModel
from analysis.rank import RankResult, choose_components, with_model
from analysis.robust import RobustPCAModel
from webapp.services.exports import write_atomic, write_csv

SUMMARY_FILE, SCORES_FILE, LOADINGS_FILE, SAMPLES_FILE, MODEL_FILE = (
    "summary.json",
    "scores.csv",
    "loadings.csv",
    "samples.csv",
    "model.json",
)
SAMPLE_COLUMN = "sample"
STATISTIC_COLUMNS = ("t2", "spe", "t2_exceeds", "spe_exceeds")
ROBUST_COLUMNS = ("score_distance", "orthogonal_distance", "region")
METHODS = ("classical", "robust")
MAX_LISTED = 10


def parse_components(components) -> int | str:
    """``"auto"`` or a whole number of at least 1 (also given as text, e.g. "3")."""
    if isinstance(components, str):
        text = components.strip()
        if text.lower() == "auto":
            return "auto"
        if text.isdigit() and int(text) >= 1:
            return int(text)
    elif isinstance(components, (int, np.integer)) and not isinstance(components, bool) and components >= 1:
        return int(components)
    raise InputError(f"components must be 'auto' or a whole number of at least 1, got {components!r}")


def _listed(names) -> str:
    names = list(names)
    more = f" and {len(names) - MAX_LISTED} more" if len(names) > MAX_LISTED else ""
    return ", ".join(repr(str(n)) for n in names[:MAX_LISTED]) + more


def _finite(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _floats(values) -> list:
    return [_finite(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def _limit_or_none(compute) -> float | None:
    try:
        return _finite(compute())
    except InputError:
        return None  # too few samples for this limit


def fit_table(
    table,
    *,
    scaling="autoscale",
    log10=(),
    components="auto",
    exclude=(),
    confidence=0.95,
    variables=None,
    drop_constant=False,
    random_state=0,
    method="classical",
) -> tuple[PCAModel | RobustPCAModel, dict, RankResult | None]:
    """Fit a PCA model to ``table`` (analysis.table.Table) with the given settings.

    ``components`` is a whole number or ``"auto"`` (the recommendation of
    ``analysis.rank.choose_components`` on the training samples, seeded by
    ``random_state``). ``exclude`` names samples left out of the fit;
    ``variables`` selects variables (default: all). ``method`` is
    ``"classical"`` (PCAModel) or ``"robust"`` (ROBPCA, ``RobustPCAModel`` with
    the paper's settings: h = 0.75 n, stage-3 screening at 97.5 %; its
    cut-offs are reported at ``confidence``); with ``"auto"`` a robust fit takes
    the number of components the (classical) component-choice table recommends,
    and samples with a missing value are left out of it (with a warning).
    Returns the fitted model, a JSON-safe summary (without fingerprint or file
    details) and the rank table when ``components="auto"`` (else None).
    """
    chosen = parse_components(components)
    confidence = check_confidence(confidence)
    if method not in METHODS:
        raise InputError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if variables is not None:
        table = table.select_variables(variables)
    log10 = [log10] if isinstance(log10, str) else [str(v) for v in log10]
    not_variables = [v for v in log10 if v not in table.variables]
    if not_variables:
        raise InputError(
            f"log10 names column(s) that are not variables of the data: {_listed(not_variables)}"
        )
    excluded = sorted({str(s) for s in exclude})
    training = table.without_samples(excluded) if excluded else table
    if training.n_samples < 3:
        raise InputError(f"only {training.n_samples} sample(s) left after the exclusions; at least 3 are needed")

    rank = None
    if chosen == "auto":
        rank = choose_components(
            training.data, scaling=scaling, log10=log10, random_state=random_state, drop_constant=drop_constant
        )
        chosen = rank.recommended
    if method == "robust":
        incomplete = [str(sid) for sid in training.data.index[training.data.isna().any(axis=1).to_numpy()]]
        if incomplete:  # ROBPCA has no rule for missing values: those samples are left out and not scored
            training = training.without_samples(incomplete)
            if training.n_samples < 3:
                raise InputError(f"robust PCA needs complete samples; only {training.n_samples} have no missing value")
        model = RobustPCAModel(
            n_components=chosen, scaling=scaling, log10=log10, drop_constant=drop_constant, random_state=random_state
        ).fit(training.data)
        if incomplete:
            model.warnings_.append(
                f"{len(incomplete)} sample(s) with missing values were left out of the robust fit and are not "
                f"scored (ROBPCA needs complete samples): {_listed(incomplete)}"
            )
        if rank is not None:
            model.warnings_.append(
                f"{chosen} component(s): the number the component-choice table recommends (a classical analysis)"
            )
    else:
        model = PCAModel(
            n_components=chosen, scaling=scaling, log10=log10, confidence=confidence, drop_constant=drop_constant
        ).fit(training.data)
    return model, _summary(model, excluded, components, rank, confidence), rank


def _summary(model, excluded: list[str], requested, rank: RankResult | None, confidence: float) -> dict:
    robust = isinstance(model, RobustPCAModel)
    t2_limit = _limit_or_none(lambda: model.t2_limit(confidence))
    spe_limit = _limit_or_none(lambda: model.spe_limit(confidence))
    summary = {
        "method": "robust" if robust else "classical",
        "n_samples": int(model.n_samples_),
        "n_variables": len(model.variable_names_),
        "n_components": int(model.n_components_),
        "components_requested": parse_components(requested),
        "scaling": model.scaling,
        "log10": sorted(str(v) for v in model.log10),
        "variables": list(model.variable_names_),
        "dropped_variables": list(model.dropped_variables_),
        "explained_variance_ratio": _floats(model.explained_variance_ratio_),
        "cumulative": _floats(model.cumulative_explained_),
        "eigenvalues": _floats(model.eigenvalues_),
        "total_variance": _finite(model.total_variance_),
        "confidence": float(confidence),
        "t2_limit": t2_limit,
        "t2_limit_new": _limit_or_none(lambda: model.t2_limit(confidence, new=True)),
        "spe_limit": spe_limit,
        "spe_limit_method": "wilson-hilferty (squared OD cut-off)" if robust else "jackson-mudholkar",
        "n_t2_exceeds": int(np.sum(model.t2_ > t2_limit)) if t2_limit is not None else None,
        "n_spe_exceeds": int(np.sum(model.spe_ > spe_limit)) if spe_limit is not None else None,
        "excluded": excluded,
        "solver": model.solver_,
        "n_missing": int(model.n_missing_),
        "imputation": getattr(model, "imputation_", None),
        "warnings": list(model.warnings_),
        "analysis_version": analysis.__version__,
        "fingerprint": None,
    }
    if robust:
        # t2 / spe of a robust fit are SD^2 / OD^2, their limits the squared cut-offs.
        summary["robust"] = model.fit_summary(confidence)
    if rank is not None:
        summary["recommended_components"] = int(rank.recommended)
        summary["component_rule"] = rank.rule
        summary["rank"] = with_model(rank.to_dict(), model)
    return summary


def _intake_options(id_column, sheet, group_columns, below_limit, bad_cells) -> dict | None:
    """Reading options in the canonical form the web app stores; None for the defaults.

    Both the command line and the web app hash None for a file read the
    default way, so the same file and settings give the same fingerprint.
    """
    options = {
        "id_column": id_column or None,
        "sheet": sheet or None,
        "roles": None,
        "group_columns": [str(c) for c in group_columns],
        "below_limit": below_limit,
        "bad_cells": bad_cells,
    }
    defaults = {"id_column": None, "sheet": None, "roles": None, "group_columns": [], "below_limit": "half",
                "bad_cells": "error"}
    return None if options == defaults else options


def _read(file, **options):
    path = Path(file)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"file not found: {path}") from None
    except IsADirectoryError:
        raise InputError(f"{path} is a folder, not a data file") from None
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from None
    table, report = read_table(raw, path.name, **options)
    return table, report, hashlib.sha256(raw).hexdigest()


def _output_folder(out) -> Path:
    folder = Path(out)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"output folder {folder} exists and is not a folder")
    return folder


def _make_folder(folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create output folder {folder}: {exc.strerror or exc}") from None


def _component_names(k: int) -> list[str]:
    return [f"PC{a + 1}" for a in range(k)]


def _samples_frame(ids, metadata: pd.DataFrame, blocks: list[pd.DataFrame]) -> pd.DataFrame:
    """sample, metadata columns, then the given blocks; a metadata name that clashes is suffixed."""
    taken = {SAMPLE_COLUMN, *STATISTIC_COLUMNS, *ROBUST_COLUMNS, *(c for block in blocks for c in block.columns)}
    meta = metadata.reset_index(drop=True)
    meta.columns = [f"{c} (metadata)" if c in taken else c for c in meta.columns]
    parts = [pd.DataFrame({SAMPLE_COLUMN: list(ids)}), meta] + [b.reset_index(drop=True) for b in blocks]
    return pd.concat(parts, axis=1)


def _statistics(t2, spe, t2_limit, spe_limit) -> pd.DataFrame:
    t2, spe = np.asarray(t2, dtype=float), np.asarray(spe, dtype=float)
    return pd.DataFrame(
        {
            "t2": t2,
            "spe": spe,
            "t2_exceeds": t2 > t2_limit if t2_limit is not None else np.zeros(t2.size, dtype=bool),
            "spe_exceeds": spe > spe_limit if spe_limit is not None else np.zeros(spe.size, dtype=bool),
        }
    )


def _write_json(payload: dict, path: Path) -> None:
    text = json.dumps(payload, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
    write_atomic(path, text.encode("utf-8"))


def fit_to_folder(
    file,
    out,
    *,
    id_column=None,
    group_columns=(),
    sheet=None,
    scaling="autoscale",
    log10=(),
    components="auto",
    exclude=(),
    confidence=0.95,
    below_limit="half",
    bad_cells="error",
    drop_constant=False,
    method="classical",
) -> dict:
    """Fit a model to a CSV/TSV/XLSX file and write the result files into folder ``out``.

    Writes summary.json, scores.csv (sample, PC1..PCk), loadings.csv
    (variable, PC1..PCk), samples.csv (sample, metadata columns, t2, spe,
    t2_exceeds, spe_exceeds against the training-sample limits) and
    model.json. With ``method="robust"`` (ROBPCA) summary.json records the
    method, h and the cut-offs under ``robust``, samples.csv adds
    score_distance, orthogonal_distance and region (t2 and spe are their
    squares), and no model.json is written (``apply`` scores against classical
    models only). Returns the summary. Nothing is written when the input is bad.
    """
    folder = _output_folder(out)
    group_columns = [str(c) for c in group_columns or ()]
    table, report, sha256 = _read(
        file, id_column=id_column, group_columns=group_columns, sheet=sheet, below_limit=below_limit,
        bad_cells=bad_cells,
    )
    model, summary, rank = fit_table(
        table, scaling=scaling, log10=log10, components=components, exclude=exclude, confidence=confidence,
        drop_constant=drop_constant, method=method,
    )
    robust = method == "robust"
    intake = _intake_options(id_column, sheet, group_columns, below_limit, bad_cells)
    fingerprint = model_fingerprint(
        sha256, scaling, summary["log10"], table.variables, model.n_components_, summary["excluded"], intake=intake,
        method=method,
    )
    summary["fingerprint"] = fingerprint
    summary["dataset"] = {
        "file": Path(file).name,
        "sha256": sha256,
        "n_samples": table.n_samples,
        "n_variables": table.n_variables,
        "id_column": table.id_column,
        "metadata_columns": table.metadata_columns,
    }
    summary["below_limit_policy"] = report.below_limit_policy
    summary["intake"] = report.to_dict()
    summary["warnings"] = list(report.warnings) + summary["warnings"]

    names = _component_names(model.n_components_)
    ids = list(model.sample_ids_)
    scores = pd.DataFrame(model.scores_, columns=names)
    scores.insert(0, SAMPLE_COLUMN, ids)
    loadings = pd.DataFrame(model.loadings_, columns=names)
    loadings.insert(0, "variable", list(model.variable_names_))
    blocks = [_statistics(model.t2_, model.spe_, summary["t2_limit"], summary["spe_limit"])]
    if robust:
        blocks.append(pd.DataFrame({"score_distance": model.score_distance_,
                                    "orthogonal_distance": model.orthogonal_distance_,
                                    "region": model.regions_at(summary["confidence"])}))
    samples = _samples_frame(ids, table.metadata.loc[ids], blocks)
    extra = {
        "dataset_sha256": sha256,
        "file": Path(file).name,
        "id_column": table.id_column,
        "group_columns": group_columns,
        "excluded": summary["excluded"],
        "components_requested": summary["components_requested"],
        "below_limit_policy": report.below_limit_policy,
    }

    _make_folder(folder)
    try:
        write_csv(scores, folder / SCORES_FILE)
        write_csv(loadings, folder / LOADINGS_FILE)
        write_csv(samples, folder / SAMPLES_FILE)
        if not robust:
            save_model(model, folder / MODEL_FILE, fingerprint=fingerprint, extra=extra)
        _write_json(summary, folder / SUMMARY_FILE)
    except OSError as exc:
        raise InputError(f"cannot write to output folder {folder}: {exc.strerror or exc}") from None
    return summary


def apply_to_folder(
    model, file, out, *, id_column=None, sheet=None, below_limit="half", bad_cells="error"
) -> dict:
    """Score the samples of ``file`` against the model saved in ``model`` (a model.json path).

    Variables are matched by name: a model variable missing from the file is
    an InputError, a variable the model does not use is ignored with a
    warning. The id column and group columns default to those used at fit.
    Writes ``out``/samples.csv (sample, metadata columns, PC1..PCk, t2, spe,
    t2_exceeds, spe_exceeds against the new-sample T2 limit and the SPE
    limit) and returns a JSON-safe summary of the run.
    """
    folder = _output_folder(out)
    fitted, document = read_model_file(model)
    stored = document.get("extra") if isinstance(document.get("extra"), dict) else {}
    id_column = id_column or stored.get("id_column")
    options = {"id_column": id_column, "sheet": sheet, "below_limit": below_limit, "bad_cells": bad_cells,
               "min_samples": 1, "scoring": True}  # a single new sample can be checked
    table, report, sha256 = _read(file, **options)
    groups = [g for g in stored.get("group_columns") or () if g in table.variables]
    if groups:
        table, report, sha256 = _read(file, group_columns=groups, **options)

    name = Path(file).name
    needed = list(fitted.variable_names_)
    absent = [v for v in needed if v not in table.variables]
    if absent:
        as_text = [v for v in absent if v in table.metadata_columns]
        detail = f" ({_listed(as_text)} read as text, not numbers)" if as_text else ""
        raise InputError(f"{name}: variable(s) the model needs are missing: {_listed(absent)}{detail}")
    warnings = list(report.warnings)
    unused = [v for v in table.variables if v not in set(needed)]
    if unused:
        warnings.append(f"{name}: variable(s) not in the model were ignored: {_listed(unused)}")
    data = table.data[needed]
    empty = data.isna().all(axis=1).to_numpy()
    if empty.any():
        raise InputError(
            f"{name}: sample(s) with none of the model's variables: {_listed(data.index[empty])}"
        )

    scores = fitted.transform(data)
    t2_limit = _limit_or_none(lambda: fitted.t2_limit(new=True))
    spe_limit = _limit_or_none(fitted.spe_limit)
    statistics = _statistics(fitted.hotelling_t2(data), fitted.spe(data), t2_limit, spe_limit)
    samples = _samples_frame(
        table.sample_ids,
        table.metadata,
        [pd.DataFrame(scores, columns=_component_names(fitted.n_components_)), statistics],
    )
    _make_folder(folder)
    try:
        write_csv(samples, folder / SAMPLES_FILE)
    except OSError as exc:
        raise InputError(f"cannot write to output folder {folder}: {exc.strerror or exc}") from None
    return {
        "n_samples": table.n_samples,
        "n_variables": len(needed),
        "n_components": int(fitted.n_components_),
        "confidence": float(fitted.confidence),
        "t2_limit": t2_limit,
        "spe_limit": spe_limit,
        "n_t2_exceeds": int(statistics["t2_exceeds"].sum()),
        "n_spe_exceeds": int(statistics["spe_exceeds"].sum()),
        "fingerprint": document.get("fingerprint"),
        "dataset": {"file": name, "sha256": sha256},
        "below_limit_policy": report.below_limit_policy,
        "warnings": warnings,
    }
