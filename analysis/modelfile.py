"""Saving and loading a fitted PCAModel as open, versioned JSON, and model fingerprints.

A model file is plain JSON anyone can read::

    {"format": "latentdesk-model", "version": 1, "analysis_version": "...",
     "fingerprint": "...", "hash_scheme": "rfc8785", "settings": {...}, "preprocessing": {...},
     "variables": [...], "loadings": [[...], ...], "eigenvalues": [...], "limits": {...}, ...}

Floats are written with Python's shortest round-trip representation, so a
loaded model reproduces the original's scores, T2, SPE, limits and
contributions bit for bit. Reading checks the format name, the version, every
key, every shape and that the stored limits still follow from the stored
eigenvalues; any problem is a ``ModelFileError`` naming it.

A model's fingerprint (docs/design.md section 3) is the SHA-256 of canonical JSON
(RFC 8785, ``analysis.canonical_json``) of the dataset's SHA-256, the
preprocessing settings, the variable selection, the number of components,
the sorted excluded sample ids and the analysis version.  A file names the
canonical JSON its hashes were computed under in ``hash_scheme``: its
fingerprint and, for a reference model, the SHA-256 the database keeps of
the whole file.  Files written before the key existed read as
``ld-json-ascii-1`` (``fingerprint_scheme``) and load as before.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

import analysis
from analysis.canonical_json import LEGACY_ASCII, RFC8785, canonical_sha256
from analysis.diagnostics import check_confidence
from analysis.errors import InputError
from analysis.pca import PCAModel

FORMAT_NAME = "latentdesk-model"
FORMAT_VERSION = 1
_LIMIT_RTOL = 1e-9


class ModelFileError(InputError):
    """A model file that cannot be read: not JSON, another format or version, or damaged."""


def model_fingerprint(
    dataset_sha256, scaling, log10, variables, n_components, excluded, *, intake=None, method=None
) -> str:
    """SHA-256 (hex) identifying a model: same inputs and analysis version, same fingerprint.

    ``log10`` and ``excluded`` are sets (sorted before hashing); ``variables``
    keeps its order. ``intake`` (optional dict) holds reading options that
    change the values taken from the same file, e.g. the detection-limit
    policy; it is hashed only when given. ``method`` ("robust" for ROBPCA,
    ``analysis.robust``) is hashed only when it is not the classical PCA, so
    classical fingerprints are those of before the option existed.
    """
    payload = {
        "analysis_version": analysis.__version__,
        "dataset_sha256": str(dataset_sha256),
        "scaling": str(scaling),
        "log10": sorted(str(v) for v in ([log10] if isinstance(log10, str) else log10)),
        "variables": [str(v) for v in variables],
        "n_components": n_components if isinstance(n_components, str) else int(n_components),
        "excluded": sorted(str(s) for s in excluded),
    }
    if intake is not None:
        payload["intake"] = intake
    if method not in (None, "classical"):
        payload["method"] = str(method)
    return canonical_sha256(payload, RFC8785)


def fingerprint_scheme(document: dict) -> str:
    """The canonical JSON scheme a model file's hashes were computed under (``hash_scheme``).

    A file without the key was written before it existed: ``ld-json-ascii-1``.
    """
    scheme = document.get("hash_scheme", LEGACY_ASCII)
    if scheme not in (RFC8785, LEGACY_ASCII):
        raise ModelFileError(f"unknown 'hash_scheme' {scheme!r} (known: {RFC8785}, {LEGACY_ASCII})")
    return scheme


def _float_or_none(value):
    value = float(value)
    return value if math.isfinite(value) else None


def _floats(values) -> list:
    return [_float_or_none(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def _limit_or_none(compute):
    try:
        return _float_or_none(compute())
    except InputError:
        return None  # e.g. too few samples for a training T2 limit


def _limits(model: PCAModel) -> dict:
    return {
        "confidence": float(model.confidence),
        "t2_training": _limit_or_none(lambda: model.t2_limit()),
        "t2_new": _limit_or_none(lambda: model.t2_limit(new=True)),
        "spe": _limit_or_none(lambda: model.spe_limit()),
        "spe_method": "jackson-mudholkar",
    }


def model_to_dict(model: PCAModel, fingerprint=None, extra=None) -> dict:
    """JSON-safe dict of a fitted model (see the module docstring); ``extra`` is stored as given."""
    if not hasattr(model, "loadings_"):
        raise InputError("the model has not been fitted")
    log10 = [model.log10] if isinstance(model.log10, str) else [str(v) for v in model.log10]
    return {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "analysis_version": analysis.__version__,
        "fingerprint": fingerprint,
        "hash_scheme": RFC8785,
        "settings": {
            "n_components": int(model.n_components_),
            "scaling": model.scaling,
            "log10": log10,
            "solver": model.solver,
            "confidence": float(model.confidence),
            "drop_constant": bool(model.drop_constant),
        },
        "preprocessing": {
            "scaling": model.scaling,
            "log10": log10,
            "mean": _floats(model.mean_),
            "scale": _floats(model.scale_),
            "sd": _floats(model.sd_),
        },
        "variables": list(model.variable_names_),
        "input_variables": list(model.feature_names_in_),
        "dropped_variables": list(model.dropped_variables_),
        "training_samples": list(model.sample_ids_),
        "n_samples": int(model.n_samples_),
        "n_components": int(model.n_components_),
        "n_missing": int(model.n_missing_),
        "solver_used": model.solver_,
        "loadings": [_floats(row) for row in model.loadings_],
        "eigenvalues": _floats(model.eigenvalues_),
        "explained_variance_ratio": _floats(model.explained_variance_ratio_),
        "cumulative": _floats(model.cumulative_explained_),
        "total_variance": float(model.total_variance_),
        "variable_explained": _floats(model.variable_explained_),
        "limits": _limits(model),
        "warnings": list(model.warnings_),
        "extra": extra if extra is not None else {},
    }


def save_model(model: PCAModel, path, fingerprint=None, extra=None) -> None:
    """Write the model as JSON to ``path``; the file appears complete or not at all."""
    text = json.dumps(model_to_dict(model, fingerprint, extra), indent=1, allow_nan=False)
    path = Path(path)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            stream.write(text + "\n")
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise


def load_model(path) -> PCAModel:
    """Read a model saved by ``save_model``; any problem is a ModelFileError naming the file."""
    return read_model_file(path)[0]


def read_model_file(path) -> tuple[PCAModel, dict]:
    """The model in ``path`` and the whole JSON document (for its ``extra`` and ``fingerprint``)."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise ModelFileError(f"model file not found: {path}") from exc
    except OSError as exc:
        raise ModelFileError(f"cannot read model file {path}: {exc.strerror or exc}") from exc
    try:
        document = json.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ModelFileError(f"model file {path.name} is not UTF-8 text (byte {exc.start})") from exc
    except json.JSONDecodeError as exc:
        raise ModelFileError(
            f"model file {path.name} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})"
        ) from exc
    try:
        return model_from_dict(document), document
    except ModelFileError as exc:
        raise ModelFileError(f"model file {path.name}: {exc}") from exc


def _require(document: dict, key: str, kinds, where: str = ""):
    if key not in document:
        raise ModelFileError(f"missing key {where}{key!r}")
    value = document[key]
    kinds = kinds if isinstance(kinds, tuple) else (kinds,)
    if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
        raise ModelFileError(f"key {where}{key!r} has the wrong type ({type(value).__name__})")
    return value


def _vector(document: dict, key: str, length: int | None, where: str = "", allow_none=False) -> np.ndarray:
    values = _require(document, key, list, where)
    if length is not None and len(values) != length:
        raise ModelFileError(f"{where}{key!r} has {len(values)} values, expected {length}")
    out = []
    for value in values:
        if value is None and allow_none:
            out.append(math.nan)
        elif isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
            out.append(float(value))
        else:
            raise ModelFileError(f"{where}{key!r} holds a value that is not a finite number: {value!r}")
    return np.asarray(out, dtype=np.float64)


def _names(document: dict, key: str) -> list[str]:
    values = _require(document, key, list)
    if not all(isinstance(v, str) for v in values):
        raise ModelFileError(f"{key!r} must be a list of text values")
    return list(values)


def model_from_dict(document) -> PCAModel:
    """Rebuild a fitted PCAModel from ``model_to_dict`` output; ModelFileError when it does not fit."""
    if not isinstance(document, dict):
        raise ModelFileError("not a LatentDesk model (the JSON is not an object)")
    if document.get("format") != FORMAT_NAME:
        raise ModelFileError(
            f"not a LatentDesk model (format {document.get('format')!r}, expected {FORMAT_NAME!r})"
        )
    version = document.get("version")
    if version != FORMAT_VERSION:
        raise ModelFileError(
            f"model format version {version!r} is not supported; this LatentDesk reads version {FORMAT_VERSION}"
        )
    fingerprint_scheme(document)  # an unknown scheme is refused
    settings = _require(document, "settings", dict)
    prep = _require(document, "preprocessing", dict)
    variables = _names(document, "variables")
    p = len(variables)
    if p == 0 or len(set(variables)) != p:
        raise ModelFileError("'variables' must be a non-empty list of distinct names")
    a = _require(document, "n_components", int)
    n = _require(document, "n_samples", int)
    if not 1 <= a <= p or n < 2:
        raise ModelFileError(f"n_components={a} and n_samples={n} do not fit {p} variables")
    loadings = _require(document, "loadings", list)
    if len(loadings) != p or not all(isinstance(row, list) and len(row) == a for row in loadings):
        raise ModelFileError(f"'loadings' must be {p} rows of {a} values")
    loadings = np.array([_vector({"row": row}, "row", a, "loadings ") for row in loadings]).reshape(p, a)
    eigenvalues = _vector(document, "eigenvalues", None)
    if eigenvalues.size < a or np.any(eigenvalues < 0) or np.any(np.diff(eigenvalues) > 1e-12 * eigenvalues[0]):
        raise ModelFileError(f"'eigenvalues' must be at least {a} non-negative values in descending order")
    mean = _vector(prep, "mean", p, "preprocessing ")
    scale = _vector(prep, "scale", p, "preprocessing ")
    if np.any(scale <= 0):
        raise ModelFileError("preprocessing 'scale' must be positive")
    scaling = _require(prep, "scaling", str, "preprocessing ")
    sd = _vector(prep, "sd", p, "preprocessing ", allow_none=True)  # explain_sample's SD units
    implied = {"autoscale": scale, "pareto": scale**2}.get(scaling)
    if np.any(sd < 0) or (implied is not None and not np.allclose(sd, implied, rtol=1e-12, atol=0.0)):
        raise ModelFileError(f"preprocessing 'sd' must be non-negative and agree with 'scale' ({scaling})")
    log10 = _names(prep, "log10")
    unknown = [v for v in log10 if v not in variables]
    if unknown:
        raise ModelFileError(f"log10 variable(s) not among the model's variables: {', '.join(unknown)}")
    confidence = _require(settings, "confidence", (int, float), "settings ")
    try:
        check_confidence(confidence)
    except InputError as exc:
        raise ModelFileError(f"settings {exc}") from exc
    training = _names(document, "training_samples")
    if len(training) != n:
        raise ModelFileError(f"'training_samples' has {len(training)} ids, expected n_samples={n}")
    input_variables = _names(document, "input_variables")
    if not set(variables) <= set(input_variables):
        raise ModelFileError("'input_variables' must contain every model variable")

    model = PCAModel(
        n_components=a,
        scaling=scaling,
        log10=log10,
        solver=_require(settings, "solver", str, "settings "),
        confidence=float(confidence),
        drop_constant=bool(settings.get("drop_constant", False)),
    )
    model.feature_names_in_ = input_variables
    model.sample_ids_ = training
    model.variable_names_ = variables
    model.dropped_variables_ = _names(document, "dropped_variables")
    model.warnings_ = _names(document, "warnings")
    model.mean_ = mean
    model.scale_ = scale
    model.sd_ = sd
    model.n_samples_ = n
    model.n_missing_ = _require(document, "n_missing", int)
    model.n_iter_ = 0
    model.imputation_ = None  # how the training data were completed is not part of the file
    model.solver_ = _require(document, "solver_used", str)
    model.n_components_ = a
    model.loadings_ = loadings
    model.eigenvalues_ = eigenvalues
    model.total_variance_ = float(_require(document, "total_variance", (int, float)))
    model.explained_variance_ratio_ = _vector(document, "explained_variance_ratio", a)
    model.cumulative_explained_ = _vector(document, "cumulative", a)
    model.variable_explained_ = _vector(document, "variable_explained", p)
    try:
        _check_limits(model, _require(document, "limits", dict))
    except InputError as exc:
        if isinstance(exc, ModelFileError):
            raise
        raise ModelFileError(f"settings do not give valid limits: {exc}") from exc
    return model


def _check_limits(model: PCAModel, stored: dict) -> None:
    """The stored limits must follow from the stored eigenvalues, sizes and confidence."""
    recomputed = _limits(model)
    for key in ("t2_training", "t2_new", "spe"):
        if key not in stored:
            raise ModelFileError(f"missing key 'limits' {key!r}")
        old, new = stored[key], recomputed[key]
        same = (old is None and new is None) or (
            isinstance(old, (int, float))
            and new is not None
            and math.isclose(float(old), new, rel_tol=_LIMIT_RTOL, abs_tol=1e-300)
        )
        if not same:
            raise ModelFileError(
                f"stored limit {key}={old!r} does not follow from the stored eigenvalues ({new!r}); "
                "the file was changed or damaged"
            )
