"""Every plot as a named figure with the numbers behind it one click away.

WCAG 2.2 success criterion 1.1.1 (Non-text Content) asks for a text alternative
that serves the same purpose as a chart; for a data plot that is its data.
``figure_rows`` reads a plotly figure dict (as Dash holds it, numeric arrays
possibly base64-encoded typed arrays, plotly.js "typed array spec") and returns
the plotted values; ``figure_table`` renders them as an html.Table. Neither
needs to know which builder in ``webapp.web.ui.figures`` drew the plot:

- a data trace (markers or bars) gives one row per point: its series, its label
  (the sample id or variable carried as ``text``), then x and y under the axis titles;
- decoration is left out: connecting lines and ellipses drawn without hover
  (``hoverinfo: skip``), legend-only entries (no coordinates), and the
  transparent ring that marks the picked sample;
- limit lines (``layout.shapes`` drawn by add_hline/add_vline) are listed with
  their value and the annotation placed on them, and curves in the legend (a T²
  ellipse) by name.

``plot_figure`` wraps a dcc.Graph in a container with role="figure" and an
accessible name, with a "Show the numbers" button (aria-expanded; WAI-ARIA
Authoring Practices, "Disclosure" pattern) and the region the table goes in;
the callbacks that fill it are in ``webapp.web.pages.plot_numbers``.
"""

from __future__ import annotations

import base64
import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
from dash import dcc, html

from webapp.web.ui import ids

MAX_ROWS = 1000  # rows listed per plot; the page's downloads give every number
TRANSPARENT = {"rgba(0,0,0,0)", "transparent"}
# The accessible name of each plot (its title on screen may add the axes in use).
PLOT_NAMES = {
    ids.GRAPH_VARIANCE: "Scree plot: variance explained per component",
    ids.GRAPH_VARIABLE_EXPLAINED: "Variance explained per variable",
    ids.GRAPH_SCORES: "Score plot",
    ids.GRAPH_LOADINGS: "Loadings",
    ids.GRAPH_T2_SPE: "Hotelling's T² against SPE",
    ids.GRAPH_T2_CHART: "Control chart of Hotelling's T²",
    ids.GRAPH_SPE_CHART: "Control chart of SPE",
    ids.GRAPH_OUTLIER_MAP: "Outlier map: score distance against orthogonal distance",
    ids.GRAPH_SPE_CONTRIB: "SPE contributions of the sample",
    ids.GRAPH_T2_CONTRIB: "T² contributions of the sample",
    ids.MON_CHART: "Control chart across every checked batch",
    ids.SCREENING_PLOT: "Respondent screening: longest run of identical answers against IRV",
}
SHOW, HIDE = "Show the numbers", "Hide the numbers"


@dataclass(frozen=True)
class PlotNumbers:
    """What a plot shows, as text: column headings, rows, limit lines and notes."""

    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    lines: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()


def decode_array(value: Any) -> list:
    """A plotly array as a plain list: lists and tuples as they are, a typed array
    spec ``{"dtype", "bdata"[, "shape"]}`` decoded (little-endian, plotly.js
    convention), a JSON-serialised JavaScript typed array (``{"0": .., "1": ..}``)
    in index order, a scalar or None as an empty list."""
    if value is None:
        return []
    if isinstance(value, np.ndarray):
        return value.ravel().tolist()
    if isinstance(value, (list, tuple)):
        return list(value)
    if isinstance(value, Mapping):
        if "bdata" in value and "dtype" in value:
            raw = base64.b64decode(value["bdata"])
            return np.frombuffer(raw, dtype=np.dtype(str(value["dtype"])).newbyteorder("<")).tolist()
        if value and all(str(k).isdigit() for k in value):
            return [value[k] for k in sorted(value, key=lambda k: int(k))]
    return []


def _text(value: Any) -> str:
    """A cell: numbers to four significant digits, missing values as an en dash."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return "–" if math.isnan(value) else f"{float(value):.4g}"
    return str(value)


def _title(part: Any) -> str:
    if isinstance(part, Mapping):
        part = part.get("text")
    return str(part or "").replace("<br>", " ").strip()


def _axis_title(layout: Mapping, axis: str) -> str:
    return _title((layout.get(axis) or {}).get("title"))


def _is_decoration(trace: Mapping) -> bool:
    if trace.get("hoverinfo") == "skip" or trace.get("visible") is False:
        return True
    if trace.get("type", "scatter") in ("scatter", "scattergl") and "markers" not in str(trace.get("mode", "markers")):
        return True
    colour = (trace.get("marker") or {}).get("color")
    return isinstance(colour, str) and colour.replace(" ", "") in TRANSPARENT


def _points(trace: Mapping) -> list[tuple[Any, Any, Any]]:
    xs, ys = decode_array(trace.get("x")), decode_array(trace.get("y"))
    n = max(len(xs), len(ys))
    if n == 0:
        return []
    xs = xs + [None] * (n - len(xs)) if xs else list(range(n))
    ys = ys + [None] * (n - len(ys)) if ys else list(range(n))
    texts = trace.get("text")
    labels = decode_array(texts) if not isinstance(texts, str) else [texts] * n
    labels = labels + [None] * (n - len(labels))
    return [(label, x, y) for label, x, y in zip(labels, xs, ys) if not (x is None and y is None)]


def _limit_lines(layout: Mapping) -> list[str]:
    """Horizontal and vertical lines of ``layout.shapes``, named by the annotation on them."""
    notes = [a for a in layout.get("annotations") or [] if a.get("text")]
    lines = []
    for shape in layout.get("shapes") or []:
        if shape.get("type", "line") != "line":
            continue
        for axis, lo, hi, along in (("y", "y0", "y1", "xref"), ("x", "x0", "x1", "yref")):
            spans = str(shape.get(along, ""))  # across the whole plot: "paper" or "x domain"
            if shape.get(lo) is None or shape.get(lo) != shape.get(hi) or not ("paper" in spans or "domain" in spans):
                continue
            value = shape[lo]
            names = [_title(a["text"]) for a in notes if a.get(axis) == value]
            label = names[0] if names else "line"
            lines.append(f"{label}: {axis} = {_text(value)}")
    return lines


def figure_rows(figure: Mapping | None, max_rows: int = MAX_ROWS) -> PlotNumbers:
    """The numbers a plotly figure dict shows (see the module docstring)."""
    figure = figure or {}
    layout = figure.get("layout") or {}
    x_title = _axis_title(layout, "xaxis") or "x"
    y_title = _axis_title(layout, "yaxis") or "y"
    series: list[tuple[str, list[tuple[Any, Any, Any]]]] = []
    curves: list[str] = []
    for i, trace in enumerate(figure.get("data") or []):
        if _is_decoration(trace):
            if trace.get("name") and trace.get("showlegend") is not False and decode_array(trace.get("x")):
                curves.append(f"{trace['name']}: drawn as a curve")
            continue
        points = _points(trace)
        if points:
            series.append((str(trace.get("name") or f"series {i + 1}"), points))
    has_label = any(label is not None for _, points in series for label, _, _ in points)
    columns = (["Series"] if len(series) > 1 else []) + (["Label"] if has_label else []) + [x_title, y_title]
    rows: list[tuple[str, ...]] = []
    total = sum(len(points) for _, points in series)
    for name, points in series:
        for label, x, y in points:
            if len(rows) >= max_rows:
                break
            cells = ([name] if len(series) > 1 else []) + ([_text(label)] if has_label else []) + [_text(x), _text(y)]
            rows.append(tuple(cells))
    notes = []
    if total > len(rows):
        notes.append(f"The first {len(rows)} of {total} points are listed; the download buttons give every number.")
    if not series:
        texts = [_title(a.get("text")) for a in layout.get("annotations") or [] if a.get("text")]
        notes.append(" ".join(texts) or "This plot shows no data.")
    return PlotNumbers(title=_title(layout.get("title")), columns=tuple(columns) if series else (),
                       rows=tuple(rows), lines=tuple(_limit_lines(layout) + curves), notes=tuple(notes))


def figure_table(figure: Mapping | None, name: str, max_rows: int = MAX_ROWS) -> html.Div:
    """The numbers of ``figure`` as an html.Table captioned with the plot's ``name``
    (and its title), its limit lines and notes as text."""
    numbers = figure_rows(figure, max_rows)
    caption = f"{name}: {numbers.title}" if numbers.title and numbers.title != name else name
    parts: list = []
    if numbers.columns:
        head = html.Thead(html.Tr([html.Th(c, scope="col") for c in numbers.columns]))
        body = html.Tbody([html.Tr([html.Td(cell) for cell in row]) for row in numbers.rows])
        parts.append(html.Div(html.Table([html.Caption(caption), head, body], className="ld-table ld-table-compact"),
                              className="ld-scroll ld-numbers-scroll", tabIndex=0, role="region",
                              **{"aria-label": f"Numbers of {name}"}))
    else:
        parts.append(html.P(caption, className="ld-strong"))
    if numbers.lines:
        parts.append(html.Ul([html.Li(line) for line in numbers.lines], className="ld-numbers-lines"))
    parts.extend(html.P(note, className="ld-muted ld-small") for note in numbers.notes)
    return html.Div(parts)



def plot_figure(graph: dcc.Graph, *extra, class_name: str = "ld-graph") -> html.Div:
    """``graph`` (its id one of PLOT_NAMES) as a named figure: the plot, ``extra``
    components (picture buttons), then the numbers disclosure."""
    graph_id = graph.id
    return html.Div(
        [
            graph,
            *extra,
            html.Button(SHOW, id=ids.plot_numbers_button(graph_id), n_clicks=0,
                        className="ld-link-button ld-numbers-toggle",
                        **{"aria-expanded": "false", "aria-controls": ids.plot_numbers(graph_id)}),
            html.Div(id=ids.plot_numbers(graph_id), className="ld-numbers", hidden=True),
            dcc.Store(id=ids.plot_numbers_version(graph_id)),
        ],
        className=class_name,
        role="figure",
        **{"aria-label": PLOT_NAMES[graph_id]},
    )


def numbers_view(clicks: int | None, figure: Mapping | None, name: str):
    """(table children, region hidden, aria-expanded, button text) after ``clicks`` presses."""
    if not (clicks or 0) % 2:
        return None, True, "false", SHOW
    return figure_table(figure, name), False, "true", HIDE
