"""The printable sign-off report: one self-contained HTML page per dataset (or proposal).

It carries what a paper record of the decision needs: the dataset's SHA-256,
the model fingerprints before and after, explained variance before and after
(table and a static SVG chart), principal angles, samples crossing a limit,
the reason, and every signature with printed name, UTC time and meaning
(21 CFR Part 11, 11.50), plus the review-log chain head at printing time so a
later rewrite of the log can be noticed against the paper.  Every piece of
user text is escaped (shown as text, never as HTML).

``report_data`` gathers the content once; ``report_html`` renders it as a
page, ``webapp.services.signoff_pdf.report_pdf`` as a PDF file.
"""

from __future__ import annotations

from html import escape
from typing import Any, Mapping

from webapp.services import audit, exclusions, review
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


def _e(value: Any) -> str:
    return escape("" if value is None else str(value))


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


def variance_svg(explained: list[Mapping[str, Any]], width: int = 420, height: int = 180) -> str:
    """Grouped bars of explained variance per component, before (grey) and after (teal)."""
    rows = [r for r in explained if r.get("before") is not None or r.get("after") is not None]
    if not rows:
        return ""
    top = max(max(r.get("before") or 0, r.get("after") or 0) for r in rows) or 1.0
    left, bottom, plot_h = 40, 24, height - 40
    slot = (width - left - 10) / len(rows)
    bar = max(4.0, slot * 0.35)
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" role="img" '
        f'aria-label="explained variance per component before and after">',
        f'<line x1="{left}" y1="{height - bottom}" x2="{width - 5}" y2="{height - bottom}" stroke="#555"/>',
        f'<text x="4" y="14" font-size="10" fill="#555">{100 * top:.0f}%</text>',
    ]
    for k, row in enumerate(rows):
        x0 = left + k * slot + slot * 0.1
        for j, (key, colour) in enumerate((("before", "#9aa5ab"), ("after", "#1f6f78"))):
            value = row.get(key)
            if value is None:
                continue
            h = plot_h * float(value) / top
            parts.append(
                f'<rect x="{x0 + j * bar:.1f}" y="{height - bottom - h:.1f}" width="{bar:.1f}" '
                f'height="{h:.1f}" fill="{colour}"><title>PC{row["component"]} {key}: {percent(value)}</title></rect>'
            )
        parts.append(
            f'<text x="{x0 + bar:.1f}" y="{height - 8}" font-size="10" text-anchor="middle">PC{row["component"]}</text>'
        )
    parts.append(
        f'<rect x="{width - 120}" y="6" width="10" height="10" fill="#9aa5ab"/>'
        f'<text x="{width - 106}" y="15" font-size="10">before</text>'
        f'<rect x="{width - 62}" y="6" width="10" height="10" fill="#1f6f78"/>'
        f'<text x="{width - 48}" y="15" font-size="10">after</text></svg>'
    )
    return "".join(parts)


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
    }


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
    ``chain`` (intact, broken_at, reason, head_seq, head_hash), ``printed_at`` (UTC),
    ``printed_by``, ``caution`` and ``proposals``: the decided proposals of the dataset
    (or the one asked for), each with id, action, samples, state, proposed_by_name,
    created_at, reason_category, reason, ``comparison`` (before/after fingerprint,
    n_samples and excluded; explained, principal_angles, crossings; None if none was
    stored), ``sign_off`` (printed_name, signed_at, meaning, comment; None if unsigned)
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
        head = audit.chain_head_summary(session)
    keep = ("id", "action", "samples", "state", "proposed_by_name", "created_at", "reason_category", "reason",
            "sign_off")
    return {
        "dataset": {"id": dataset_id, "name": dataset["name"], "sha256": dataset["sha256"],
                    "n_samples": dataset["n_samples"], "n_variables": dataset["n_variables"]},
        "approved_exclusions": exclusions.approved_exclusions(dataset_id),
        "chain": {"intact": intact, "broken_at": broken, "reason": reason,
                  "head_seq": head["seq"], "head_hash": head["hash"]},
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


def _comparison_html(comparison: Mapping[str, Any] | None) -> str:
    if not comparison:
        return '<p class="muted">No comparison was stored with this proposal.</p>'
    before, after = comparison["before"], comparison["after"]
    out = [
        "<table><tr><th></th><th>before</th><th>after</th></tr>",
        f'<tr><td>model fingerprint</td><td class="mono">{_e(before["fingerprint"])}</td>'
        f'<td class="mono">{_e(after["fingerprint"])}</td></tr>',
        f'<tr><td>samples in the fit</td><td class="num">{_e(before["n_samples"])}</td>'
        f'<td class="num">{_e(after["n_samples"])}</td></tr>',
        f'<tr><td>excluded</td><td>{_e(", ".join(before["excluded"]) or "none")}</td>'
        f'<td>{_e(", ".join(after["excluded"]) or "none")}</td></tr>',
        "</table>",
        "<table><tr><th>component</th><th>explained before</th><th>after</th><th>change</th></tr>",
    ]
    for row in comparison["explained"]:
        out.append(
            f'<tr><td>PC{row["component"]}</td><td class="num">{percent(row.get("before"))}</td>'
            f'<td class="num">{percent(row.get("after"))}</td>'
            f'<td class="num">{points(row.get("delta"))}</td></tr>'
        )
    out.append("</table>")
    out.append(variance_svg(comparison["explained"]))
    out.append(
        "<p>Principal angles between the loading subspaces (Björck &amp; Golub 1973): "
        + _e(angles_text(comparison["principal_angles"]))
        + "</p>"
    )
    if comparison["crossings"]:
        out.append("<table><tr><th>sample</th><th>statistic</th><th>before / limit</th><th>after / limit</th>"
                   "<th>change</th></tr>")
        for c in comparison["crossings"]:
            out.append(
                f'<tr><td>{_e(c["sample"])}</td><td>{_e(c["statistic"].upper())}</td>'
                f'<td class="num">{number(c.get("before"))} / {number(c.get("before_limit"))}</td>'
                f'<td class="num">{number(c.get("after"))} / {number(c.get("after_limit"))}</td>'
                f'<td>{_e(c["change"])}</td></tr>'
            )
        out.append("</table>")
    else:
        out.append('<p class="muted">No sample crosses a T² or SPE limit between the two fits.</p>')
    return "".join(out)


def _proposal_html(p: Mapping[str, Any]) -> str:
    sig = p.get("sign_off")
    if sig:
        signature = (
            '<div class="sig"><strong>Signed: ' + _e(sig["meaning"]).upper() + "</strong><br>"
            f'Printed name: {_e(sig["printed_name"])}<br>Date and time (UTC): {_e(sig["signed_at"])}<br>'
            f'Meaning: {_e(sig["meaning"])}<br>Comment: {_e(sig["comment"]) or "—"}</div>'
        )
    else:
        signature = f'<div class="sig">Not signed. State: {_e(p["state"])}</div>'
    trail = "".join(
        f'<tr><td class="num">{e["seq"]}</td><td>{_e(e["at"])}</td><td>{_e(e["actor_name"])}</td>'
        f'<td>{_e(e["action"])}</td><td>{_e(e.get("summary"))}</td></tr>'
        for e in p["entries"]
    )
    return (
        f'<section class="proposal"><h2>Proposal {p["id"]}: {_e(p["action"])} '
        f'{_e(", ".join(p["samples"]))}</h2>'
        f'<p>Proposed by {_e(p["proposed_by_name"])} at {_e(p["created_at"])} (UTC).<br>'
        f'Reason category: {_e(p["reason_category"])}<br>Reason: {_e(p["reason"])}</p>'
        + _comparison_html(p["comparison"])
        + signature
        + "<table><tr><th>log entry</th><th>UTC</th><th>person</th><th>action</th><th>what</th></tr>"
        + trail
        + "</table></section>"
    )


def report_html(dataset_id: int, proposal_id: int | None = None, *, printed_by: str | None = None) -> str:
    """The whole report as an HTML document (decided proposals, or the one asked for)."""
    data = report_data(dataset_id, proposal_id, printed_by=printed_by)
    dataset, chain = data["dataset"], data["chain"]
    body = "".join(_proposal_html(p) for p in data["proposals"]) or (
        '<p class="muted">No decided proposals for this dataset yet.</p>'
    )
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>Sign-off report · {_e(dataset['name'])}</title><style>{_STYLE}</style></head><body>"
        f"<h1>Sign-off report</h1><p class='muted'>LatentDesk · printed {data['printed_at']} (UTC)"
        + (f" by {_e(data['printed_by'])}" if data["printed_by"] else "")
        + "</p>"
        f"<table><tr><th>dataset</th><td>{_e(dataset['name'])} (id {dataset['id']})</td></tr>"
        f"<tr><th>dataset SHA-256</th><td class='mono'>{_e(dataset['sha256'])}</td></tr>"
        f"<tr><th>samples × variables</th><td>{dataset['n_samples']} × {dataset['n_variables']}</td></tr>"
        f"<tr><th>approved exclusions now</th><td>{_e(', '.join(data['approved_exclusions']) or 'none')}</td></tr>"
        f"<tr><th>review log</th><td>{_e(chain_status(chain))}<br>"
        f"chain head: entry {_e(chain['head_seq'])}, <span class='mono'>{_e(chain['head_hash'])}</span></td></tr></table>"
        f"<p class='caution'>{_e(data['caution'])}</p>"
        + body
        + "<p class='noprint muted'>Use the browser's Print command to print this page, or "
        f"<a href='{_pdf_href(proposal_id)}'>download the report as PDF</a>.</p></body></html>"
    )


def _pdf_href(proposal_id: int | None) -> str:
    """The PDF twin, relative to this page's URL (``.../report`` -> ``.../report.pdf``)."""
    return "report.pdf" if proposal_id is None else f"report.pdf?proposal={int(proposal_id)}"
