"""The printable sign-off report: one self-contained HTML page per dataset (or proposal).

It carries what a paper record of the decision needs: the dataset's SHA-256,
the model fingerprints before and after, explained variance before and after
(table and a static SVG chart), principal angles, samples crossing a limit,
the reason, and every signature with printed name, UTC time and meaning
(21 CFR Part 11, 11.50), plus the review-log chain head at printing time so a
later rewrite of the log can be noticed against the paper.  Every piece of
user text is escaped (shown as text, never as HTML).  For a PDF, use the
browser's print dialog: no PDF library is bundled.
"""

from __future__ import annotations

from html import escape
from typing import Any, Mapping

from webapp.services import audit, review
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


def _pct(value) -> str:
    return "" if value is None else f"{100 * float(value):.2f}%"


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
                f'height="{h:.1f}" fill="{colour}"><title>PC{row["component"]} {key}: {_pct(value)}</title></rect>'
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


def _comparison_html(comparison: Mapping[str, Any] | None) -> str:
    if not comparison:
        return '<p class="muted">No comparison was stored with this proposal.</p>'
    before, after, compared = comparison["before"], comparison["after"], comparison.get("compare") or {}
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
    for row in compared.get("explained", []):
        delta = row.get("delta")
        out.append(
            f'<tr><td>PC{row["component"]}</td><td class="num">{_pct(row.get("before"))}</td>'
            f'<td class="num">{_pct(row.get("after"))}</td>'
            f'<td class="num">{"" if delta is None else f"{100 * delta:+.2f} points"}</td></tr>'
        )
    out.append("</table>")
    out.append(variance_svg(compared.get("explained", [])))
    angles = compared.get("principal_angles") or []
    out.append(
        "<p>Principal angles between the loading subspaces (Björck &amp; Golub 1973): "
        + _e(", ".join(f"{a:.2f}°" for a in angles) or "none")
        + "</p>"
    )
    crossings = compared.get("crossings") or []
    if crossings:
        out.append("<table><tr><th>sample</th><th>statistic</th><th>before / limit</th><th>after / limit</th>"
                   "<th>change</th></tr>")
        for c in crossings:
            out.append(
                f'<tr><td>{_e(c["sample"])}</td><td>{_e(c["statistic"].upper())}</td>'
                f'<td class="num">{_num(c.get("before"))} / {_num(c.get("before_limit"))}</td>'
                f'<td class="num">{_num(c.get("after"))} / {_num(c.get("after_limit"))}</td>'
                f'<td>{_e(c["change"])}</td></tr>'
            )
        out.append("</table>")
    else:
        out.append('<p class="muted">No sample crosses a T² or SPE limit between the two fits.</p>')
    return "".join(out)


def _num(value) -> str:
    return "–" if value is None else f"{float(value):.3g}"


def _proposal_html(p: Mapping[str, Any], entries: list[Mapping[str, Any]]) -> str:
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
        for e in entries
    )
    return (
        f'<section class="proposal"><h2>Proposal {p["id"]}: {_e(p["action"])} '
        f'{_e(", ".join(p["samples"]))}</h2>'
        f'<p>Proposed by {_e(p["proposed_by_name"])} at {_e(p["created_at"])} (UTC).<br>'
        f'Reason category: {_e(p["reason_category"])}<br>Reason: {_e(p["reason"])}</p>'
        + _comparison_html(p.get("comparison"))
        + signature
        + "<table><tr><th>log entry</th><th>UTC</th><th>person</th><th>action</th><th>what</th></tr>"
        + trail
        + "</table></section>"
    )


def report_html(dataset_id: int, proposal_id: int | None = None, *, printed_by: str | None = None) -> str:
    """The whole report as an HTML document (decided proposals, or the one asked for)."""
    from webapp.services import ingest

    dataset = ingest.dataset_info(dataset_id)
    if proposal_id is not None:
        proposal = review.get_proposal(proposal_id)
        if proposal["dataset_id"] != dataset_id:
            raise review.ProposalNotFound(proposal_id)
        proposals = [proposal]
    else:
        proposals = [p for p in review.list_proposals(dataset_id) if p["state"] in ("approved", "rejected")]
    entries = review.log_for_dataset(dataset_id)
    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session)
        head = audit.chain_head_summary(session)
    by_proposal: dict[int, list] = {}
    for e in entries:
        pid = (e.get("payload") or {}).get("proposal_id")
        if pid is not None:
            by_proposal.setdefault(pid, []).append(e)
    body = "".join(_proposal_html(p, by_proposal.get(p["id"], [])) for p in proposals) or (
        '<p class="muted">No decided proposals for this dataset yet.</p>'
    )
    printed = audit.utc_iso(audit.now_utc())
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>Sign-off report · {_e(dataset['name'])}</title><style>{_STYLE}</style></head><body>"
        f"<h1>Sign-off report</h1><p class='muted'>LatentDesk · printed {printed} (UTC)"
        + (f" by {_e(printed_by)}" if printed_by else "")
        + "</p>"
        f"<table><tr><th>dataset</th><td>{_e(dataset['name'])} (id {dataset_id})</td></tr>"
        f"<tr><th>dataset SHA-256</th><td class='mono'>{_e(dataset['sha256'])}</td></tr>"
        f"<tr><th>samples × variables</th><td>{dataset['n_samples']} × {dataset['n_variables']}</td></tr>"
        f"<tr><th>approved exclusions now</th><td>{_e(', '.join(review.approved_exclusions(dataset_id)) or 'none')}</td></tr>"
        f"<tr><th>review log</th><td>{_e(reason) if intact else 'BROKEN at entry ' + _e(broken) + ': ' + _e(reason)}<br>"
        f"chain head: entry {_e(head['seq'])}, <span class='mono'>{_e(head['hash'])}</span></td></tr></table>"
        f"<p class='caution'>{_e(CAUTION)}</p>"
        + body
        + "<p class='noprint muted'>Use the browser's Print command to print or save as PDF.</p></body></html>"
    )
