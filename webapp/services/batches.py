"""New batches checked against an approved reference model, and the outcomes signed on them.

Phase II of multivariate statistical process control (MacGregor & Kourti
1995): each file of new samples is read with the dataset intake, its columns
are matched to the frozen model's variables by name (units compared where
both are known), and every sample is scored with ``analysis.monitoring`` on
the model rebuilt from the frozen open model file, so the numbers equal an
offline ``latentdesk apply`` of the downloaded file to the last bit.

Run order continues across every batch of a reference model (``run_index``
1, 2, ...).  The run rules (``monitoring.DEFAULT_RULES``) are applied to the
T², SPE and score charts of the whole continuing series; a rule fires at the
point that completes its pattern, so earlier violations never change and
only those firing at a new sample are stored, on that sample.  A sample is
*flagged* when its T² or SPE exceeds the action limit or a run rule fires at
it; every flagged sample needs a signed outcome (assignable cause found, no
cause found - accepted, rejected) before its batch is *reviewed*.  Outcomes
are append-only: a correction is a new signed outcome, the latest stands.

Statistics support, never replace, QA judgement and local procedures;
regulated use needs the site's own validation.
"""

from __future__ import annotations

import hashlib
import math
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd

from analysis import monitoring as mon
from analysis.errors import InputError
from analysis.intake import read_table
from analysis.modelfile import model_from_dict
from webapp.services import audit, ingest, monitoring_charts, review, webhooks
from webapp.services import reference_models as reference
from webapp.services.context import max_upload_bytes, session_scope
from webapp.services.review_rules import MAX_COMMENT_CHARS, MAX_REASON_CHARS, clean_text, conflict, forbidden
from webapp.store import batches as store
from webapp.store.review import display_names
from webapp.store.tables import BATCH_OUTCOMES

CAN_UPLOAD = {"analyst", "reviewer", "admin"}
CAN_SIGN = {"reviewer", "admin"}
OUTCOME_WORDS = {
    "assignable_cause": "assignable cause found",
    "no_cause_accepted": "no cause found - accepted",
    "rejected": "rejected",
}
MAX_SAMPLES_PER_OUTCOME = 10000
SHOWN = 10  # sample ids named in one message
THIS_BATCH = 0  # stands for the new batch's id in its violations until the row has one


class BatchNotFound(LookupError):
    """No batch with that id (the API answers 404)."""


class BatchSampleNotFound(LookupError):
    """No sample with that id in the batch (the API answers 404)."""


def _listed(values: Iterable[Any]) -> str:
    values = [str(v) for v in values]
    more = f" and {len(values) - SHOWN} more" if len(values) > SHOWN else ""
    return ", ".join(values[:SHOWN]) + more


def _known(batch_id) -> int | None:
    if isinstance(batch_id, bool) or not isinstance(batch_id, int):
        return None
    return batch_id if 1 <= batch_id <= reference.MAX_ID else None


# --- reading the file and matching it to the model ---------------------------------------


def _read(raw: bytes, filename: str, options: Mapping[str, Any]):
    return read_table(
        raw, filename, id_column=options["id_column"], group_columns=tuple(options["group_columns"]),
        sheet=options["sheet"], below_limit=options["below_limit"], bad_cells=options["bad_cells"],
        roles=options["roles"], max_bytes=max_upload_bytes(), min_samples=1, scoring=True,
    )


def _matched(model, info: Mapping[str, Any], document: Mapping[str, Any], raw: bytes, filename: str,
             options: Mapping[str, Any]) -> tuple[pd.DataFrame, list[str]]:
    """(data in the model's variable order, warnings); InputError naming what does not match."""
    extra = document.get("extra") if isinstance(document.get("extra"), dict) else {}
    table, report = _read(raw, filename, options)
    groups = [g for g in extra.get("group_columns") or () if g in table.variables]
    if groups:  # grouping columns of the training data stay metadata here too
        options = {**options, "group_columns": [*options["group_columns"], *groups]}
        table, report = _read(raw, filename, options)
    if table.id_column is None:
        raise InputError(
            f"{filename}: no sample id column was found; name it with id_column (each new sample is "
            "recorded under its id, and an id already checked is refused)", field="id_column",
        )
    needed = list(model.variable_names_)
    as_text = [v for v in needed if v in table.metadata_columns]
    if as_text:
        raise InputError(f"{filename}: column(s) {_listed(as_text)} are not numeric (read as text); "
                         "the reference model needs numbers there", field="file")
    absent = [v for v in needed if v not in table.variables]
    if absent:
        raise InputError(f"{filename}: variable(s) the reference model needs are missing: {_listed(absent)}",
                         field="file")
    frozen_units = {v["name"]: v.get("unit") for v in info["variables"]}
    found_units = dict(report.units or {})
    different = [
        f"{v} is in {found_units[v]!r}, the reference model uses {frozen_units[v]!r}"
        for v in needed if frozen_units.get(v) and found_units.get(v) and found_units[v] != frozen_units[v]
    ]
    if different:
        raise InputError(f"{filename}: different unit(s): {'; '.join(different)}", field="file")
    warnings = list(report.warnings)
    unused = [v for v in table.variables if v not in set(needed)]
    if unused:
        warnings.append(f"{filename}: column(s) not in the reference model were ignored: {_listed(unused)}")
    data = table.data[needed]
    empty = data.isna().all(axis=1).to_numpy()
    if empty.any():
        raise InputError(f"{filename}: sample(s) with none of the model's variables: {_listed(data.index[empty])}",
                         field="file")
    return data, warnings


# --- run rules over the continuing series -------------------------------------------------


def _earlier_scores(session, earlier: list) -> np.ndarray:
    """Scores of earlier checked samples (rows of ``store.last_samples``), one row each."""
    if not earlier:
        return np.empty((0, 0))
    batch_ids = {row.batch_id for row in earlier}
    arrays = store.arrays_of(session, batch_ids)
    first = store.first_runs(session, batch_ids)
    return np.array([arrays[row.batch_id]["scores"][row.run_index - first[row.batch_id]] for row in earlier])


def _chart_series(scored, earlier: list, earlier_scores: np.ndarray) -> list[tuple[str, mon.ChartLimits, np.ndarray]]:
    """(chart name, limits, values in run order: earlier samples then the new ones) per chart."""
    old_t2 = np.array([row.t2 for row in earlier], dtype=np.float64)
    old_spe = np.array([row.spe for row in earlier], dtype=np.float64)
    old_scores = earlier_scores.reshape(len(earlier), scored.scores.shape[1])
    charts = [("t2", scored.t2_chart, np.concatenate([old_t2, scored.t2])),
              ("spe", scored.spe_chart, np.concatenate([old_spe, scored.spe]))]
    for a, limits in enumerate(scored.score_charts):
        charts.append((f"PC{a + 1}", limits, np.concatenate([old_scores[:, a], scored.scores[:, a]])))
    return charts


def _new_violations(scored, earlier: list, earlier_scores: np.ndarray, rules, batch_id: int,
                    first_run: int) -> dict[int, list[dict]]:
    """Position in the batch -> the run-rule violations that fire at that new sample.

    ``earlier`` holds the last ``longest_window(rules) - 1`` checked samples:
    a rule's firing at a point depends on that window only (``run_rules``),
    so the violations equal those over the whole continuing series.
    """
    n_old = len(earlier)
    sample_of = [row.sample_id for row in earlier] + list(scored.sample_ids)
    batch_of = [row.batch_id for row in earlier] + [batch_id] * len(scored.sample_ids)
    run_of = [row.run_index for row in earlier] + list(range(first_run, first_run + len(scored.sample_ids)))
    found: dict[int, list[dict]] = {}
    for name, limits, values in _chart_series(scored, earlier, earlier_scores):
        for violation in mon.check_run_rules(values, limits, rules):
            if violation.fired_at < n_old:
                continue  # fired before this batch: stored with its own batch
            window = list(violation.indices)
            found.setdefault(violation.fired_at - n_old, []).append({
                "chart": name,
                "rule": violation.rule_id,
                "label": violation.label,
                "source": violation.source,
                "side": violation.side,
                "samples": [sample_of[i] for i in window],
                "run_indices": [run_of[i] for i in window],
                "batches": sorted(set(batch_of[i] for i in window)),
            })
    return found


# --- checking a batch ---------------------------------------------------------------------


def check_batch(reference_model_id, raw: bytes, filename: str, user, *, id_column: str | None = None,
                sheet: str | None = None, below_limit: str = "half", bad_cells: str = "error",
                retest: bool = False) -> dict[str, Any]:
    """Check a file of new samples against an approved reference model and record the batch.

    Parameters
    ----------
    reference_model_id : int
    raw, filename
        The uploaded bytes and the client's file name (display text only).
    user
        Has ``id``, ``name``, ``display_name``, ``role`` (analyst, reviewer or admin).
    id_column, sheet, below_limit, bad_cells
        Intake options as for a dataset upload; ``id_column`` defaults to the training data's.
    retest : bool
        The upload re-tests samples (or a file) checked before; recorded as such.

    Returns the batch dict (``batch_info``).  Raises ReviewRefused (403 for a
    viewer; 409 for a reference model not approved, a sample id already checked
    under this reference model or the same file again, unless ``retest``),
    ReferenceModelNotFound (404) and InputError (400) naming the file, column
    or value; nothing is stored then.
    """
    if user.role not in CAN_UPLOAD:
        raise forbidden(f"a {user.role} cannot check batches; analysts and reviewers can")
    if not isinstance(retest, bool):
        raise InputError("retest must be true or false", field="retest")
    model, info = reference.frozen_model(reference_model_id)
    document = reference.model_document(info["id"])
    extra = document.get("extra") if isinstance(document.get("extra"), dict) else {}
    name = ingest.display_name(filename)
    options = ingest.intake_options(id_column=id_column or extra.get("id_column"), sheet=sheet,
                                    below_limit=below_limit, bad_cells=bad_cells)
    data, warnings = _matched(model, info, document, raw, name, options)
    levels = (info["confidence"]["warning"], info["confidence"]["action"])
    scored = mon.score_new_samples(model, data, levels, spe_method=info["limits"]["spe_method"])
    sha256 = hashlib.sha256(raw).hexdigest()
    sample_ids = [str(s) for s in scored.sample_ids]
    values = data.to_numpy(dtype=np.float64)
    if retest:
        warnings.append("re-test: recorded as a re-test of samples or a file checked before")

    def work(session):
        if not retest:
            _refuse_repeats(session, info["id"], sha256, sample_ids)
        rules = reference.run_rules(info)
        needed = mon.longest_window(rules) - 1  # earlier points the rules look back at
        tail = store.last_samples(session, info["id"], max(needed, 1))
        first_run = (tail[-1].run_index if tail else 0) + 1
        earlier = tail[-needed:] if needed else []
        violations = _new_violations(scored, earlier, _earlier_scores(session, earlier), rules, THIS_BATCH,
                                     first_run)
        flags = (scored.t2_exceeds_action | scored.spe_exceeds_action).tolist()
        for i in violations:
            flags[i] = True
        checked_at = audit.now_utc()
        # A batch without flags has nothing to review: it is reviewed as it is stored.
        n_flagged = sum(flags)
        batch = store.insert_batch(
            session, reference_model_id=info["id"], file_name=name, file_sha256=sha256, intake_options=options,
            uploaded_by=user.id, created_at=checked_at, n_samples=len(sample_ids), n_flagged=n_flagged,
            state="reviewed" if not n_flagged else "open", reviewed_at=checked_at if not n_flagged else None,
            warnings=list(warnings), retest=retest,
        )
        for fired in violations.values():
            for violation in fired:
                violation["batches"] = sorted(batch.id if b == THIS_BATCH else b for b in violation["batches"])
        columns = zip(sample_ids, scored.t2.tolist(), scored.spe.tolist(), scored.incomplete.tolist(),
                      scored.t2_exceeds_warning.tolist(), scored.t2_exceeds_action.tolist(),
                      scored.spe_exceeds_warning.tolist(), scored.spe_exceeds_action.tolist(), flags)
        samples = [
            store.SampleRow(None, batch.id, first_run + i, *values_of_sample, violations.get(i, []))
            for i, values_of_sample in enumerate(columns)
        ]
        store.insert_samples(session, info["id"], samples)
        store.insert_arrays(session, batch.id, scored.scores, values)
        audit.append(
            session, actor_id=user.id, actor_name=user.display_name, action="batch_checked",
            dataset_id=info["dataset_id"],
            payload={
                "batch_id": batch.id, "reference_model_id": info["id"], "name": info["name"],
                "version": info["version"], "account": user.name, "file": name, "file_sha256": sha256,
                "n_samples": len(samples), "n_flagged": n_flagged, "retest": retest,
                "flagged": [s for s, f in zip(sample_ids, flags) if f][:1000],
                "first_run": first_run, "document_sha256": info["document_sha256"],
            },
        )
        # answered from what was just written (no outcomes yet), not read back
        return _batch_answer(session, batch, info, samples, scored.scores.tolist(), {})

    checked = review.run_write(work)
    webhooks.batch_checked(checked)  # queued: never blocks the upload (off by default)
    return checked


def _refuse_repeats(session, reference_model_id: int, sha256: str, sample_ids: list[str]) -> None:
    earlier = store.batch_with_file(session, reference_model_id, sha256)
    if earlier is not None:
        raise conflict(
            f"this file (SHA-256 {sha256[:12]}...) was checked before as batch {earlier.id} "
            f"({earlier.file_name}); upload it as a re-test (retest=true) to check it again"
        )
    seen = store.samples_checked_before(session, reference_model_id, sample_ids)
    if seen:
        named = _listed(f"{s} (batch {b})" for s, b in seen.items())
        raise conflict(f"sample id(s) already checked under this reference model: {named}; "
                       "upload as a re-test (retest=true) to check them again")


# --- reading batches ----------------------------------------------------------------------


def _outcome_dict(row) -> dict[str, Any]:
    return {
        "outcome": row.outcome,
        "outcome_words": OUTCOME_WORDS[row.outcome],
        "reason": row.reason,
        "cause": row.cause,
        "signer_id": row.signer_id,
        "printed_name": row.printed_name,
        "signed_at": audit.utc_iso(row.signed_at),
    }


def _limits(info: Mapping[str, Any]) -> dict[str, Any]:
    """The frozen new-sample limits at the warning and the action level."""
    limits = info["limits"]
    return {
        "t2_limit": limits["action"]["t2_new"], "spe_limit": limits["action"]["spe"],
        "t2_warning_limit": limits["warning"]["t2_new"], "spe_warning_limit": limits["warning"]["spe"],
        "confidence": dict(info["confidence"]), "spe_method": limits.get("spe_method"),
    }


def _sample_dict(row, scores: list[float], limits: Mapping[str, Any], outcomes: list) -> dict[str, Any]:
    return {
        "sample": row.sample_id,
        "run_index": row.run_index,
        "batch_id": row.batch_id,
        "scores": scores,
        "t2": row.t2,
        "spe": row.spe,
        "t2_limit": limits["t2_limit"],
        "spe_limit": limits["spe_limit"],
        "t2_warning_limit": limits["t2_warning_limit"],
        "spe_warning_limit": limits["spe_warning_limit"],
        "t2_exceeds": row.t2_action,
        "spe_exceeds": row.spe_action,
        "t2_exceeds_warning": row.t2_warning,
        "spe_exceeds_warning": row.spe_warning,
        "incomplete": row.incomplete,
        "flagged": row.flagged,
        "rules": list(row.violations),
        "outcome": _outcome_dict(outcomes[-1]) if outcomes else None,
        "outcomes": [_outcome_dict(o) for o in outcomes],
    }


def _batch_dict(session, batch_id: int, info: Mapping[str, Any] | None = None) -> dict[str, Any]:
    batch = store.get_batch(session, batch_id)
    if batch is None:
        raise BatchNotFound(batch_id)
    info = info or reference.get_reference_model(batch.reference_model_id)
    samples = store.samples_of(session, batch.id)
    scores = store.arrays_of(session, [batch.id])[batch.id]["scores"].tolist()
    return _batch_answer(session, batch, info, samples, scores, store.outcomes_of(session, batch_id=batch.id))


def _batch_answer(session, batch, info: Mapping[str, Any], samples: list, scores: list[list[float]],
                  outcomes: Mapping[int, list]) -> dict[str, Any]:
    """The batch dict from its row, its samples in run order (rows with the ``BatchSample`` columns),
    their scores and their outcomes by sample row id."""
    limits = _limits(info)
    return {
        "id": batch.id,
        "reference_model_id": batch.reference_model_id,
        "reference_model": {"name": info["name"], "version": info["version"], "state": info["state"],
                            "document_sha256": info["document_sha256"]},
        "file_name": batch.file_name,
        "file_sha256": batch.file_sha256,
        "uploaded_by": batch.uploaded_by,
        "uploaded_by_name": display_names(session, [batch.uploaded_by]).get(batch.uploaded_by),
        "created_at": audit.utc_iso(batch.created_at),
        "n_samples": batch.n_samples,
        "n_flagged": batch.n_flagged,
        "state": batch.state,
        "reviewed_at": audit.utc_iso(batch.reviewed_at) if batch.reviewed_at else None,
        "retest": batch.retest,
        "warnings": list(batch.warnings),
        "limits": limits,
        "samples": [_sample_dict(s, scores[i], limits, outcomes.get(s.id, [])) for i, s in enumerate(samples)],
    }


def batch_info(batch_id) -> dict[str, Any]:
    """One batch with every sample, its limits, flags, run-rule violations and outcomes; BatchNotFound."""
    known = _known(batch_id)
    if known is None:
        raise BatchNotFound(batch_id)
    with session_scope() as session:
        return _batch_dict(session, known)


SAMPLE_COLUMNS = [
    "batch_id", "run_index", "sample", "t2", "spe", "t2_limit", "spe_limit", "t2_warning_limit",
    "spe_warning_limit", "t2_exceeds", "spe_exceeds", "t2_exceeds_warning", "spe_exceeds_warning", "incomplete",
    "flagged", "rules", "outcome", "reason", "cause", "signed_by", "signed_at_utc",
]


def _rules_text(rules: list[dict]) -> str:
    return "; ".join(f"{r['chart']}: {r['label']} ({r['source']})" for r in rules)


def _frame(samples: list[dict]) -> pd.DataFrame:
    n_components = max((len(s["scores"]) for s in samples), default=0)
    rows = []
    for s in samples:
        outcome = s["outcome"] or {}
        row = {k: s[k] for k in SAMPLE_COLUMNS[:15] if k in s}
        row["sample"] = s["sample"]
        row.update({f"PC{a + 1}": v for a, v in enumerate(s["scores"])})
        row.update(rules=_rules_text(s["rules"]), outcome=outcome.get("outcome", ""),
                   reason=outcome.get("reason", ""), cause=outcome.get("cause") or "",
                   signed_by=outcome.get("printed_name", ""), signed_at_utc=outcome.get("signed_at", ""))
        rows.append(row)
    scores = [f"PC{a + 1}" for a in range(n_components)]
    return pd.DataFrame(rows, columns=[*SAMPLE_COLUMNS[:3], *scores, *SAMPLE_COLUMNS[3:]])


def batch_samples_frame(batch_id) -> pd.DataFrame:
    """The batch's samples as a table (the CSV twin of ``batch_info``)."""
    return _frame(batch_info(batch_id)["samples"])


def sample_contributions(batch_id, sample_id) -> dict[str, Any]:
    """Contributions of one checked sample to its T² and SPE, classical and reconstruction-based.

    ``t2`` and ``spe``: ``PCAModel.contributions`` (Westerhuis, Gurden & Smilde
    2000; squared residuals), which sum to the statistic; ``reconstruction``:
    Alcala & Qin (2009), which point at a variable carrying a single large
    fault; ``explanation``: ``monitoring.explain_new_sample``.  Missing
    variables: null.  BatchNotFound, BatchSampleNotFound.
    """
    known = _known(batch_id)
    if known is None:
        raise BatchNotFound(batch_id)
    with session_scope() as session:
        batch = store.get_batch(session, known)
        if batch is None:
            raise BatchNotFound(batch_id)
        samples = store.samples_of(session, known)
        position = next((i for i, s in enumerate(samples) if s.sample_id == str(sample_id)), None)
        if position is None:
            raise BatchSampleNotFound(sample_id)
        row = samples[position]
        reference_model_id = batch.reference_model_id
        measured = store.arrays_of(session, [known], measured=True)[known]["measured"][position]
    info = reference.get_reference_model(reference_model_id)
    model = model_from_dict(reference.model_document(reference_model_id))
    names = list(model.variable_names_)
    x = pd.DataFrame([measured], columns=names, index=pd.Index([row.sample_id], name="sample"), dtype=np.float64)
    rbc = mon.reconstruction_contributions(model, x)
    levels = (info["confidence"]["warning"], info["confidence"]["action"])
    explanation = mon.explain_new_sample(model, x, confidence_levels=levels,
                                         spe_method=info["limits"]["spe_method"])
    missing = np.isnan(x.to_numpy()[0])

    def by_name(values) -> dict[str, float | None]:
        return {n: (None if missing[j] or not math.isfinite(v) else float(v))
                for j, (n, v) in enumerate(zip(names, np.asarray(values, dtype=np.float64).tolist()))}

    return {
        "batch_id": known,
        "sample": row.sample_id,
        "t2": by_name(model.contributions(x, kind="t2")),
        "spe": by_name(model.contributions(x, kind="spe")),
        "reconstruction": {"t2": by_name(rbc.t2[0]), "spe": by_name(rbc.spe[0])},
        "explanation": explanation,
    }


def _scores_in_run_order(session, columns: Mapping[str, list]) -> np.ndarray:
    """(n, A) scores of the chart's samples, from their batches' arrays."""
    first: dict[int, int] = {}
    for batch_id, run in zip(columns["batch_id"], columns["run_index"]):  # run order: a batch's first row
        first.setdefault(batch_id, run)
    arrays = store.arrays_of(session, first)
    order = list(first)
    start = dict(zip(order, np.cumsum([0] + [len(arrays[b]["scores"]) for b in order]).tolist()))
    stacked = np.concatenate([arrays[b]["scores"] for b in order])
    rows = [start[b] + run - first[b] for b, run in zip(columns["batch_id"], columns["run_index"])]
    return stacked[rows]


def _series_columns(session, reference_model_id: int) -> dict[str, list]:
    """Every checked sample in run order, column by column: sample, run_index, batch_id, t2, spe,
    scores (one list per component), flagged, outcome (the standing outcome's code or None)."""
    columns = store.chart_columns(session, reference_model_id)
    if not columns["id"]:
        return {"sample": [], "run_index": [], "batch_id": [], "t2": [], "spe": [], "scores": [], "flagged": [],
                "outcome": []}
    standing = {i: found[-1].outcome for i, found in
                store.outcomes_of(session, reference_model_id=reference_model_id).items()}
    return {
        "sample": columns["sample_id"],
        "run_index": columns["run_index"],
        "batch_id": columns["batch_id"],
        "t2": columns["t2"],
        "spe": columns["spe"],
        "scores": _scores_in_run_order(session, columns).T.tolist(),
        "flagged": columns["flagged"],
        "outcome": [standing.get(i) for i in columns["id"]] if standing else [None] * len(columns["id"]),
    }


def chart(reference_model_id, *, with_training: bool = True, derived: str | None = None) -> dict[str, Any]:
    """Every checked sample of a reference model in run order, with batch, T², SPE, limits, violations.

    ``series``: the checked samples column by column (``sample``,
    ``run_index``, ``batch_id``, ``t2``, ``spe``, ``scores`` - one list per
    component -, ``flagged``, ``outcome``); a point beyond a limit is read off
    ``limits``, the frozen new-sample limits at both levels.  Columns, not one
    object per sample: 100,000 samples stay a quick answer.  ``training``: the
    training samples under the frozen model, the points before the first
    batch (``reference_models.training_points``; omitted with
    ``with_training=False``); ``batches``: each batch's first and last run
    index (the batch boundaries); ``violations``: every run-rule violation
    with its rule, samples and batches; ``run_rules``: the rules of this
    reference model; ``derived`` (with ``derived=`` "ewma-t2", "mewma" or
    "combined"): that chart of the checked samples
    (``monitoring_charts.derived_chart``).
    """
    info = reference.get_reference_model(reference_model_id)
    with session_scope() as session:
        series = _series_columns(session, info["id"])
        fired = store.violations_of(session, info["id"])
        batches = store.batches_of(session, info["id"])
    bounds: dict[int, list[int]] = {}
    for batch_id, run in zip(series["batch_id"], series["run_index"]):
        bounds.setdefault(batch_id, [run, run])[1] = run
    answer = {
        "reference_model_id": info["id"],
        "name": info["name"],
        "version": info["version"],
        "limits": _limits(info),
        "run_rules": info["run_rules"],
        "n_training_samples": info["n_samples"],
        "n_samples": len(series["sample"]),
        "batches": [
            {"id": b.id, "file_name": b.file_name, "created_at": audit.utc_iso(b.created_at), "state": b.state,
             "n_samples": b.n_samples, "n_flagged": b.n_flagged,
             "first_run": bounds.get(b.id, [0, 0])[0], "last_run": bounds.get(b.id, [0, 0])[1]}
            for b in batches
        ],
        "series": series,
        "violations": [{**v, "fired_at_sample": sample, "fired_at_run": run}
                       for sample, run, violations in fired for v in violations],
    }
    if with_training:
        answer["training"] = reference.training_points(info["id"])
    if derived is not None:
        answer["derived"] = monitoring_charts.derived_chart(info, series, derived)
    return answer


def chart_frame(reference_model_id) -> pd.DataFrame:
    """Every checked sample of a reference model as a table, in run order (the CSV twin of
    ``chart``, with the columns of ``batch_samples_frame``)."""
    info = reference.get_reference_model(reference_model_id)
    with session_scope() as session:
        samples = [s for b in store.batches_of(session, info["id"]) for s in _batch_dict(session, b.id, info)["samples"]]
    return _frame(sorted(samples, key=lambda s: s["run_index"]))


# --- outcomes -----------------------------------------------------------------------------


def _check_outcome(outcome, reason, cause) -> tuple[str, str, str | None]:
    if outcome not in BATCH_OUTCOMES:
        raise InputError(f"outcome must be one of {', '.join(BATCH_OUTCOMES)}, got {str(outcome)[:60]!r}",
                         field="outcome")
    text = clean_text(reason, field="reason", limit=MAX_REASON_CHARS, required=True)
    found = clean_text(cause, field="cause", limit=MAX_COMMENT_CHARS, required=outcome == "assignable_cause")
    return outcome, text, found or None


def _check_samples(samples) -> list[str]:
    if not isinstance(samples, list) or not samples:
        raise InputError("samples must be a non-empty list of sample ids of this batch", field="samples")
    if len(samples) > MAX_SAMPLES_PER_OUTCOME:
        raise InputError(f"at most {MAX_SAMPLES_PER_OUTCOME} samples per outcome", field="samples")
    if not all(isinstance(s, str) for s in samples):
        raise InputError("samples must be sample ids given as text", field="samples")
    repeated = sorted({s for s in samples if samples.count(s) > 1}) if len(set(samples)) < len(samples) else []
    if repeated:
        raise InputError(f"sample(s) named more than once: {_listed(repeated)}", field="samples")
    return list(samples)


def _targets(session, batch_id: int, wanted: list[str]):
    """The batch's rows of ``wanted``; InputError for ids not in it or samples not flagged."""
    rows = {s.sample_id: s for s in store.samples_of(session, batch_id)}
    unknown = [s for s in wanted if s not in rows]
    if unknown:
        raise InputError(f"sample(s) not in batch {batch_id}: {_listed(unknown)}", field="samples")
    unflagged = [s for s in wanted if not rows[s].flagged]
    if unflagged:
        raise InputError(f"sample(s) not flagged in batch {batch_id}, so no outcome is recorded: "
                         f"{_listed(unflagged)}", field="samples")
    return [rows[s] for s in wanted], rows


def record_outcome(batch_id, samples, outcome, reason, password, user, cause=None) -> dict[str, Any]:
    """Sign an outcome for flagged samples of a batch after re-checking the signer's password.

    ``outcome`` is assignable_cause (``cause`` required), no_cause_accepted or
    rejected; ``reason`` is required.  Reviewers and admins sign; an outcome on
    a sample that is not flagged is an InputError (400); a wrong password is
    ReviewRefused (403, logged as ``sign_failed``).  The batch becomes
    *reviewed* once every flagged sample has an outcome.  Returns the batch dict.
    """
    if user.role not in CAN_SIGN:
        raise forbidden(f"a {user.role} cannot sign batch outcomes; reviewers can")
    outcome, text, found = _check_outcome(outcome, reason, cause)
    wanted = _check_samples(samples)
    known = _known(batch_id)
    with session_scope() as session:
        batch = store.get_batch(session, known) if known else None
        if batch is None:
            raise BatchNotFound(batch_id)
        _targets(session, known, wanted)
        reference_model_id = batch.reference_model_id
    info = reference.get_reference_model(reference_model_id)

    review.check_signing_password(
        user, password, dataset_id=info["dataset_id"],
        payload={"batch_id": known, "reference_model_id": info["id"], "attempted": outcome, "samples": wanted},
    )

    def work(session):
        targets, rows = _targets(session, known, wanted)
        signed_at = audit.now_utc()
        for row in targets:
            store.insert_outcome(session, batch_sample_id=row.id, outcome=outcome, reason=text, cause=found,
                                 signer_id=user.id, printed_name=user.display_name, signed_at=signed_at)
        decided = store.outcomes_of(session, batch_id=known)
        complete = all(decided.get(r.id) for r in rows.values() if r.flagged)
        batch = store.get_batch(session, known)
        reviewed_now = complete and batch.state == "open"
        if reviewed_now and not store.mark_reviewed(session, known, signed_at):
            raise conflict(f"batch {known} changed a moment ago; look again")
        audit.append(
            session, actor_id=user.id, actor_name=user.display_name, action="batch_outcome_signed",
            dataset_id=info["dataset_id"],
            payload={
                "batch_id": known, "reference_model_id": info["id"], "account": user.name,
                "printed_name": user.display_name, "samples": wanted, "outcome": outcome, "reason": text,
                "cause": found, "signed_at": audit.utc_iso(signed_at),
                "batch_state": "reviewed" if complete else batch.state,
            },
        )
        return _batch_dict(session, known, info)

    return review.run_write(work)
