"""The printable batch report: one self-contained HTML page per checked batch.

It carries what a paper record of a batch review needs: the reference model
(name, version, state, fingerprint, model file SHA-256, new-sample limits at
the warning and the action level), the batch file's name and SHA-256, who
uploaded it and when, each sample with T², SPE, limits, flags and run-rule
violations, every signed outcome with printed name and UTC time (21 CFR Part
11, 11.50, in spirit), the batch state and the review-log chain head at
printing time, so a later rewrite of the log can be noticed against the paper.

``report_data`` gathers and formats the content once; ``report_html`` renders
it with the autoescaping Jinja2 template ``webapp/templates/batch_report.html``
(``webapp.services.templates``; user text is shown as text, never as HTML), and
``webapp.services.batch_pdf.report_pdf`` draws the same content as a PDF.
"""

from __future__ import annotations

from typing import Any, Mapping

from markupsafe import Markup

from webapp.services import audit, batches, templates
from webapp.services import reference_models as reference
from webapp.services.context import session_scope
from webapp.services.signoff_report import _STYLE, chain_status

CAUTION = (
    "Flags support, and never replace, QA judgement and site procedures; "
    "regulated use needs the site's own validation."
)
STYLE = _STYLE + "tr.flagged td{background:#fbf4ef}\n"


def stat(value) -> str:
    """A statistic or limit with four significant digits; a dash for a missing value."""
    return "–" if value is None else f"{float(value):.4g}"


def _percent(level: float) -> str:
    return f"{100 * float(level):g} %"


def _flags(sample: Mapping[str, Any]) -> str:
    """The sample's flags in words: limits crossed (action, else warning) and the rules fired."""
    words = []
    for key, name in (("t2", "T²"), ("spe", "SPE")):
        if sample[f"{key}_exceeds"]:
            words.append(f"{name} beyond action")
        elif sample[f"{key}_exceeds_warning"]:
            words.append(f"{name} beyond warning")
    words.extend(f"run rule on {r['chart']}" for r in sample["rules"])
    if sample["incomplete"]:
        words.append("incomplete (scored by projection)")
    return "; ".join(words)


def _violation(sample: Mapping[str, Any], rule: Mapping[str, Any]) -> dict[str, str]:
    return {
        "fired_at": f"{sample['sample']} (run {sample['run_index']})",
        "chart": str(rule["chart"]),
        "label": str(rule["label"]),
        "side": str(rule["side"]),
        "source": str(rule["source"]),
        "samples": ", ".join(str(s) for s in rule["samples"]),
        "batches": ", ".join(f"batch {b}" for b in rule["batches"]),
    }


def _outcomes(samples: list[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Every signed outcome, oldest first per sample; ``standing`` marks the latest one."""
    out = []
    for s in samples:
        for k, o in enumerate(s["outcomes"]):
            out.append({"sample": s["sample"], "standing": k == len(s["outcomes"]) - 1, **o})
    return out


def report_data(batch_id, *, printed_by: str | None = None) -> dict[str, Any]:
    """Everything the batch report shows, formatted once for the HTML page and the PDF file.

    Keys: ``batch`` (``batches.batch_info`` without its samples), ``model`` (the
    reference model dict), ``limits`` (formatted new-sample limits at both
    levels), ``samples`` (run_index, sample, t2, spe, limits as text, flagged,
    flags, outcome), ``violations`` (rule firings at the batch's samples),
    ``outcomes`` (every signed outcome with ``standing``), ``chain`` (status,
    head_seq, head_hash, head_at: the chain head at printing), ``printed_at`` (UTC),
    ``printed_by``, ``caution``.

    Raises ``batches.BatchNotFound``.
    """
    info = batches.batch_info(batch_id)
    model = reference.get_reference_model(info["reference_model_id"])
    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session)
        head = audit.chain_head_record(session)
    chain = {"intact": intact, "broken_at": broken, "reason": reason}
    limits = info["limits"]
    samples = info["samples"]
    return {
        "batch": {k: v for k, v in info.items() if k != "samples"},
        "model": model,
        "limits": {
            "warning_percent": _percent(limits["confidence"]["warning"]),
            "action_percent": _percent(limits["confidence"]["action"]),
            "t2_warning": stat(limits["t2_warning_limit"]), "t2_action": stat(limits["t2_limit"]),
            "spe_warning": stat(limits["spe_warning_limit"]), "spe_action": stat(limits["spe_limit"]),
            "spe_method": limits.get("spe_method") or "",
        },
        "samples": [
            {"run_index": s["run_index"], "sample": s["sample"], "t2": stat(s["t2"]), "spe": stat(s["spe"]),
             "t2_limit": stat(s["t2_limit"]), "spe_limit": stat(s["spe_limit"]), "flagged": s["flagged"],
             "flags": _flags(s), "outcome": s["outcome"]}
            for s in samples
        ],
        "violations": [_violation(s, r) for s in samples for r in s["rules"]],
        "outcomes": _outcomes(samples),
        "chain": {"status": chain_status(chain), "head_seq": head["seq"], "head_hash": head["hash"],
                  "head_at": head["at"]},
        "printed_at": audit.utc_iso(audit.now_utc()),
        "printed_by": printed_by,
        "caution": CAUTION,
    }


def report_html(batch_id, *, printed_by: str | None = None) -> str:
    """The batch report as an HTML document; raises ``batches.BatchNotFound``."""
    data = report_data(batch_id, printed_by=printed_by)
    return templates.render("batch_report.html", style=Markup(STYLE), **data)  # our constant: kept as CSS
