"""Every record checked against the review-log entry that created it.

The hash chain (``webapp.services.audit.verify_chain``) proves the log itself
is unchanged; it says nothing about the record tables beside it.  Someone who
can switch the database's append-only triggers off could change an approved
proposal's reason or a signature's printed name there without touching the
log.  ``check_records`` reads every exclusion proposal and sign-off, reference
model and signature, batch and batch outcome, finds the log entry that wrote
it (the ``audit.append`` payloads of ``webapp.services.review``,
``reference_models`` and ``batches``) and compares field by field.  A field
that differs, a record no entry vouches for, or an entry whose record is gone
is a ``Finding`` naming the table, the record id, the field and the entry's seq.

Only fields an entry carries are compared (entries are never rewritten, so an
older entry without a field leaves that field unchecked).  References: US FDA
21 CFR Part 11, 11.10(e) (audit trails that record changes to records); EU GMP
Annex 11 (2011), section 9 (audit trails of changes to GMP-relevant data).
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Iterable

from webapp.services import audit
from webapp.store import log_records as store

PROPOSAL_DECISIONS = {"approve": "approved", "reject": "rejected", "withdraw": "withdrawn"}
REFERENCE_SIGNATURES = ("reference_model_approved", "reference_model_rejected", "reference_model_retired")
ACTIONS = (
    "propose", *PROPOSAL_DECISIONS, "reference_model_proposed", *REFERENCE_SIGNATURES,
    "reference_model_superseded", "batch_checked", "batch_outcome_signed",
)
_ABSENT = object()  # a field the entry does not carry
_SHOWN_CHARS = 60


@dataclass(frozen=True)
class Finding:
    """One record that does not match the review log.

    ``record_id`` is None when the log names a record the table does not hold
    a row for; ``field`` is None when the record as a whole is unmatched;
    ``seq`` is None when no entry records the row.
    """

    table: str
    record_id: int | None
    field: str | None
    seq: int | None
    message: str

    def __str__(self) -> str:
        where = f"{self.table} id {self.record_id}" if self.record_id is not None else self.table
        if self.field is not None:
            where += f", field {self.field}"
        return f"{where}: {self.message}"


def _comparable(value: Any) -> Any:
    return audit.utc_iso(value) if isinstance(value, datetime) else audit.json_safe(value)


def _shown(value: Any) -> str:
    text = repr(_comparable(value))
    return text if len(text) <= _SHOWN_CHARS else text[: _SHOWN_CHARS - 3] + "..."


def _logged(entry, *path: str) -> Any:
    """``entry.payload[path[0]][path[1]]...``, or ``_ABSENT`` when the entry does not carry it."""
    value: Any = entry.payload
    for key in path:
        if not isinstance(value, dict) or key not in value:
            return _ABSENT
        value = value[key]
    return value


class _Audit:
    """The findings of one check, and how many records it read."""

    def __init__(self) -> None:
        self.findings: list[Finding] = []
        self.checked = 0

    def compare(self, table: str, record_id: int, entry, fields: Iterable[tuple[str, Any, Any]]) -> None:
        """Report each ``(field, stored, logged)`` whose stored value differs from what ``entry`` logged."""
        for field, stored, logged in fields:
            if logged is _ABSENT:
                continue
            if _comparable(stored) != _comparable(logged):
                self.findings.append(Finding(
                    table, record_id, field, entry.seq,
                    f"the record holds {_shown(stored)}, log entry {entry.seq} recorded {_shown(logged)}",
                ))

    def unlogged(self, table: str, record_id: int, what: str = "") -> None:
        self.findings.append(Finding(table, record_id, None, None, f"no review-log entry records {what or 'it'}"))

    def gone(self, table: str, entry, what: str) -> None:
        self.findings.append(Finding(
            table, None, None, entry.seq, f"log entry {entry.seq} records {what}; the table holds no such row",
        ))


def _keyed(entries, key: str) -> dict[Any, Any]:
    """The first entry per ``payload[key]`` (entries without the key name no record)."""
    found: dict[Any, Any] = {}
    for entry in entries:
        value = _logged(entry, key)
        if value is not _ABSENT and value is not None:
            found.setdefault(value, entry)
    return found


# --- exclusion proposals and sign-offs ----------------------------------------------------


def _check_proposals(session, check: _Audit, by_action) -> None:
    made = _keyed(by_action["propose"], "proposal_id")
    decided = _keyed([e for a in PROPOSAL_DECISIONS for e in by_action[a]], "proposal_id")
    signed = _keyed(by_action["approve"] + by_action["reject"], "proposal_id")
    rows = store.proposals(session)
    for row in rows:
        check.checked += 1
        entry = made.get(row.id)
        if entry is None:
            check.unlogged("exclusion_proposals", row.id, "this proposal")
            continue
        comparison = row.comparison if isinstance(row.comparison, dict) else {}
        check.compare("exclusion_proposals", row.id, entry, [
            ("dataset_id", row.dataset_id, entry.dataset_id),
            ("proposed_by", row.proposed_by, entry.actor_id),
            ("action", row.action, _logged(entry, "proposal_action")),
            ("samples", list(row.samples), _logged(entry, "samples")),
            ("reason_category", row.reason_category, _logged(entry, "reason_category")),
            ("reason", row.reason, _logged(entry, "reason")),
            ("comparison.before.fingerprint", (comparison.get("before") or {}).get("fingerprint"),
             _logged(entry, "before_fingerprint")),
            ("comparison.after.fingerprint", (comparison.get("after") or {}).get("fingerprint"),
             _logged(entry, "after_fingerprint")),
        ])
        decision = decided.get(row.id)
        if decision is None:
            check.compare("exclusion_proposals", row.id, entry, [("state", row.state, "proposed"),
                                                                  ("decided_at", row.decided_at, None)])
        else:
            check.compare("exclusion_proposals", row.id, decision, [
                ("state", row.state, PROPOSAL_DECISIONS[decision.action]),
                ("decided_at", row.decided_at, _logged(decision, "signed_at")),
            ])
    held = {row.id for row in rows}
    for proposal_id, entry in made.items():
        if proposal_id not in held:
            check.gone("exclusion_proposals", entry, f"proposal {proposal_id}")

    sign_offs = store.sign_offs(session)
    for row in sign_offs:
        check.checked += 1
        entry = signed.get(row.proposal_id)
        if entry is None:
            check.unlogged("sign_offs", row.id, f"this signature on proposal {row.proposal_id}")
            continue
        check.compare("sign_offs", row.id, entry, [
            ("signer_id", row.signer_id, entry.actor_id),
            ("printed_name", row.printed_name, _logged(entry, "printed_name")),
            ("meaning", row.meaning, _logged(entry, "meaning")),
            ("comment", row.comment, _logged(entry, "comment")),
            ("signed_at", row.signed_at, _logged(entry, "signed_at")),
        ])
    held = {row.proposal_id for row in sign_offs}
    for proposal_id, entry in signed.items():
        if proposal_id not in held:
            check.gone("sign_offs", entry, f"a signature on proposal {proposal_id}")


# --- reference models and their signatures ------------------------------------------------


def _step(entry) -> str:
    return "retirement" if entry.action == "reference_model_retired" else "decision"


def _check_reference_models(session, check: _Audit, by_action) -> None:
    made = _keyed(by_action["reference_model_proposed"], "reference_model_id")
    signatures: dict[tuple[Any, str], Any] = {}
    for entry in (e for a in REFERENCE_SIGNATURES for e in by_action[a]):
        known = _logged(entry, "reference_model_id")
        if known is not _ABSENT:
            signatures.setdefault((known, _step(entry)), entry)
    superseded = _keyed(by_action["reference_model_superseded"], "reference_model_id")
    rows = store.reference_models(session)
    for row in rows:
        check.checked += 1
        entry = made.get(row.id)
        if entry is None:
            check.unlogged("reference_models", row.id, "this reference model")
            continue
        limits = row.limits if isinstance(row.limits, dict) else {}
        training = row.training if isinstance(row.training, dict) else {}
        check.compare("reference_models", row.id, entry, [
            ("dataset_id", row.dataset_id, entry.dataset_id),
            ("proposed_by", row.proposed_by, entry.actor_id),
            *[(name, getattr(row, name), _logged(entry, name))
              for name in ("name", "version", "note", "model_id", "fingerprint", "training_sha256",
                           "document_sha256", "variables")],
            ("warning_confidence", row.warning_confidence, _logged(entry, "confidence", "warning")),
            ("action_confidence", row.action_confidence, _logged(entry, "confidence", "action")),
            ("limits.run_rules", limits.get("run_rules"), _logged(entry, "run_rules")),
            ("training.excluded", training.get("excluded"), _logged(entry, "excluded")),
        ])
        decision = signatures.get((row.id, "decision"))
        retirement = signatures.get((row.id, "retirement"))
        replaced = superseded.get(row.id)
        state_entry = retirement or replaced or decision or entry
        state = "retired" if retirement or replaced else _logged(decision, "meaning") if decision else "proposed"
        check.compare("reference_models", row.id, state_entry, [("state", row.state, state)])
        check.compare("reference_models", row.id, decision or entry, [
            ("decided_at", row.decided_at, _logged(decision, "signed_at") if decision else None),
        ])
        check.compare("reference_models", row.id, retirement or replaced or entry, [
            ("retired_at", row.retired_at,
             _logged(retirement, "signed_at") if retirement else _logged(replaced, "at") if replaced else None),
            ("superseded_by", row.superseded_by, _logged(replaced, "superseded_by") if replaced else None),
        ])
    held = {row.id for row in rows}
    for known, entry in made.items():
        if known not in held:
            check.gone("reference_models", entry, f"reference model {known}")

    stored = store.reference_model_signatures(session)
    for row in stored:
        check.checked += 1
        entry = signatures.get((row.reference_model_id, row.step))
        if entry is None:
            check.unlogged("reference_model_signatures", row.id,
                           f"this {row.step} signature on reference model {row.reference_model_id}")
            continue
        check.compare("reference_model_signatures", row.id, entry, [
            ("signer_id", row.signer_id, entry.actor_id),
            ("printed_name", row.printed_name, _logged(entry, "printed_name")),
            ("meaning", row.meaning, _logged(entry, "meaning")),
            ("comment", row.comment, _logged(entry, "comment")),
            ("signed_at", row.signed_at, _logged(entry, "signed_at")),
        ])
    held_steps = {(row.reference_model_id, row.step) for row in stored}
    for (known, step), entry in signatures.items():
        if (known, step) not in held_steps:
            check.gone("reference_model_signatures", entry, f"a {step} signature on reference model {known}")


# --- batches and their outcomes -----------------------------------------------------------


def _check_batches(session, check: _Audit, by_action) -> None:
    checked_in = _keyed(by_action["batch_checked"], "batch_id")
    outcome_entries = by_action["batch_outcome_signed"]
    reviewed_by: dict[Any, Any] = {}
    expected: dict[tuple[Any, Any], list[Any]] = defaultdict(list)  # (batch, sample) -> entries, in seq order
    for entry in outcome_entries:
        batch_id = _logged(entry, "batch_id")
        if _logged(entry, "batch_state") == "reviewed":
            reviewed_by.setdefault(batch_id, entry)
        samples = _logged(entry, "samples")
        for sample in samples if isinstance(samples, list) else []:
            expected[(batch_id, sample)].append(entry)

    rows = store.batches(session)
    for row in rows:
        check.checked += 1
        entry = checked_in.get(row.id)
        if entry is None:
            check.unlogged("batches", row.id, "this batch")
            continue
        check.compare("batches", row.id, entry, [
            ("reference_model_id", row.reference_model_id, _logged(entry, "reference_model_id")),
            ("uploaded_by", row.uploaded_by, entry.actor_id),
            ("file_name", row.file_name, _logged(entry, "file")),
            *[(name, getattr(row, name), _logged(entry, name))
              for name in ("file_sha256", "n_samples", "n_flagged", "retest")],
        ])
        closing = reviewed_by.get(row.id)
        if closing is not None:
            check.compare("batches", row.id, closing, [
                ("state", row.state, "reviewed"), ("reviewed_at", row.reviewed_at, _logged(closing, "signed_at")),
            ])
        elif _logged(entry, "n_flagged") == 0:  # reviewed as it was stored, at a time the entry does not carry
            check.compare("batches", row.id, entry, [("state", row.state, "reviewed")])
        else:
            check.compare("batches", row.id, entry, [
                ("state", row.state, "open"), ("reviewed_at", row.reviewed_at, None),
            ])
    held = {row.id for row in rows}
    for batch_id, entry in checked_in.items():
        if batch_id not in held:
            check.gone("batches", entry, f"batch {batch_id}")

    # A sample's outcomes (a correction is a new row) pair with its entries in order.
    stored: dict[tuple[Any, Any], list[Any]] = defaultdict(list)
    for outcome, batch_id, sample_id in store.batch_outcomes(session):
        stored[(batch_id, sample_id)].append(outcome)
    for key in sorted(set(stored) | set(expected), key=repr):
        batch_id, sample_id = key
        outcomes, entries = stored.get(key, []), expected.get(key, [])
        for outcome, entry in zip(outcomes, entries):
            check.checked += 1
            check.compare("batch_outcomes", outcome.id, entry, [
                ("outcome", outcome.outcome, _logged(entry, "outcome")),
                ("reason", outcome.reason, _logged(entry, "reason")),
                ("cause", outcome.cause, _logged(entry, "cause")),
                ("signer_id", outcome.signer_id, entry.actor_id),
                ("printed_name", outcome.printed_name, _logged(entry, "printed_name")),
                ("signed_at", outcome.signed_at, _logged(entry, "signed_at")),
            ])
        for outcome in outcomes[len(entries):]:
            check.checked += 1
            check.unlogged("batch_outcomes", outcome.id, f"this outcome for sample {sample_id!r} of batch {batch_id}")
        for entry in entries[len(outcomes):]:
            check.gone("batch_outcomes", entry, f"an outcome for sample {sample_id!r} of batch {batch_id}")


def check_records(session) -> tuple[int, list[Finding]]:
    """Compare every record with its review-log entry: ``(records checked, findings)``.

    No findings means every proposal, sign-off, reference model, signature,
    batch and batch outcome matches the entry that wrote it.  Reads only.
    """
    by_action: dict[str, list[Any]] = defaultdict(list)
    for entry in store.log_entries_of(session, ACTIONS):
        by_action[entry.action].append(entry)
    check = _Audit()
    _check_proposals(session, check, by_action)
    _check_reference_models(session, check, by_action)
    _check_batches(session, check, by_action)
    return check.checked, check.findings
