"""The batch report as a PDF file, drawn with reportlab from ``batch_report.report_data``.

Same content as the HTML page: the reference model with its limits at both
levels, the batch file's SHA-256, uploader and time, each sample with T², SPE,
limits, flags, the run-rule violations, every signed outcome with printed
name and UTC time, the batch state and the review-log chain head at printing
time.  User text goes through ``xml.sax.saxutils.escape`` (reportlab
paragraphs read a small XML markup); fonts as in ``signoff_pdf.fonts``.
"""

from __future__ import annotations

from io import BytesIO
from typing import Any, Mapping

from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import ParagraphStyle
from reportlab.lib.units import mm
from reportlab.platypus import KeepTogether, Paragraph, SimpleDocTemplate, Spacer, TableStyle

from webapp.services.batch_report import report_data
from webapp.services.signoff_pdf import (
    CAUTION_EDGE,
    CAUTION_FILL,
    INK,
    MARGIN,
    MONO,
    WIDTH,
    _boxed,
    _footer,
    _Styles,
    _t,
    _table,
    fonts,
)

FLAGGED_FILL = CAUTION_FILL


def _facts(rows: list[tuple[str, str]], s: _Styles, *, mono: tuple[str, ...] = ()):
    return _table(
        [[Paragraph(k, s.head), Paragraph(v, s.mono if k in mono else s.small)] for k, v in rows],
        [46 * mm, WIDTH - 46 * mm], header=False,
    )


def _model(data: Mapping[str, Any], s: _Styles) -> list:
    m, lim = data["model"], data["limits"]
    facts = _facts(
        [("name", f"{_t(m['name'])} (id {m['id']}), version {m['version']}"), ("state", _t(m["state"])),
         ("model fingerprint", _t(m["fingerprint"])), ("model file SHA-256", _t(m["document_sha256"])),
         ("training data SHA-256", _t(m["training_sha256"])),
         ("training samples × components", f"{_t(m['n_samples'])} × {_t(m['n_components'])}")],
        s, mono=("model fingerprint", "model file SHA-256", "training data SHA-256"),
    )
    limits = _table(
        [[Paragraph(h, s.head) for h in ("limit for new samples", f"warning ({lim['warning_percent']})",
                                         f"action ({lim['action_percent']})")],
         [Paragraph("Hotelling's T² (F distribution)", s.small), Paragraph(lim["t2_warning"], s.num),
          Paragraph(lim["t2_action"], s.num)],
         [Paragraph(f"SPE ({_t(lim['spe_method'])})", s.small), Paragraph(lim["spe_warning"], s.num),
          Paragraph(lim["spe_action"], s.num)]],
        [WIDTH / 2, WIDTH / 4, WIDTH / 4],
    )
    return [Paragraph("Reference model", s.h2), facts, Spacer(0, 6), limits]


def _batch(data: Mapping[str, Any], s: _Styles) -> list:
    b, chain = data["batch"], data["chain"]
    state = f"<b>{_t(b['state'])}</b>" + (f" since {_t(b['reviewed_at'])} (UTC)" if b["reviewed_at"] else "")
    uploaded = f"by {_t(b['uploaded_by_name'])} at {_t(b['created_at'])} (UTC)"
    if b["retest"]:
        uploaded += " · recorded as a re-test"
    out = [
        Paragraph(f"Batch {b['id']}", s.h2),
        _facts(
            [("file", _t(b["file_name"])), ("file SHA-256", _t(b["file_sha256"])), ("uploaded", uploaded),
             ("samples, flagged", f"{b['n_samples']} samples, {b['n_flagged']} flagged"), ("state", state),
             ("review log", f"{_t(chain['status'])}<br/>chain head at printing: entry {_t(chain['head_seq'])}, "
                            f"<font face='{MONO}'>{_t(chain['head_hash'])}</font>"
                            + (f", written {_t(chain['head_at'])} (UTC)" if chain["head_at"] else ""))],
            s, mono=("file SHA-256",),
        ),
    ]
    out.extend(Paragraph(_t(w), s.muted) for w in b["warnings"])
    return out


def _samples(data: Mapping[str, Any], s: _Styles) -> list:
    head = ("run", "sample", "T²", "T² limit", "SPE", "SPE limit", "flags", "outcome")
    rows = [[Paragraph(h, s.head) for h in head]]
    shaded = []
    for k, x in enumerate(data["samples"], start=1):
        outcome = x["outcome"]["outcome_words"] if x["outcome"] else ("no outcome yet" if x["flagged"] else "—")
        rows.append([Paragraph(_t(x["run_index"]), s.num), Paragraph(_t(x["sample"]), s.small),
                     Paragraph(x["t2"], s.num), Paragraph(x["t2_limit"], s.num), Paragraph(x["spe"], s.num),
                     Paragraph(x["spe_limit"], s.num), Paragraph(_t(x["flags"]) or "—", s.small),
                     Paragraph(_t(outcome), s.small)])
        if x["flagged"]:
            shaded.append(("BACKGROUND", (0, k), (-1, k), FLAGGED_FILL))
    table = _table(rows, [11 * mm, 26 * mm, 15 * mm, 15 * mm, 15 * mm, 15 * mm, 42 * mm, WIDTH - 139 * mm])
    table.setStyle(TableStyle(shaded))
    return [
        Paragraph("Samples", s.h2), table,
        Paragraph("Limits are the action-level limits for new observations; the warning-level limits are in "
                  "the reference model's table.", s.muted),
    ]


def _violations(data: Mapping[str, Any], s: _Styles) -> list:
    out = [Paragraph("Run-rule violations", s.h2)]
    if not data["violations"]:
        return out + [Paragraph("No run rule fired at a sample of this batch.", s.muted)]
    rows = [[Paragraph(h, s.head) for h in ("fired at", "chart", "rule", "source", "samples (batches)")]]
    rows += [[Paragraph(_t(v["fired_at"]), s.small), Paragraph(_t(v["chart"]), s.small),
              Paragraph(f"{_t(v['label'])} ({_t(v['side'])})", s.small), Paragraph(_t(v["source"]), s.small),
              Paragraph(f"{_t(v['samples'])} ({_t(v['batches'])})", s.small)] for v in data["violations"]]
    return out + [_table(rows, [30 * mm, 14 * mm, 40 * mm, 40 * mm, WIDTH - 124 * mm])]


def _outcomes(data: Mapping[str, Any], s: _Styles) -> list:
    out = [Paragraph("Outcomes", s.h2)]
    if not data["outcomes"]:
        return out + [Paragraph("No outcome has been signed for this batch.", s.muted)]
    style = ParagraphStyle("sig", s.body, spaceAfter=0)
    for o in data["outcomes"]:
        text = f"<b>{_t(o['sample'])}: {_t(o['outcome_words'])}</b>"
        if not o["standing"]:
            text += " (superseded by a later outcome)"
        text += f"<br/>Reason: {_t(o['reason'])}"
        if o.get("cause"):
            text += f"<br/>Cause: {_t(o['cause'])}"
        text += f"<br/>Printed name: {_t(o['printed_name'])}<br/>Date and time (UTC): {_t(o['signed_at'])}"
        out += [KeepTogether([_boxed(Paragraph(text, style), edge=INK)]), Spacer(0, 4)]
    return out


def report_pdf(batch_id, *, printed_by: str | None = None) -> bytes:
    """The batch report as PDF bytes (A4); raises ``batches.BatchNotFound``."""
    data = report_data(batch_id, printed_by=printed_by)
    regular, bold = fonts()
    s = _Styles(regular, bold)
    batch, model = data["batch"], data["model"]
    printed = f"LatentDesk · printed {_t(data['printed_at'])} (UTC)"
    if data["printed_by"]:
        printed += f" by {_t(data['printed_by'])}"
    story = [
        Paragraph("Batch report", s.title),
        Paragraph(printed, s.muted),
        _boxed(Paragraph(_t(data["caution"]), ParagraphStyle("caution", s.body, fontSize=8.8, spaceAfter=0)),
               edge=CAUTION_EDGE, fill=CAUTION_FILL, left_only=True, width=3),
        *_model(data, s), *_batch(data, s), *_samples(data, s), *_violations(data, s), *_outcomes(data, s),
    ]
    buffer = BytesIO()
    title = f"Batch report · batch {batch['id']} · {model['name']} v{model['version']}"
    doc = SimpleDocTemplate(
        buffer, pagesize=A4, leftMargin=MARGIN, rightMargin=MARGIN, topMargin=MARGIN, bottomMargin=20 * mm,
        title=title, author="LatentDesk", creator="LatentDesk",
        subject=f"Batch {batch['id']} checked against {model['name']} v{model['version']}, "
                f"file SHA-256 {batch['file_sha256']}",
    )
    footer = _footer({"dataset": {"name": title}, "printed_at": data["printed_at"]}, regular)
    doc.build(story, onFirstPage=footer, onLaterPages=footer)
    return buffer.getvalue()
