"""The sign-off report as a PDF file, drawn with reportlab from ``signoff_report.report_data``.

Same content as the HTML page: dataset SHA-256, model fingerprints before and
after, explained variance before and after (table and bar chart), principal
angles, samples crossing a limit, the reason, every signature with printed
name, UTC time and meaning (21 CFR Part 11, 11.50) and the review-log chain
head at printing time.  User text goes through ``xml.sax.saxutils.escape``
because reportlab paragraphs read a small XML markup: ``<b>`` typed by a user
is printed as text.

Fonts are TrueType and embedded, so µ, ², °, × and accented names print:
DejaVu Serif when reportlab finds it on ``rl_config.TTFSearchPath`` (a serif
face like the HTML page), otherwise the Bitstream Vera faces that ship inside
reportlab, so a server without system fonts still prints the report.
Hashes are set in Courier (one of the PDF standard fonts; hex digits only).
"""

from __future__ import annotations

from io import BytesIO
from typing import Any, Mapping
from xml.sax.saxutils import escape

from reportlab.graphics.charts.barcharts import VerticalBarChart
from reportlab.graphics.charts.legends import Legend
from reportlab.graphics.shapes import Drawing
from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import ParagraphStyle
from reportlab.lib.units import mm
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFError, TTFont
from reportlab.platypus import CondPageBreak, KeepTogether, Paragraph, SimpleDocTemplate, Spacer, Table, TableStyle

from webapp.services.signoff_report import angles_text, chain_status, number, percent, points, report_data

# (family name, regular, bold, italic, bold italic), in order of preference.
FONT_FAMILIES = (
    ("LD-DejaVuSerif", "DejaVuSerif.ttf", "DejaVuSerif-Bold.ttf", "DejaVuSerif-Italic.ttf",
     "DejaVuSerif-BoldItalic.ttf"),
    ("LD-Vera", "Vera.ttf", "VeraBd.ttf", "VeraIt.ttf", "VeraBI.ttf"),
)
MONO = "Courier"
INK = colors.HexColor("#1d2a31")
MUTED = colors.HexColor("#5b6a74")
RULE = colors.HexColor("#cccccc")
CAUTION_EDGE = colors.HexColor("#8a3b12")
CAUTION_FILL = colors.HexColor("#fbf4ef")
BEFORE = colors.HexColor("#9aa5ab")
AFTER = colors.HexColor("#1f6f78")
MARGIN = 18 * mm
WIDTH = A4[0] - 2 * MARGIN


def fonts() -> tuple[str, str]:
    """Register the first family of ``FONT_FAMILIES`` found (once per process); return its regular and bold names."""
    registered = set(pdfmetrics.getRegisteredFontNames())
    for family, *files in FONT_FAMILIES:
        names = [family, f"{family}-Bold", f"{family}-Italic", f"{family}-BoldItalic"]
        if family not in registered:
            try:
                faces = [TTFont(name, path) for name, path in zip(names, files)]
            except TTFError:
                continue
            for face in faces:
                pdfmetrics.registerFont(face)
            pdfmetrics.registerFontFamily(family, normal=names[0], bold=names[1], italic=names[2],
                                          boldItalic=names[3])
        return names[0], names[1]
    raise RuntimeError("no TrueType font for the PDF report: reportlab's bundled Vera.ttf is missing")


def _t(value: Any) -> str:
    """User or stored text, escaped for reportlab's paragraph markup."""
    return escape("" if value is None else str(value))


class _Styles:
    def __init__(self, regular: str, bold: str):
        base = ParagraphStyle("body", fontName=regular, fontSize=9.5, leading=12.5, textColor=INK,
                              spaceAfter=4)
        self.body = base
        self.small = ParagraphStyle("small", base, fontSize=8, leading=10, spaceAfter=0)
        self.num = ParagraphStyle("num", self.small, alignment=2)
        self.time = ParagraphStyle("time", self.small, fontSize=7)  # a full UTC timestamp fits one line
        self.head = ParagraphStyle("head", self.small, fontName=bold)
        self.mono = ParagraphStyle("mono", self.small, fontName=MONO, fontSize=7.5, leading=9.5)
        self.muted = ParagraphStyle("muted", base, textColor=MUTED)
        self.title = ParagraphStyle("title", base, fontName=bold, fontSize=17, leading=21, spaceAfter=2)
        self.h2 = ParagraphStyle("h2", base, fontName=bold, fontSize=12.5, leading=16, spaceBefore=10,
                                 spaceAfter=5)


def _table(rows: list[list[Any]], widths: list[float], *, header: bool = True) -> Table:
    table = Table(rows, colWidths=widths, repeatRows=1 if header else 0, hAlign="LEFT")
    style = [
        ("GRID", (0, 0), (-1, -1), 0.5, RULE),
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("TOPPADDING", (0, 0), (-1, -1), 3),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 3),
    ]
    table.setStyle(TableStyle(style))
    return table


def _boxed(flowable, *, edge, fill=None, left_only: bool = False, width: float = 1.5) -> Table:
    box = Table([[flowable]], colWidths=[WIDTH], hAlign="LEFT")
    style = [("LEFTPADDING", (0, 0), (-1, -1), 8), ("RIGHTPADDING", (0, 0), (-1, -1), 8),
             ("TOPPADDING", (0, 0), (-1, -1), 6), ("BOTTOMPADDING", (0, 0), (-1, -1), 6)]
    style.append(("LINEBEFORE", (0, 0), (0, 0), width, edge) if left_only else ("BOX", (0, 0), (-1, -1), width, edge))
    if fill is not None:
        style.append(("BACKGROUND", (0, 0), (-1, -1), fill))
    box.setStyle(TableStyle(style))
    return box


def variance_chart(explained: list[Mapping[str, Any]], font: str) -> Drawing | None:
    """Grouped bars of explained variance per component, before (grey) and after (teal), with a legend."""
    rows = [r for r in explained if r.get("before") is not None or r.get("after") is not None]
    if not rows:
        return None
    drawing = Drawing(WIDTH, 62 * mm)
    chart = VerticalBarChart()
    chart.x, chart.y, chart.height = 14 * mm, 9 * mm, 48 * mm
    chart.width = min(WIDTH - 48 * mm, 30 * mm * len(rows))  # bars keep a sober width for few components
    chart.data = [[r.get("before") for r in rows], [r.get("after") for r in rows]]
    chart.categoryAxis.categoryNames = [f"PC{r['component']}" for r in rows]
    chart.categoryAxis.labels.fontName = font
    chart.categoryAxis.labels.fontSize = 8
    chart.valueAxis.valueMin = 0
    chart.valueAxis.labelTextFormat = lambda v: f"{100 * v:.0f}%"
    chart.valueAxis.labels.fontName = font
    chart.valueAxis.labels.fontSize = 8
    chart.valueAxis.strokeColor = chart.categoryAxis.strokeColor = MUTED
    chart.barSpacing, chart.groupSpacing = 1, 8
    chart.bars.strokeColor = None
    chart.bars[0].fillColor, chart.bars[1].fillColor = BEFORE, AFTER
    legend = Legend()
    legend.x, legend.y = chart.x + chart.width + 8 * mm, 52 * mm
    legend.fontName, legend.fontSize = font, 8
    legend.dx = legend.dy = 7
    legend.deltay = 11
    legend.alignment = "right"  # swatch first, then its word
    legend.colorNamePairs = [(BEFORE, "before"), (AFTER, "after")]
    drawing.add(chart)
    drawing.add(legend)
    return drawing


def _comparison(c: Mapping[str, Any] | None, s: _Styles, font: str) -> list:
    if not c:
        return [Paragraph("No comparison was stored with this proposal.", s.muted)]
    before, after = c["before"], c["after"]
    fits = _table(
        [
            [Paragraph("", s.head), Paragraph("before", s.head), Paragraph("after", s.head)],
            [Paragraph("model fingerprint", s.small), Paragraph(_t(before["fingerprint"]), s.mono),
             Paragraph(_t(after["fingerprint"]), s.mono)],
            [Paragraph("samples in the fit", s.small), Paragraph(_t(before["n_samples"]), s.num),
             Paragraph(_t(after["n_samples"]), s.num)],
            [Paragraph("excluded", s.small), Paragraph(_t(", ".join(before["excluded"]) or "none"), s.small),
             Paragraph(_t(", ".join(after["excluded"]) or "none"), s.small)],
        ],
        [34 * mm, (WIDTH - 34 * mm) / 2, (WIDTH - 34 * mm) / 2],
    )
    explained = _table(
        [[Paragraph(h, s.head) for h in ("component", "explained before", "after", "change")]]
        + [
            [Paragraph(f"PC{r['component']}", s.small), Paragraph(percent(r.get("before")), s.num),
             Paragraph(percent(r.get("after")), s.num), Paragraph(points(r.get("delta")), s.num)]
            for r in c["explained"]
        ],
        [WIDTH / 4] * 4,
    )
    out = [fits, Spacer(0, 6), explained, Spacer(0, 6)]
    chart = variance_chart(c["explained"], font)
    if chart is not None:
        out.append(KeepTogether([
            Paragraph("Explained variance per component, before (grey) and after (teal).", s.muted), chart,
        ]))
    out.append(Paragraph(
        "Principal angles between the loading subspaces (Björck &amp; Golub 1973): "
        + _t(angles_text(c["principal_angles"])), s.body,
    ))
    if c["crossings"]:
        out.append(_table(
            [[Paragraph(h, s.head) for h in ("sample", "statistic", "before / limit", "after / limit", "change")]]
            + [
                [Paragraph(_t(x["sample"]), s.small), Paragraph(_t(x["statistic"].upper()), s.small),
                 Paragraph(f"{number(x.get('before'))} / {number(x.get('before_limit'))}", s.num),
                 Paragraph(f"{number(x.get('after'))} / {number(x.get('after_limit'))}", s.num),
                 Paragraph(_t(x["change"]), s.small)]
                for x in c["crossings"]
            ],
            [34 * mm, 22 * mm, 32 * mm, 32 * mm, WIDTH - 120 * mm],
        ))
    else:
        out.append(Paragraph("No sample crosses a T² or SPE limit between the two fits.", s.muted))
    if c.get("methods"):
        out.append(Spacer(0, 6))
        out.append(Paragraph("Which method flags each sample", s.head))
        out.append(_table(
            [[Paragraph(h, s.head) for h in ("sample", "classical fit (T², SPE)",
                                            "robust fit (score and orthogonal distance)", "supported by")]]
            + [[Paragraph(_t(r["sample"]), s.small), Paragraph(_t(r["classical"]), s.small),
                Paragraph(_t(r["robust"]), s.small), Paragraph(_t(r["supported_by"]), s.small)]
               for r in c["methods"]["rows"]],
            [34 * mm, 36 * mm, 44 * mm, WIDTH - 114 * mm],
        ))
        out.append(Paragraph(_t(c["methods"]["note"]), s.muted))
    return out


def _signature(p: Mapping[str, Any], s: _Styles):
    sig = p.get("sign_off")
    if sig:
        text = (
            f"<b>Signed: {_t(sig['meaning']).upper()}</b><br/>"
            f"Printed name: {_t(sig['printed_name'])}<br/>"
            f"Date and time (UTC): {_t(sig['signed_at'])}<br/>"
            f"Meaning: {_t(sig['meaning'])}<br/>"
            f"Comment: {_t(sig['comment']) or '—'}"
        )
    else:
        text = f"Not signed. State: {_t(p['state'])}"
    return _boxed(Paragraph(text, ParagraphStyle("sig", s.body, spaceAfter=0)), edge=INK)


def _entries(entries: list[Mapping[str, Any]], s: _Styles) -> Table:
    return _table(
        [[Paragraph(h, s.head) for h in ("log entry", "UTC", "person", "action", "what")]]
        + [
            [Paragraph(_t(e["seq"]), s.num), Paragraph(_t(e["at"]), s.time), Paragraph(_t(e["actor_name"]), s.small),
             Paragraph(_t(e["action"]), s.small), Paragraph(_t(e.get("summary")), s.small)]
            for e in entries
        ],
        [14 * mm, 44 * mm, 28 * mm, 20 * mm, WIDTH - 106 * mm],
    )


def _proposal(p: Mapping[str, Any], s: _Styles, font: str) -> list:
    return [
        CondPageBreak(70 * mm),
        Paragraph(f"Proposal {p['id']}: {_t(p['action'])} {_t(', '.join(p['samples']))}", s.h2),
        Paragraph(
            f"Proposed by {_t(p['proposed_by_name'])} at {_t(p['created_at'])} (UTC).<br/>"
            f"Reason category: {_t(p['reason_category'])}<br/>Reason: {_t(p['reason'])}",
            s.body,
        ),
        *_comparison(p["comparison"], s, font),
        Spacer(0, 4),
        KeepTogether([_signature(p, s)]),
        Spacer(0, 6),
        _entries(p["entries"], s),
    ]


def _footer(data: Mapping[str, Any], font: str):
    def draw(canvas, doc):
        label = f"{data['dataset']['name']} · printed {data['printed_at']} (UTC)"
        room = WIDTH - 25 * mm
        while pdfmetrics.stringWidth(label, font, 7.5) > room and len(label) > 1:
            label = label[:-2] + "…"
        canvas.saveState()
        canvas.setFont(font, 7.5)
        canvas.setFillColor(MUTED)
        canvas.drawString(MARGIN, 10 * mm, label)
        canvas.drawRightString(A4[0] - MARGIN, 10 * mm, f"page {doc.page}")
        canvas.restoreState()

    return draw


def report_pdf(dataset_id: int, proposal_id: int | None = None, *, printed_by: str | None = None) -> bytes:
    """The whole report as PDF bytes (A4): decided proposals of the dataset, or the one asked for.

    Raises what ``report_data`` raises for an unknown dataset or a proposal of another dataset.
    """
    data = report_data(dataset_id, proposal_id, printed_by=printed_by)
    regular, bold = fonts()
    s = _Styles(regular, bold)
    dataset, chain = data["dataset"], data["chain"]
    printed = f"LatentDesk · printed {_t(data['printed_at'])} (UTC)"
    if data["printed_by"]:
        printed += f" by {_t(data['printed_by'])}"
    facts = _table(
        [
            [Paragraph("dataset", s.head), Paragraph(f"{_t(dataset['name'])} (id {dataset['id']})", s.small)],
            [Paragraph("dataset SHA-256", s.head), Paragraph(_t(dataset["sha256"]), s.mono)],
            [Paragraph("samples × variables", s.head),
             Paragraph(f"{dataset['n_samples']} × {dataset['n_variables']}", s.small)],
            [Paragraph("approved exclusions now", s.head),
             Paragraph(_t(", ".join(data["approved_exclusions"]) or "none"), s.small)],
            [Paragraph("review log", s.head),
             Paragraph(f"{_t(chain_status(chain))}<br/>chain head at printing: entry {_t(chain['head_seq'])}, "
                       f"<font face='{MONO}'>{_t(chain['head_hash'])}</font>"
                       + (f", written {_t(chain['head_at'])} (UTC)" if chain["head_at"] else ""), s.small)],
        ],
        [42 * mm, WIDTH - 42 * mm],
        header=False,
    )
    story = [
        Paragraph("Sign-off report", s.title),
        Paragraph(printed, s.muted),
        facts,
        Spacer(0, 8),
        _boxed(Paragraph(_t(data["caution"]), ParagraphStyle("caution", s.body, fontSize=8.8, spaceAfter=0)),
               edge=CAUTION_EDGE, fill=CAUTION_FILL, left_only=True, width=3),
    ]
    for p in data["proposals"]:
        story.extend(_proposal(p, s, regular))
    if not data["proposals"]:
        story.append(Paragraph("No decided proposals for this dataset yet.", s.muted))
    buffer = BytesIO()
    doc = SimpleDocTemplate(
        buffer, pagesize=A4, leftMargin=MARGIN, rightMargin=MARGIN, topMargin=MARGIN, bottomMargin=20 * mm,
        title=f"Sign-off report · {dataset['name']}", author="LatentDesk", creator="LatentDesk",
        subject=f"Sign-off record of dataset {dataset['name']} (id {dataset['id']}), SHA-256 {dataset['sha256']}",
    )
    footer = _footer(data, regular)
    doc.build(story, onFirstPage=footer, onLaterPages=footer)
    return buffer.getvalue()
