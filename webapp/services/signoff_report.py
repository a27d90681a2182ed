"""The printable sign-off report: one self-contained HTML page per dataset (or proposal).

It carries what a paper record of the decision needs: the dataset's SHA-256,
the model fingerprints before and after, explained variance before and after
(table and a static SVG chart), principal angles, samples crossing a limit,
the reason, and every signature with printed name, UTC time and meaning
(21 CFR Part 11, 11.50), plus the review-log chain head at printing time so a
later rewrite of the log can be noticed against the paper.

``report_data`` gathers the content once; ``report_html`` renders it with the
autoescaping Jinja2 template ``webapp/templates/signoff_report.html``
(``webapp.services.templates``; user text is shown as text, never as HTML),
``webapp.services.signoff_pdf.report_pdf`` draws it as a PDF file.
"""

from __future__ import annotations

from typing import Any, Mapping

from markupsafe import Markup

from webapp.services import audit, exclusions, review, templates
from webapp.services.context import session_scope

CAUTION = (
    "Statistics support, and never replace, QA judgement and local procedures. An extreme sample is "
    "not necessarily a wrong one. LatentDesk provides technical controls in the spirit of 21 CFR Part 11 "
    "and EU GMP Annex 11; it does not claim compliance; that is the site's validation matter."
)
_STYLE = """
body{font-family:Georgia,'Times New Roman',serif;color:#1d2a31;max-width:900px;margin:2rem auto;padding:0 1rem;}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.15rem;border-bottom:1px solid #bbb;padding-bottom:.2rem;margin-top:2rem}
table{border-collapse:collapse;width:100%;margin:.5rem 0;font-size:.9rem}
th,td{border:1px solid #ccc;padding:.3rem .5rem;text-align:left;vertical-align:top}
td.num{text-align:right;font-variant-numeric:tabular-nums} .mono{font-family:monospace;font-size:.82rem;word-break:break-all}
.sig{border:1.5px solid #1d2a31;padding:.6rem .8rem;margin:.6rem 0} .muted{color:#5b6a74}
.caution{border-left:3px solid #8a3b12;padding:.4rem .7rem;background:#fbf4ef;font-size:.88rem}
.proposal{page-break-inside:avoid} @media print{.noprint{display:none}}
"""


def percent(value) -> str:
    """A ratio as a percentage with two decimals; empty for a missing value."""
    return "" if value is None else f"{100 * float(value):.2f}%"


def number(value) -> str:
    """A statistic or limit with three significant digits; a dash for a missing value."""
    return "–" if value is None else f"{float(value):.3g}"


def points(delta) -> str:
    """A change of explained variance in percentage points."""
    return "" if delta is None else f"{100 * delta:+.2f} points"


def angles_text(angles: list[float]) -> str:
    return ", ".join(f"{a:.2f}°" for a in angles) or "none"


def chain_status(chain: Mapping[str, Any]) -> str:
    """The verification result of the review log as one sentence."""
    if chain["intact"]:
        return str(chain["reason"])
    return f"BROKEN at entry {chain['broken_at']}: {chain['reason']}"


def variance_chart(explained: list[Mapping[str, Any]], width: int = 420, height: int = 180) -> dict | None:
    """Geometry of grouped bars of explained variance per component, before (grey) and after (teal).

    The template draws it as a static SVG: ``width``, ``height``, ``axis_y`` (the
    baseline), ``top_label`` (the largest share), ``label_y`` and ``columns``, one
    per component with its ``label``, ``label_x`` and ``bars`` (x, y, width,
    height, fill, title).  None when no component has a value.
    """
    rows = [r for r in explained if r.get("before") is not None or r.get("after") is not None]
    if not rows:
        return None
    top = max(max(r.get("before") or 0, r.get("after") or 0) for r in rows) or 1.0
    left, bottom, plot_h = 40, 24, height - 40
    slot = (width - left - 10) / len(rows)
    bar = max(4.0, slot * 0.35)
    columns = []
    for k, row in enumerate(rows):
        x0 = left + k * slot + slot * 0.1
        bars = []
        for j, (key, colour) in enumerate((("before", "#9aa5ab"), ("after", "#1f6f78"))):
            value = row.get(key)
            if value is None:
                continue
            h = plot_h * float(value) / top
            bars.append({"x": f"{x0 + j * bar:.1f}", "y": f"{height - bottom - h:.1f}", "width": f"{bar:.1f}",
                         "height": f"{h:.1f}", "fill": colour,
                         "title": f"PC{row['component']} {key}: {percent(value)}"})
        columns.append({"label": f"PC{row['component']}", "label_x": f"{x0 + bar:.1f}", "bars": bars})
    return {"width": width, "height": height, "left": left, "axis_y": height - bottom,
            "top_label": f"{100 * top:.0f}%", "label_y": height - 8, "columns": columns}


def _comparison(stored: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """The parts of a proposal's stored comparison (``review.preview``) that go on paper."""
    if not stored:
        return None
    compared = stored.get("compare") or {}

    def side(info):
        return {"fingerprint": info["fingerprint"], "n_samples": info["n_samples"], "excluded": list(info["excluded"])}

    return {
        "before": side(stored["before"]),
        "after": side(stored["after"]),
        "explained": list(compared.get("explained", [])),
        "principal_angles": list(compared.get("principal_angles") or []),
        "crossings": list(compared.get("crossings") or []),
        "methods": method_support(stored.get("methods")),
    }


def _flag_text(flag) -> str:
    return "–" if flag is None else ("beyond a limit" if flag else "within the limits")


def method_support(support: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """Which method flags each proposed sample (``method_comparison.proposal_support``), as the
    report prints it: rows of sample, classical, robust, supported by; and the note under them.
    None for a proposal stored before the robust option existed."""
    if not support:
        return None
    level = f"{100 * float(support['confidence']):g}%"
    note = (f"Both fits of the current model, {support['n_components']} component(s), limits at {level}; "
            "robust: ROBPCA score and orthogonal distances (Hubert, Rousseeuw & Vanden Branden 2005).")
    if support.get("robust_error"):
        note += f" No robust fit: {support['robust_error']}"
    rows = [{"sample": r["sample"], "classical": _flag_text(r["classical"]), "robust": _flag_text(r["robust"]),
             "supported_by": r["supported_by"]} for r in support["samples"]]
    return {"rows": rows, "note": note}


def _entries_by_proposal(entries: list[Mapping[str, Any]]) -> dict[int, list[dict[str, Any]]]:
    found: dict[int, list[dict[str, Any]]] = {}
    for e in entries:
        pid = (e.get("payload") or {}).get("proposal_id")
        if pid is not None:
            found.setdefault(pid, []).append(
                {"seq": e["seq"], "at": e["at"], "actor_name": e["actor_name"], "action": e["action"],
                 "summary": e.get("summary")}
            )
    return found


def report_data(dataset_id: int, proposal_id: int | None = None, *, printed_by: str | None = None) -> dict[str, Any]:
    """Everything the report shows, gathered once for the HTML page and the PDF file.

    Keys: ``dataset`` (id, name, sha256, n_samples, n_variables), ``approved_exclusions``,
    ``chain`` (intact, broken_at, reason, head_seq, head_hash, head_at: the chain head
    at printing), ``printed_at`` (UTC), ``printed_by``, ``caution`` and ``proposals``:
    the decided proposals of the dataset (or the one asked for), each with id, action,
    samples, state, proposed_by_name, created_at, reason_category, reason,
    ``comparison`` (before/after fingerprint,
    n_samples and excluded; explained, principal_angles, crossings; ``methods``, which
    method flags each proposed sample, see ``method_support``; None if none was stored), ``sign_off`` (printed_name, signed_at, meaning, comment; None if unsigned)
    and ``entries`` (its review-log entries: seq, at, actor_name, action, summary).

    Raises ``ingest.DatasetNotFound`` and ``review.ProposalNotFound`` (also for a
    proposal of another dataset).
    """
    from webapp.services import ingest

    dataset = ingest.dataset_info(dataset_id)
    if proposal_id is not None:
        proposal = review.get_proposal(proposal_id)
        if proposal["dataset_id"] != dataset_id:
            raise review.ProposalNotFound(proposal_id)
        proposals = [proposal]
    else:
        proposals = [p for p in review.list_proposals(dataset_id) if p["state"] in ("approved", "rejected")]
    by_proposal = _entries_by_proposal(review.log_for_dataset(dataset_id))
    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session)
        head = audit.chain_head_record(session)
    keep = ("id", "action", "samples", "state", "proposed_by_name", "created_at", "reason_category", "reason",
            "sign_off")
    return {
        "dataset": {"id": dataset_id, "name": dataset["name"], "sha256": dataset["sha256"],
                    "n_samples": dataset["n_samples"], "n_variables": dataset["n_variables"]},
        "approved_exclusions": exclusions.approved_exclusions(dataset_id),
        "chain": {"intact": intact, "broken_at": broken, "reason": reason,
                  "head_seq": head["seq"], "head_hash": head["hash"], "head_at": head["at"]},
        "printed_at": audit.utc_iso(audit.now_utc()),
        "printed_by": printed_by,
        "caution": CAUTION,
        "proposals": [
            {**{k: p[k] for k in keep}, "comparison": _comparison(p.get("comparison")),
             "entries": by_proposal.get(p["id"], [])}
            for p in proposals
        ],
    }


# --- HTML ---------------------------------------------------------------------------------


def report_html(dataset_id: int, proposal_id: int | None = None, *, printed_by: str | None = None) -> str:
    """The whole report as an HTML document (decided proposals, or the one asked for)."""
    data = report_data(dataset_id, proposal_id, printed_by=printed_by)
    proposals = [
        {**p, "chart": variance_chart(p["comparison"]["explained"]) if p["comparison"] else None}
        for p in data["proposals"]
    ]
    return templates.render(
        "signoff_report.html",
        **{**data, "proposals": proposals},
        style=Markup(_STYLE),  # our own constant; escaping would break the quoted font name
        chain_status=chain_status(data["chain"]),
        pdf_href=_pdf_href(proposal_id),
        percent=percent, number=number, points=points, angles_text=angles_text,
    )


def _pdf_href(proposal_id: int | None) -> str:
    """The PDF twin, relative to this page's URL (``.../report`` -> ``.../report.pdf``)."""
    return "report.pdf" if proposal_id is None else f"report.pdf?proposal={int(proposal_id)}"
