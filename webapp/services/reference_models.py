"""Reference models: a fitted model proposed, signed and frozen for checking new batches.

Lifecycle (docs/review.md, "Reference models"): an analyst proposes a fitted
model under a name; a reviewer other than the proposer approves or rejects it
with a re-entered password, exactly like an exclusion sign-off (printed name,
UTC time, meaning, comment; ``review.check_signing_password``).  Approving
version k of a name retires the approved earlier version of that name
(*superseded*, still readable).  An approved reference model can be retired
with a signature.  Every step enters the hash-chained review log
(``reference_model_proposed`` / ``_approved`` / ``_rejected`` / ``_retired`` /
``_superseded``; a wrong password is ``sign_failed``).

Frozen at proposal, not at approval: the whole open model file (the JSON
``latentdesk apply`` reads, ``analysis.modelfile``), its SHA-256, the limits at
both confidence levels, the variables with units, the training data's SHA-256
and the model fingerprint are written with the proposal and the database
refuses any change to them (migration 0003_reference_models).  So the reviewer
signs exactly the content that is later used, and approval only changes the
state.  The file's own ``settings.confidence`` is the *action* level, so
``latentdesk apply`` flags at the action limits; ``extra.reference_model``
holds both levels.

Signatures follow US FDA 21 CFR Part 11, 11.50, 11.70, 11.200(a) and EU GMP
Annex 11 (2011), section 14, in spirit; LatentDesk claims no compliance.
"""

from __future__ import annotations

import copy
import json
import math
import re
from typing import Any, Iterable, Mapping

import pandas as pd

from analysis import monitoring as mon
from analysis.errors import InputError
from analysis.canonical_json import canonical_sha256
from analysis.modelfile import fingerprint_scheme, model_from_dict, model_to_dict
from analysis.pca import PCAModel
from webapp.services import audit, ingest, modelling, review
from webapp.services.context import session_scope
from webapp.services.review_rules import (
    MAX_COMMENT_CHARS,
    check_can_propose,
    check_can_sign,
    clean_text,
    conflict,
)
from webapp.store import reference_models as store
from webapp.store.ids import MAX_ID, check_id, is_id  # noqa: F401 - MAX_ID: webapp.services.batches reads it here
from webapp.store.review import display_names
from webapp.store.tables import REFERENCE_MODEL_STATES

DEFAULT_CONFIDENCE = (0.95, 0.99)
DEFAULT_RUN_RULES = tuple(rule.config() for rule in mon.DEFAULT_RULES)
# The rules a proposer picks from in the browser (the API takes any valid settings).
RULE_CHOICES = (
    {"rule": "beyond", "level": "action"},
    {"rule": "beyond", "level": "warning"},
    {"rule": "k_of_m", "k": 2, "m": 3, "level": "warning"},
    {"rule": "run", "length": 8},
    {"rule": "run", "length": 9},
    {"rule": "trend", "length": 6},
)
MAX_NAME_CHARS = 200
MAX_NOTE_CHARS = 4000
SPE_METHOD = "jackson-mudholkar"
# verb -> (signature step, meaning = the state it leads to)
SIGNING = {
    "approve": (store.DECISION, "approved"),
    "reject": (store.DECISION, "rejected"),
    "retire": (store.RETIREMENT, "retired"),
}
DOWNLOADABLE = ("approved", "retired")


class ReferenceModelNotFound(LookupError):
    """No reference model with that id (the API answers 404)."""


# --- checking what people send ------------------------------------------------------------


def check_name(value) -> str:
    """The reference model's name: text, 1 to 200 characters, no control characters."""
    if not isinstance(value, str):
        shown = "nothing" if value is None else type(value).__name__
        raise InputError(f"name must be text such as \"Line 2 release assays\", got {shown}", field="name")
    name = value.strip()
    if not name:
        raise InputError("name is required: the name a team knows this reference model by", field="name")
    if len(name) > MAX_NAME_CHARS:
        raise InputError(f"name is {len(name)} characters long; the limit is {MAX_NAME_CHARS}", field="name")
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in name):
        raise InputError("name must not contain control characters (tabs, line breaks)", field="name")
    return name


def check_confidence_pair(value) -> tuple[float, float]:
    """``[warning, action]``: two numbers strictly between 0 and 1, warning below action."""
    expected = "confidence must be [warning, action], two numbers between 0 and 1 with warning < action"
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise InputError(f"{expected}, e.g. [0.95, 0.99]; got {str(value)[:80]}", field="confidence")
    levels = []
    for level in value:
        if isinstance(level, bool) or not isinstance(level, (int, float)) or not math.isfinite(level):
            raise InputError(f"{expected}; {str(level)[:40]!s} is not a number", field="confidence")
        if not 0 < level < 1:
            raise InputError(f"{expected}; {level} is not between 0 and 1", field="confidence")
        levels.append(float(level))
    warning, action = levels
    if not warning < action:
        raise InputError(f"{expected}; the warning level {warning} is not below the action level {action}",
                         field="confidence")
    return warning, action


def check_states(values: Iterable[str] | None) -> list[str] | None:
    """A state filter: each one of proposed, approved, rejected, retired (None: all)."""
    states = [v for v in (values or []) if v != ""]
    unknown = [v for v in states if v not in REFERENCE_MODEL_STATES]
    if unknown:
        raise InputError(
            f"state {unknown[0]!r} is not one of {', '.join(REFERENCE_MODEL_STATES)}", field="state"
        )
    return states or None


def _known(reference_model_id) -> int | None:
    """The id when it could name a row, else None (such an id is simply not found)."""
    return reference_model_id if is_id(reference_model_id) else None


# --- the frozen content -------------------------------------------------------------------


def _limit_or_none(compute) -> float | None:
    try:
        value = float(compute())
    except InputError:
        return None  # too few samples for this limit
    return value if math.isfinite(value) else None


def limits_at(model: PCAModel, confidence: float) -> dict[str, Any]:
    """The limits at one confidence level: new-sample T2 (F), training T2 (beta), SPE.

    T2: Tracy, Young & Mason (1992); NIST/SEMATECH e-Handbook 6.5.4.3.  SPE:
    Jackson & Mudholkar (1979).  Computed by ``PCAModel.t2_limit`` / ``spe_limit``.
    """
    return {
        "confidence": confidence,
        "t2_new": _limit_or_none(lambda: model.t2_limit(confidence, new=True)),
        "t2_training": _limit_or_none(lambda: model.t2_limit(confidence)),
        "spe": _limit_or_none(lambda: model.spe_limit(confidence, method=SPE_METHOD)),
    }


def document_sha256(document: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the open model file's canonical JSON, under the scheme the file names.

    New files name RFC 8785 (``hash_scheme``); files frozen before that key
    existed are hashed as they were then (``analysis.modelfile.fingerprint_scheme``).
    """
    return canonical_sha256(document, fingerprint_scheme(document))


def model_file_bytes(document: Mapping[str, Any]) -> bytes:
    """The open model file as ``analysis.modelfile.save_model`` writes it."""
    return (json.dumps(document, indent=1, allow_nan=False) + "\n").encode("utf-8")


def _frozen_content(model: PCAModel, info: Mapping[str, Any], dataset: Mapping[str, Any], units,
                    *, name: str, version: int, note: str, warning: float, action: float, proposer: str,
                    run_rules: list[dict]):
    """(document, variables, limits, training) of a new proposal; the document loads back as a model."""
    log10 = set(info["settings"].get("log10") or [])
    variables = [{"name": v, "unit": units.get(v) or None, "log10": v in log10} for v in model.variable_names_]
    at_action = copy.copy(model)
    at_action.confidence = action  # the file's own limits are the action limits
    training = {
        "n_samples": int(model.n_samples_),
        "n_components": int(model.n_components_),
        "excluded": list(info["excluded"]),
        "approved_exclusions": list(info.get("approved_exclusions") or []),
        "exclusions_signed_off": list(info["excluded"]) == list(info.get("approved_exclusions") or []),
    }
    limits = {"spe_method": SPE_METHOD, "warning": limits_at(model, warning), "action": limits_at(model, action),
              "run_rules": run_rules}
    intake = dict(dataset["intake_options"])
    extra = {
        "dataset_sha256": dataset["sha256"],
        "file": dataset["name"],
        "id_column": dataset["id_column"],
        "group_columns": list(intake.get("group_columns") or []),
        "excluded": training["excluded"],
        "below_limit_policy": intake.get("below_limit"),
        "intake": intake,
        "reference_model": {
            "name": name,
            "version": version,
            "note": note,
            "dataset_id": dataset["id"],
            "model_id": info["id"],
            "training_sha256": dataset["sha256"],
            "warning_confidence": warning,
            "action_confidence": action,
            "limits": limits,
            "variables": variables,
            "proposed_by": proposer,
        },
    }
    document = audit.json_safe(model_to_dict(at_action, info["fingerprint"], extra))
    model_from_dict(document)  # refuse to store a file that would not load
    return document, variables, limits, training


# --- reading ------------------------------------------------------------------------------


def _signature_dict(row) -> dict[str, Any]:
    return {
        "meaning": row.meaning,
        "signer_id": row.signer_id,
        "printed_name": row.printed_name,
        "comment": row.comment,
        "signed_at": audit.utc_iso(row.signed_at),
    }


def _as_dict(row, signatures, names: Mapping[int, str], supersedes: int | None) -> dict[str, Any]:
    return {
        "id": row.id,
        "name": row.name,
        "version": row.version,
        "note": row.note,
        "state": row.state,
        "dataset_id": row.dataset_id,
        "model_id": row.model_id,
        "fingerprint": row.fingerprint,
        "training_sha256": row.training_sha256,
        "document_sha256": row.document_sha256,
        "confidence": {"warning": row.warning_confidence, "action": row.action_confidence},
        "variables": list(row.variables),
        "limits": dict(row.limits),
        "run_rules": described_rules(frozen_rule_configs(row.limits)),
        "training": dict(row.training),
        "n_components": row.training.get("n_components"),
        "n_samples": row.training.get("n_samples"),
        "proposed_by": row.proposed_by,
        "proposed_by_name": names.get(row.proposed_by),
        "created_at": audit.utc_iso(row.created_at),
        "decided_at": audit.utc_iso(row.decided_at) if row.decided_at else None,
        "retired_at": audit.utc_iso(row.retired_at) if row.retired_at else None,
        "superseded_by": row.superseded_by,
        "supersedes": supersedes,
        "signatures": [_signature_dict(s) for s in signatures],
    }


def _dict_in(session, reference_model_id: int) -> dict[str, Any]:
    row = store.get_reference_model(session, reference_model_id)
    if row is None:
        raise ReferenceModelNotFound(reference_model_id)
    signatures = store.signatures_of(session, [row.id])[row.id]
    return _as_dict(row, signatures, display_names(session, [row.proposed_by]),
                    store.superseded_of(session, row.id))


def get_reference_model(reference_model_id: int) -> dict[str, Any]:
    """One reference model with its signatures (oldest first); ReferenceModelNotFound."""
    known = _known(reference_model_id)
    if known is None:
        raise ReferenceModelNotFound(reference_model_id)
    with session_scope() as session:
        return _dict_in(session, known)


def list_reference_models(states: Iterable[str] | None = None, name: str | None = None,
                          visible: set[int] | None = None) -> list[dict[str, Any]]:
    """Reference models by name and version, optionally only some states or one name, only of
    the projects in ``visible`` when given."""
    wanted = check_states(states)
    with session_scope() as session:
        rows = store.list_reference_models(session, states=wanted, name=name, projects=visible)
        ids = [r.id for r in rows]
        signatures = store.signatures_of(session, ids)
        names = display_names(session, [r.proposed_by for r in rows])
        supersedes = {r.superseded_by: r.id for r in store.list_reference_models(session) if r.superseded_by}
        return [_as_dict(r, signatures[r.id], names, supersedes.get(r.id)) for r in rows]


CSV_COLUMNS = [
    "id", "name", "version", "state", "note", "dataset_id", "model_id", "fingerprint", "training_sha256",
    "document_sha256", "n_samples", "n_components", "variables", "warning_confidence", "action_confidence",
    "t2_limit_warning", "t2_limit_action", "spe_limit_warning", "spe_limit_action", "proposed_by",
    "created_at_utc", "decision", "decided_by", "decided_at_utc", "decision_comment", "retired_by",
    "retired_at_utc", "retirement_comment", "superseded_by", "supersedes",
]


def reference_models_frame(states: Iterable[str] | None = None, name: str | None = None,
                           visible: set[int] | None = None) -> pd.DataFrame:
    """The list as a table, one row per reference model (the CSV twin of the list)."""
    rows = []
    for m in list_reference_models(states, name, visible):
        by_meaning = {s["meaning"]: s for s in m["signatures"]}
        decision = by_meaning.get("approved") or by_meaning.get("rejected") or {}
        retirement = by_meaning.get("retired") or {}
        rows.append({
            "id": m["id"],
            "name": m["name"],
            "version": m["version"],
            "state": m["state"],
            "note": m["note"],
            "dataset_id": m["dataset_id"],
            "model_id": m["model_id"],
            "fingerprint": m["fingerprint"],
            "training_sha256": m["training_sha256"],
            "document_sha256": m["document_sha256"],
            "n_samples": m["n_samples"],
            "n_components": m["n_components"],
            "variables": ";".join(
                f"{v['name']} ({v['unit']})" if v.get("unit") else v["name"] for v in m["variables"]
            ),
            "warning_confidence": m["confidence"]["warning"],
            "action_confidence": m["confidence"]["action"],
            "t2_limit_warning": m["limits"]["warning"]["t2_new"],
            "t2_limit_action": m["limits"]["action"]["t2_new"],
            "spe_limit_warning": m["limits"]["warning"]["spe"],
            "spe_limit_action": m["limits"]["action"]["spe"],
            "proposed_by": m["proposed_by_name"],
            "created_at_utc": m["created_at"],
            "decision": decision.get("meaning", ""),
            "decided_by": decision.get("printed_name", ""),
            "decided_at_utc": decision.get("signed_at", ""),
            "decision_comment": decision.get("comment", ""),
            "retired_by": retirement.get("printed_name", ""),
            "retired_at_utc": m["retired_at"] or "",
            "retirement_comment": retirement.get("comment", ""),
            "superseded_by": m["superseded_by"] if m["superseded_by"] is not None else "",
            "supersedes": m["supersedes"] if m["supersedes"] is not None else "",
        })
    return pd.DataFrame(rows, columns=CSV_COLUMNS)


def _stored_document(row) -> dict[str, Any]:
    """The frozen open model file, checked against its stored SHA-256."""
    document = row.document
    if document_sha256(document) != row.document_sha256:
        raise RuntimeError(f"reference model {row.id}: the stored model file does not match its SHA-256")
    return document


def model_document(reference_model_id: int) -> dict[str, Any]:
    """The frozen open model file (what ``latentdesk apply`` reads) of an approved or retired model.

    ReferenceModelNotFound for an unknown id; ReviewRefused (409) while it is
    proposed or after it was rejected: only a signed model is handed out.
    """
    known = _known(reference_model_id)
    with session_scope() as session:
        row = store.get_reference_model(session, known, with_document=True) if known else None
        if row is None:
            raise ReferenceModelNotFound(reference_model_id)
        if row.state not in DOWNLOADABLE:
            raise conflict(f"reference model {row.id} is {row.state}; its model file is handed out once approved")
        return _stored_document(row)


def frozen_model(reference_model_id: int) -> tuple[PCAModel, dict[str, Any]]:
    """The approved reference model as a PCAModel rebuilt from its frozen file, and its dict.

    This is the model new batches are scored with, so the server and an
    offline ``latentdesk apply`` of the downloaded file give the same numbers.
    ReferenceModelNotFound; ReviewRefused (409) unless the model is approved.
    """
    known = _known(reference_model_id)
    with session_scope() as session:
        row = store.get_reference_model(session, known, with_document=True) if known else None
        if row is None:
            raise ReferenceModelNotFound(reference_model_id)
        if row.state != "approved":
            raise conflict(
                f"reference model {row.id} ({row.name} v{row.version}) is {row.state}; "
                "new batches are checked only against an approved reference model"
            )
        document = _stored_document(row)
        info = _dict_in(session, row.id)
    return model_from_dict(document), info


def training_points(reference_model_id) -> dict[str, Any]:
    """The training samples under the frozen model, in the training data's row order: ids, scores,
    T² and SPE (the points a chart shows before the first checked batch).

    Scored with ``analysis.monitoring.score_new_samples`` on the model rebuilt
    from the frozen file, so the values equal the fit's own.  The limits for
    these points are the training (Phase I) ones, ``limits[...]["t2_training"]``
    (Tracy, Young & Mason 1992).  ReferenceModelNotFound.
    """
    info = get_reference_model(reference_model_id)
    with session_scope() as session:  # any state: a reviewer looks at the training points before signing
        model = model_from_dict(_stored_document(store.get_reference_model(session, info["id"], with_document=True)))
    data = ingest.load_table(info["dataset_id"]).data
    used = data.drop(index=[s for s in info["training"]["excluded"] if s in data.index])
    scored = mon.score_new_samples(model, used[list(model.variable_names_)],
                                   (info["confidence"]["warning"], info["confidence"]["action"]),
                                   spe_method=info["limits"]["spe_method"])
    return {
        "samples": [str(s) for s in scored.sample_ids],
        "scores": scored.scores.tolist(),
        "t2": scored.t2.tolist(),
        "spe": scored.spe.tolist(),
        "t2_limit": info["limits"]["action"]["t2_training"],
        "t2_warning_limit": info["limits"]["warning"]["t2_training"],
    }


def download_name(info: Mapping[str, Any]) -> str:
    """A file name for the model file: ``reference-model-<name>-v<version>.json`` (ASCII only)."""
    slug = re.sub(r"[^A-Za-z0-9]+", "-", info["name"]).strip("-").lower()[:60] or "model"
    return f"reference-model-{slug}-v{info['version']}.json"


# --- writing ------------------------------------------------------------------------------


def propose(model_id, name, note="", confidence=DEFAULT_CONFIDENCE, *, user, run_rules=None) -> dict[str, Any]:
    """Propose fitted model ``model_id`` as version k of reference model ``name``; logged.

    Parameters
    ----------
    model_id : int
        A recorded model (``models`` table), e.g. from ``POST /api/v1/datasets/<id>/models``.
    name, note : str
        ``name`` is required (1-200 characters); the next free version of it is taken.
    confidence : (warning, action)
        Confidence levels of the warning and action limits, 0 < warning < action < 1.
    user
        Has ``id``, ``name``, ``display_name``, ``role`` (analyst, reviewer or admin).
    run_rules : list of dict, optional
        The run rules for this reference model's charts as ``config()`` dicts
        (``analysis.monitoring.rules_from_config``); default ``DEFAULT_RUN_RULES``.
        Frozen with the model file.

    Returns the reference model dict (state ``proposed``).  Raises ReviewRefused
    (403) for a viewer, InputError naming the field, ModelNotFound (404).
    """
    check_can_propose(user.role, "reference models")
    name = check_name(name)
    text = clean_text(note, field="note", limit=MAX_NOTE_CHARS, required=False)
    warning, action = check_confidence_pair(confidence)
    rules = check_run_rules(run_rules)
    model_id = check_id(model_id, "model_id")
    model, info = modelling.model_by_id(model_id)
    if info.get("method") == "robust":
        raise InputError(f"model {model_id} is a robust (ROBPCA) fit; reference models are classical PCA fits: "
                         "fit the model with method 'classical' and propose that one", field="model_id")
    if info["id"] != model_id:
        raise conflict(
            f"model {model_id} was fitted by another analysis version; fit it again and propose the new model"
        )
    dataset = ingest.dataset_info(info["dataset_id"])
    units = dict(ingest.load_table(info["dataset_id"]).units)

    def work(session):
        version = store.next_version(session, name)
        document, variables, limits, training = _frozen_content(
            model, info, dataset, units, name=name, version=version, note=text, warning=warning, action=action,
            proposer=user.display_name, run_rules=rules,
        )
        digest = document_sha256(document)
        row = store.insert_reference_model(
            session,
            name=name,
            version=version,
            note=text,
            state="proposed",
            dataset_id=dataset["id"],
            model_id=model_id,
            fingerprint=info["fingerprint"],
            training_sha256=dataset["sha256"],
            warning_confidence=warning,
            action_confidence=action,
            variables=variables,
            limits=limits,
            training=training,
            document=document,
            document_sha256=digest,
            proposed_by=user.id,
            created_at=audit.now_utc(),
        )
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action="reference_model_proposed",
            dataset_id=dataset["id"],
            payload={
                "reference_model_id": row.id,
                "account": user.name,
                "name": name,
                "version": version,
                "note": text,
                "model_id": model_id,
                "fingerprint": info["fingerprint"],
                "training_sha256": dataset["sha256"],
                "document_sha256": digest,
                "confidence": {"warning": warning, "action": action},
                "run_rules": rules,
                "variables": variables,
                "excluded": training["excluded"],
            },
        )
        return _dict_in(session, row.id)

    return review.run_write(work)


def check_run_rules(configs) -> list[dict]:
    """The run rules of a proposal as normalised ``config()`` dicts (default ``DEFAULT_RUN_RULES``)."""
    if configs is None:
        return list(DEFAULT_RUN_RULES)
    try:
        return [rule.config() for rule in mon.rules_from_config(configs)]
    except InputError as exc:
        raise InputError(str(exc), field="run_rules") from exc


def frozen_rule_configs(limits: Mapping[str, Any]) -> list[dict]:
    """The run rules frozen with a reference model's limits (and so in its model file);
    reference models proposed before rules were configurable use ``DEFAULT_RUN_RULES``."""
    return list(limits.get("run_rules") or DEFAULT_RUN_RULES)


def described_rules(configs: list[dict]) -> list[dict]:
    """Each rule's settings with its id, label and published source (or ``common practice``)."""
    return [{**rule.config(), "id": rule.id, "label": rule.label, "source": rule.source}
            for rule in mon.rules_from_config(configs)]


def run_rules(info: Mapping[str, Any]) -> tuple:
    """The rule objects of a reference model dict (``get_reference_model``)."""
    return mon.rules_from_config([{k: v for k, v in r.items() if k not in ("id", "label", "source")}
                                  for r in info["run_rules"]])


def _check_signer(user, proposed_by) -> None:
    """Reviewer or admin, never the proposer (the state is checked separately)."""
    check_can_sign(signer_id=user.id, role=user.role, proposed_by=proposed_by, state="proposed")


def _check_step(session, row, verb: str) -> None:
    """The state allows this signature; approving never goes back behind a later approved version."""
    if verb in ("approve", "reject") and row.state != "proposed":
        raise conflict(f"reference model {row.id} is already {row.state}; its decision was signed before")
    if verb == "retire" and row.state != "approved":
        raise conflict(f"reference model {row.id} is {row.state}; only an approved reference model can be retired")
    if verb == "approve":
        current = store.approved_of_name(session, row.name)
        if current is not None and current.version > row.version:
            raise conflict(
                f"version {current.version} of {row.name!r} is approved already; an earlier version "
                f"(v{row.version}) cannot supersede it: reject this proposal instead"
            )


def _sign(reference_model_id, user, verb: str, password, comment) -> dict[str, Any]:
    step, meaning = SIGNING[verb]
    note = clean_text(comment, field="comment", limit=MAX_COMMENT_CHARS, required=False)
    known = _known(reference_model_id)
    with session_scope() as session:
        row = store.get_reference_model(session, known) if known else None
        if row is None:  # the role is checked first, so outsiders cannot probe ids
            _check_signer(user, None)
            raise ReferenceModelNotFound(reference_model_id)
        _check_signer(user, row.proposed_by)
        _check_step(session, row, verb)
        dataset_id = row.dataset_id

    review.check_signing_password(
        user, password, dataset_id=dataset_id, payload={"reference_model_id": known, "attempted": meaning}
    )

    def work(session):
        row = store.get_reference_model(session, known, with_document=verb == "approve")
        _check_signer(user, row.proposed_by)
        _check_step(session, row, verb)
        if verb == "approve":
            model_from_dict(_stored_document(row))  # the file signed is intact and loads
        signed_at = audit.now_utc()
        store.insert_signature(
            session, reference_model_id=known, step=step, signer_id=user.id, printed_name=user.display_name,
            meaning=meaning, comment=note, signed_at=signed_at,
        )
        previous = store.approved_of_name(session, row.name) if verb == "approve" else None
        if previous is not None and not store.retire(session, previous.id, signed_at, superseded_by=known):
            raise conflict(f"version {previous.version} of {row.name!r} changed a moment ago; look again")
        moved = store.retire(session, known, signed_at) if verb == "retire" else store.decide(
            session, known, meaning, signed_at
        )
        if not moved:
            raise conflict(f"reference model {known} was signed by someone else a moment ago")
        audit.append(
            session,
            actor_id=user.id,
            actor_name=user.display_name,
            action=f"reference_model_{meaning}",
            dataset_id=row.dataset_id,
            payload={
                "reference_model_id": known,
                "account": user.name,
                "printed_name": user.display_name,
                "meaning": meaning,
                "signed_at": audit.utc_iso(signed_at),
                "comment": note,
                "name": row.name,
                "version": row.version,
                "fingerprint": row.fingerprint,
                "document_sha256": row.document_sha256,
                "supersedes": previous.id if previous is not None else None,
            },
        )
        if previous is not None:
            audit.append(
                session,
                actor_id=user.id,
                actor_name=user.display_name,
                action="reference_model_superseded",
                dataset_id=previous.dataset_id,
                payload={
                    "reference_model_id": previous.id,
                    "account": user.name,
                    "name": previous.name,
                    "version": previous.version,
                    "superseded_by": known,
                    "superseded_by_version": row.version,
                    "at": audit.utc_iso(signed_at),
                },
            )
        return _dict_in(session, known)

    return review.run_write(work)


def approve(reference_model_id, password, comment="", *, user) -> dict[str, Any]:
    """Sign the proposed reference model as approved; supersedes the approved earlier version."""
    return _sign(reference_model_id, user, "approve", password, comment)


def reject(reference_model_id, password, comment="", *, user) -> dict[str, Any]:
    """Sign the proposed reference model as rejected (final)."""
    return _sign(reference_model_id, user, "reject", password, comment)


def retire(reference_model_id, password, comment="", *, user) -> dict[str, Any]:
    """Sign the approved reference model as retired: readable, no longer used for new batches."""
    return _sign(reference_model_id, user, "retire", password, comment)
