"""Pure Plotly figure builders for the exploration pages.

Every function here takes plain numbers (numpy arrays, lists, dicts, pandas
objects) and returns a ``plotly.graph_objects.Figure``. Nothing here knows
about Dash, the store or the cache, so each builder can be tested on data.

Numeric arrays are handed to Plotly as numpy arrays so that Plotly serialises
them as binary (base64 typed arrays) rather than long JSON number lists.
Above ``WEBGL_THRESHOLD`` points a scatter is drawn with WebGL (Scattergl).

References
----------
Cattell, R.B. (1966) The scree test for the number of factors.
    Multivariate Behavioral Research 1, 245-276.
Gabriel, K.R. (1971) The biplot graphic display of matrices with application
    to principal component analysis. Biometrika 58, 453-467.
Tracy, N.D., Young, J.C., Mason, R.L. (1992) Multivariate control charts for
    individual observations. Journal of Quality Technology 24(2), 88-95.
Westerhuis, J.A., Gurden, S.P., Smilde, A.K. (2000) Generalized contribution
    plots in multivariate statistical process monitoring. Chemometrics and
    Intelligent Laboratory Systems 51, 95-114.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
import plotly.colors as pcolors
import plotly.graph_objects as go

# Okabe, M., Ito, K. (2008) Color Universal Design: a colour-blind-safe set of eight.
OKABE_ITO = (
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#009E73",  # bluish green
    "#F0E442",  # yellow
    "#0072B2",  # blue
    "#D55E00",  # vermillion
    "#CC79A7",  # reddish purple
    "#000000",  # black
)
MISSING_COLOUR = "#9a9a9a"
POINT_COLOUR = "#3b5b7a"  # neutral slate for uncoloured points
FLAG_COLOUR = "#D55E00"  # vermillion: beyond a limit
POSITIVE_COLOUR = "#0072B2"
NEGATIVE_COLOUR = "#E69F00"
# Cividis stays readable for the common colour-vision deficiencies
# (Nuñez, Anderton & Renslow 2018, PLoS ONE 13(7) e0199239).
CONTINUOUS_SCALE = "Cividis"
# Symbols that both SVG and WebGL scatters draw.
SYMBOLS = ("circle", "square", "diamond", "cross", "x", "triangle-up", "triangle-down", "star")
WEBGL_THRESHOLD = 2000
CV_FLOOR = -20.0  # lowest cross-validated share (%) drawn in the variance figure
# A metadata column with at most this many distinct numeric values is coloured as groups.
MAX_NUMERIC_GROUPS = 8
# Above this many points, hover shows the sample id only (keeps the payload small).
HOVER_METADATA_LIMIT = 20000

_FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif"
_GRID = "#e6e8eb"
_AXIS = "#5b6570"
_LIMIT_STYLES = {0.95: "dash", 0.99: "solid"}

TEMPLATE = go.layout.Template(
    layout=go.Layout(
        font=dict(family=_FONT, size=13, color="#24303b"),
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        colorway=list(OKABE_ITO),
        margin=dict(l=64, r=24, t=48, b=56),
        hoverlabel=dict(font=dict(family=_FONT, size=12)),
        legend=dict(bgcolor="rgba(255,255,255,0.85)", borderwidth=0, font=dict(size=12)),
        xaxis=dict(gridcolor=_GRID, zerolinecolor="#c9cdd2", linecolor=_AXIS, ticks="outside",
                   tickcolor=_AXIS, automargin=True, title=dict(standoff=8)),
        yaxis=dict(gridcolor=_GRID, zerolinecolor="#c9cdd2", linecolor=_AXIS, ticks="outside",
                   tickcolor=_AXIS, automargin=True, title=dict(standoff=8)),
        title=dict(font=dict(size=15), x=0.0, xanchor="left", xref="paper"),
    )
)


# ----------------------------------------------------------------- helpers
def scatter_class(n_points: int):
    """``go.Scattergl`` above WEBGL_THRESHOLD points, ``go.Scatter`` otherwise."""
    return go.Scattergl if n_points > WEBGL_THRESHOLD else go.Scatter


def component_label(index: int, explained_ratio: Sequence[float] | None = None) -> str:
    """Axis title for component ``index`` (0-based): 'PC1 (41.2%)'."""
    name = f"PC{index + 1}"
    if explained_ratio is not None and index < len(explained_ratio):
        return f"{name} ({100.0 * float(explained_ratio[index]):.1f}%)"
    return name


def _base_figure(title: str | None = None, height: int | None = None) -> go.Figure:
    fig = go.Figure()
    # uirevision keeps zoom and legend clicks across redraws; a falsy selectionrevision makes
    # plotly.js draw the selection each new figure carries, never an earlier drag's
    # (plotly.js reference, layout.uirevision and layout.selectionrevision).
    fig.update_layout(template=TEMPLATE, title_text=title, height=height, uirevision="keep",
                      selectionrevision=False)
    return fig


def _as_float(values) -> np.ndarray:
    return np.asarray(values, dtype=np.float64)


def id_text(values, n: int) -> np.ndarray:
    """Labels as an object array, escaped for Plotly (vectorised: 100,000 ids are common)."""
    if values is None:
        return np.arange(1, n + 1).astype(str).astype(object)
    text = pd.Series(values, dtype=object).astype(str)
    joined = "".join(text)  # one scan of all ids is far quicker than a pattern per id
    if "<" in joined or ">" in joined or "&" in joined:
        text = text.str.replace("&", "&amp;", regex=False).str.replace("<", "&lt;", regex=False).str.replace(
            ">", "&gt;", regex=False)
    return text.to_numpy(dtype=object)


def selection_mask(sample_ids, selected, n: int) -> np.ndarray | None:
    """True for each row whose sample id is in ``selected`` (ids as text; unknown ids are
    ignored); None when no row is, so nothing is drawn as selected. One hash lookup per
    row (``pd.Index.isin``): 100,000 rows take milliseconds."""
    if selected is None or len(selected) == 0:
        return None
    keys = np.arange(1, n + 1).astype(str) if sample_ids is None else pd.Series(sample_ids, dtype=object).astype(str)
    mask = pd.Index(keys).isin([str(s) for s in selected])
    return mask if mask.any() else None


def selected_points(mask: np.ndarray | None, rows) -> np.ndarray | None:
    """Plotly's ``selectedpoints`` of a trace drawing ``rows`` (indices or a boolean mask):
    the positions within the trace of the selected rows; None when nothing is selected.
    With a selection, every point trace gets a list (empty: all its points dimmed), which
    is how plotly.js styles a box or lasso selection (plotly.js reference, selectedpoints)."""
    if mask is None:
        return None
    return np.flatnonzero(mask[rows]).astype(np.int32)


def is_numeric_column(values) -> bool:
    """True when every non-missing value is a number and there are more than
    MAX_NUMERIC_GROUPS distinct values (few distinct codes read better as groups).
    Common practice."""
    series = pd.Series(values, dtype=object)
    # A text value among the first few rows settles it without converting every row.
    head = series.iloc[:400]
    head = head[head.notna() & (head.astype(str).str.strip() != "")]
    if pd.to_numeric(head.iloc[:200], errors="coerce").isna().any():
        return False
    present = series[series.notna() & (series.astype(str).str.strip() != "")]
    if present.empty:
        return False
    numbers = pd.to_numeric(present, errors="coerce")
    if numbers.isna().any():
        return False
    return int(numbers.nunique()) > MAX_NUMERIC_GROUPS


def _group_labels(values) -> tuple[np.ndarray, list[str]]:
    """Text label per point ('(missing)' for empty) and the group order."""
    codes, uniques = pd.factorize(pd.Series(values, dtype=object), use_na_sentinel=True)
    # Work on the distinct values only (a column of 100,000 rows has a handful of groups).
    names = np.array([str(u) for u in uniques] + ["(missing)"], dtype=object)
    names[[not name.strip() for name in names]] = "(missing)"
    arr = names[codes]  # the NA code -1 picks the last name, '(missing)'
    present = [g for g in pd.unique(names[np.unique(codes)]) if g != "(missing)"]
    try:
        order = sorted(present, key=lambda g: float(g))
    except ValueError:
        order = sorted(present, key=str.casefold)
    if (arr == "(missing)").any():
        order.append("(missing)")
    return arr, order


def group_colours(groups: Sequence[str]) -> dict[str, str]:
    """Okabe-Ito colour per group in order (cycled after eight); grey for '(missing)'."""
    colours = {}
    i = 0
    for g in groups:
        if g == "(missing)":
            colours[g] = MISSING_COLOUR
        else:
            colours[g] = OKABE_ITO[i % len(OKABE_ITO)]
            i += 1
    return colours


def ellipse_semi_axes(t2_limit: float, eigenvalue_x: float, eigenvalue_y: float) -> tuple[float, float]:
    """Semi-axes of the Hotelling T2 ellipse in a score plot.

    The ellipse is the set of scores with t_x^2/lambda_x + t_y^2/lambda_y = limit,
    so its semi-axis along component a is sqrt(limit * lambda_a)
    (Tracy, Young & Mason 1992 give the limit for training samples).
    """
    return float(np.sqrt(t2_limit * eigenvalue_x)), float(np.sqrt(t2_limit * eigenvalue_y))


def ellipse_points(t2_limit: float, eigenvalue_x: float, eigenvalue_y: float, n: int = 181):
    """x, y arrays tracing the T2 ellipse centred on the origin (scores are centred)."""
    ax, ay = ellipse_semi_axes(t2_limit, eigenvalue_x, eigenvalue_y)
    theta = np.linspace(0.0, 2.0 * np.pi, n)
    return ax * np.cos(theta), ay * np.sin(theta)


def _confidence_text(confidence: float) -> str:
    return f"{100.0 * confidence:g}%"


def plain(text) -> str:
    """User text made safe for Plotly labels: Plotly reads a small HTML subset in
    labels, so '<', '>' and '&' are written as entities and show as typed."""
    return html.escape(str(text), quote=False)


def _hover_metadata(metadata: pd.DataFrame | None, n: int, max_columns: int = 4) -> np.ndarray | None:
    """Per-point 'column: value' lines for hover (None when too many points)."""
    if metadata is None or metadata.shape[1] == 0 or n > HOVER_METADATA_LIMIT:
        return None
    lines = []
    for col in list(metadata.columns[:max_columns]):
        vals = metadata[col].astype(object).where(metadata[col].notna(), "")
        lines.append([f"{plain(col)}: {plain(v)}" for v in vals])
    return np.array(["<br>".join(parts) for parts in zip(*lines)], dtype=object)


# ------------------------------------------------------------- variance
def variance_figure(
    explained_ratio: Sequence[float],
    cv_cumulative: Sequence[float] | None = None,
    recommended: int | None = None,
    chosen: int | None = None,
) -> go.Figure:
    """Scree figure (Cattell 1966): explained variance per component as bars,
    the cumulative share as a line, the cross-validated cumulative share
    (Wold 1978) as a second line and the recommended component count marked.

    ``explained_ratio`` and ``cv_cumulative`` are fractions (0..1) per component.
    """
    ratio = _as_float(explained_ratio)
    k = np.arange(1, ratio.size + 1)
    fig = _base_figure("Variance explained", height=380)
    fig.add_trace(go.Bar(x=k, y=100.0 * ratio, name="Per component", marker_color="#56B4E9",
                         hovertemplate="PC%{x}: %{y:.1f}%<extra></extra>"))
    fig.add_trace(go.Scatter(x=k, y=100.0 * np.cumsum(ratio), name="Cumulative", mode="lines+markers",
                             line=dict(color="#0072B2", width=2),
                             hovertemplate="%{x} components: %{y:.1f}%<extra>cumulative</extra>"))
    if cv_cumulative is not None:
        cv = _as_float(cv_cumulative)
        fig.add_trace(go.Scatter(x=np.arange(1, cv.size + 1), y=100.0 * cv, name="Cumulative, cross-validated",
                                 mode="lines+markers", line=dict(color="#D55E00", width=2, dash="dash"),
                                 marker=dict(symbol="diamond"),
                                 hovertemplate="%{x} components: %{y:.1f}% predicted<extra>cross-validated</extra>"))
    if recommended is not None:
        fig.add_vline(x=recommended, line=dict(color="#009E73", width=2, dash="dot"),
                      annotation_text=f"recommended: {recommended}", annotation_position="top",
                      annotation_font_color="#00664a")
    if chosen is not None and chosen != recommended:
        fig.add_vline(x=chosen, line=dict(color="#5b6570", width=1), annotation_text=f"in use: {chosen}",
                      annotation_position="bottom right")
    fig.update_xaxes(title_text="Number of components", tickmode="array", tickvals=k, range=[0.4, ratio.size + 0.6])
    fig.update_yaxes(title_text="Variance explained (%)", range=[0, 102])
    if cv_cumulative is not None and np.nanmin(np.append(100.0 * _as_float(cv_cumulative), 0.0)) < 0:
        # Over-fitted counts can predict far worse than the mean (large negative shares):
        # keep the useful range readable and say that the curve leaves it.
        fig.update_yaxes(range=[CV_FLOOR, 102])
        fig.add_annotation(text=f"cross-validated values below {CV_FLOOR:g}% run off the chart", showarrow=False,
                           xref="paper", yref="paper", x=1, y=0.02, xanchor="right",
                           font=dict(size=11, color="#5b6570"))
    fig.update_layout(legend=dict(orientation="h", y=-0.22, x=0), bargap=0.35)
    return fig


def variable_explained_figure(variables: Sequence[str], fraction: Sequence[float]) -> go.Figure:
    """Share of each variable's variance explained by the model (horizontal bars, lowest first)."""
    frac = _as_float(fraction)
    names = np.array([plain(v) for v in variables], dtype=object)
    order = np.argsort(frac, kind="stable")
    fig = _base_figure("Variance explained per variable", height=max(300, 22 * frac.size + 110))
    fig.add_trace(go.Bar(x=100.0 * frac[order], y=names[order], orientation="h", marker_color="#0072B2",
                         hovertemplate="%{y}: %{x:.1f}%<extra></extra>", name="explained"))
    fig.update_xaxes(title_text="Explained by the model (%)", range=[0, 100])
    fig.update_yaxes(title_text=None, type="category")
    return fig


# ---------------------------------------------------------------- scores
def score_figure(
    scores,
    explained_ratio: Sequence[float],
    *,
    x: int = 0,
    y: int = 1,
    sample_ids: Sequence[str] | None = None,
    colour_values=None,
    colour_name: str | None = None,
    symbol_values=None,
    symbol_name: str | None = None,
    labels: bool = False,
    eigenvalues: Sequence[float] | None = None,
    t2_limits: Mapping[float, float] | None = None,
    metadata: pd.DataFrame | None = None,
    highlight: Sequence[int] = (),
    selected: Sequence[str] | None = None,
) -> go.Figure:
    """Score plot of component ``x`` against component ``y`` (0-based).

    Colour by a metadata column (groups: Okabe-Ito palette; numbers: a continuous
    scale with a colour bar), marker symbol by a second column, labels optional,
    and Hotelling T2 ellipses for each ``t2_limits`` entry {confidence: limit}
    (semi-axes from ``ellipse_semi_axes``). Every point carries its row index in
    ``customdata`` so a click or selection maps back to the sample.
    ``highlight`` rows are ringed (e.g. rows picked in the outlier table); the samples
    named in ``selected`` are drawn as selected (``selection_mask``).
    """
    t = np.asarray(scores, dtype=np.float64)
    n = t.shape[0]
    if n > WEBGL_THRESHOLD:
        return large_score_figure(t, explained_ratio, x=x, y=y, sample_ids=sample_ids, colour_values=colour_values,
                                  colour_name=colour_name, symbol_values=symbol_values, symbol_name=symbol_name,
                                  labels=labels, eigenvalues=eigenvalues, t2_limits=t2_limits, highlight=highlight,
                                  selected=selected)
    tx, ty = np.ascontiguousarray(t[:, x]), np.ascontiguousarray(t[:, y])
    ids = id_text(sample_ids, n)
    rows = np.arange(n, dtype=np.int32)
    chosen = selection_mask(sample_ids, selected, n)
    meta_text = _hover_metadata(metadata, n)
    Scatter = scatter_class(n)
    mode = "markers+text" if labels else "markers"
    size = 7 if n <= WEBGL_THRESHOLD else 4

    symbols = None
    symbol_groups: list[str] = []
    if symbol_values is not None:
        sym_labels, symbol_groups = _group_labels(symbol_values)
        sym_map = {g: SYMBOLS[i % len(SYMBOLS)] for i, g in enumerate(symbol_groups)}
        symbols = np.array([sym_map[s] for s in sym_labels], dtype=object)

    def add(mask, name, marker, legend=True):
        hover = "<b>%{text}</b><br>" + f"{component_label(x)}: " + "%{x:.3g}<br>" + f"{component_label(y)}: " + "%{y:.3g}"
        extra = {}
        if meta_text is not None:
            hover += "<br>%{hovertext}"
            extra["hovertext"] = meta_text[mask]
        if symbols is not None:
            marker = dict(marker, symbol=symbols[mask])
        fig.add_trace(Scatter(
            x=tx[mask], y=ty[mask], mode=mode, name=name, text=ids[mask], customdata=rows[mask],
            marker=marker, textposition="top center", textfont=dict(size=10, color="#3d4852"),
            hovertemplate=hover + "<extra>" + ("%{fullData.name}" if legend else "") + "</extra>",
            showlegend=legend, selectedpoints=selected_points(chosen, mask), **extra,
        ))

    fig = _base_figure(None, height=520)
    if colour_values is None:
        add(np.ones(n, dtype=bool), "samples", dict(color=POINT_COLOUR, size=size, opacity=0.85), legend=False)
    elif is_numeric_column(colour_values):
        numbers = pd.to_numeric(pd.Series(colour_values, dtype=object), errors="coerce").to_numpy(dtype=np.float64)
        present = ~np.isnan(numbers)
        add(present, colour_name or "value", dict(
            color=numbers[present], colorscale=CONTINUOUS_SCALE, size=size, opacity=0.9, showscale=True,
            colorbar=dict(title=dict(text=plain(colour_name or ""), side="right"), thickness=14, len=0.8),
        ), legend=False)
        if (~present).any():
            add(~present, "(missing)", dict(color=MISSING_COLOUR, size=size, opacity=0.8))
    else:
        col_labels, groups = _group_labels(colour_values)
        colours = group_colours(groups)
        for g in groups:
            # With shapes in use, the legend shows each colour as a plain circle (a stand-in trace).
            add(col_labels == g, plain(g), dict(color=colours[g], size=size, opacity=0.85), legend=symbols is None)
            if symbols is not None:
                fig.data[-1].legendgroup = plain(g)
                fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name=plain(g), legendgroup=plain(g),
                                         marker=dict(color=colours[g], size=8, symbol="circle"), hoverinfo="skip"))
        fig.update_layout(legend_title_text=plain(colour_name or ""))

    if symbols is not None and len(symbol_groups) > 1:
        for i, g in enumerate(symbol_groups):
            fig.add_trace(_legend_entry(plain(g), "#5b6570", SYMBOLS[i % len(SYMBOLS)], "symbols",
                                        title=plain(symbol_name or "shape") if i == 0 else None))

    if highlight:
        h = np.asarray(list(highlight), dtype=np.int64)
        h = h[(h >= 0) & (h < n)]
        fig.add_trace(go.Scatter(
            x=tx[h], y=ty[h], mode="markers", name="picked", customdata=rows[h], text=ids[h],
            marker=dict(size=15, color="rgba(0,0,0,0)", line=dict(color="#000000", width=2)),
            hovertemplate="<b>%{text}</b><extra>picked</extra>", showlegend=False,
        ))

    if t2_limits and eigenvalues is not None:
        ev = _as_float(eigenvalues)
        for conf in sorted(t2_limits):
            ex, ey = ellipse_points(t2_limits[conf], ev[x], ev[y])
            fig.add_trace(go.Scatter(
                x=ex, y=ey, mode="lines", name=f"T² {_confidence_text(conf)} limit",
                line=dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot")),
                hoverinfo="skip", showlegend=True,
            ))

    fig.update_xaxes(title_text=component_label(x, explained_ratio), zeroline=True)
    fig.update_yaxes(title_text=component_label(y, explained_ratio), zeroline=True)
    # Legend above the plot: it never covers points and wraps on a narrow window.
    fig.update_layout(dragmode="select", clickmode="event",
                      legend=dict(itemsizing="constant", orientation="h", x=0, y=1.01, yanchor="bottom"))
    return fig


def single_component_figure(scores, explained_ratio: Sequence[float], eigenvalue: float,
                            t2_limits: Mapping[float, float], *, sample_ids: Sequence[str] | None = None,
                            colour_values=None, colour_name: str | None = None, highlight: Sequence[int] = (),
                            selected: Sequence[str] | None = None) -> go.Figure:
    """Scores of a one-component model against sample order.

    With one component T2 = t1^2 / lambda_1, so a T2 limit L becomes the pair of
    score limits +-sqrt(L lambda_1), drawn at each confidence level. Points are
    coloured by groups as on the score plot and keep their row in ``customdata``."""
    t = _as_float(np.asarray(scores, dtype=np.float64)[:, 0])
    n = t.size
    ids = id_text(sample_ids, n)
    rows = np.arange(n, dtype=np.int32)
    order = np.arange(1, n + 1, dtype=np.float64)
    chosen = selection_mask(sample_ids, selected, n)
    Scatter = scatter_class(n)
    fig = _base_figure("One component: PC1 against sample order (no second axis to plot)", height=420)
    hover = "<b>%{text}</b><br>order: %{x}<br>PC1: %{y:.3g}<extra>%{fullData.name}</extra>"
    if colour_values is None or is_numeric_column(colour_values):
        parts = [(np.ones(n, dtype=bool), "samples", POINT_COLOUR)]
    else:
        labels, groups = _group_labels(colour_values)
        colours = group_colours(groups)
        parts = [(labels == g, plain(g), colours[g]) for g in groups]
    for mask, name, colour in parts:
        fig.add_trace(Scatter(x=order[mask], y=t[mask], mode="markers", name=name, text=ids[mask],
                              customdata=rows[mask], marker=dict(color=colour, size=7 if n <= WEBGL_THRESHOLD else 4),
                              hovertemplate=hover, showlegend=len(parts) > 1,
                              selectedpoints=selected_points(chosen, mask)))
    if highlight:
        h = np.asarray(list(highlight), dtype=np.int64)
        h = h[(h >= 0) & (h < n)]
        fig.add_trace(go.Scatter(x=order[h], y=t[h], mode="markers", customdata=rows[h], text=ids[h],
                                 marker=dict(size=15, color="rgba(0,0,0,0)", line=dict(color="#000", width=2)),
                                 showlegend=False, hovertemplate="<b>%{text}</b><extra>picked</extra>"))
    for conf in sorted(t2_limits):
        bound = float(np.sqrt(t2_limits[conf] * float(eigenvalue)))
        style = dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot"))
        for y in (bound, -bound):
            fig.add_hline(y=y, line=style, annotation_text=f"T² {_confidence_text(conf)}" if y > 0 else None,
                          annotation_position="top left", annotation_font_size=11)
    if len(parts) > 1:
        fig.update_layout(legend_title_text=plain(colour_name or ""))
    fig.update_xaxes(title_text="Sample order")
    fig.update_yaxes(title_text=component_label(0, explained_ratio), zeroline=True)
    fig.update_layout(dragmode="select", clickmode="event")
    return fig


# ------------------------------------------------- scores, many samples
def typed_array(values, dtype: str = "f8") -> dict:
    """A numpy array as a plotly.js typed-array spec (base64), for partial figure updates."""
    arr = np.ascontiguousarray(values, dtype=np.dtype(dtype).newbyteorder("<"))
    return {"dtype": dtype, "bdata": base64.b64encode(arr.tobytes()).decode("ascii")}


def _legend_entry(name: str, colour: str, symbol: str = "circle", group: str | None = None,
                  title: str | None = None) -> go.Scatter:
    """A legend-only trace; ``title`` heads its legend group once (the column name), so an
    entry reads 'North', not 'Site: Site North'."""
    return go.Scatter(x=[None], y=[None], mode="markers", name=name, legendgroup=group,
                      legendgrouptitle_text=title, marker=dict(color=colour, size=8, symbol=symbol),
                      hoverinfo="skip", showlegend=True)


def score_colours(colour_values, colour_name: str | None) -> dict:
    """How the points of a large score plot are split into WebGL traces and coloured.

    Groups get one trace each in a flat Okabe-Ito colour, and those traces are the
    legend: plotly.js draws a flat colour without turning a value into a colour per
    point, which for 100,000 points is most of a redraw without a graphics card.
    Numbers use one trace through the continuous scale, with missing values drawn
    grey below its bottom; no colouring is one trace in the neutral colour.
    Returns {"parts": [{"name", "rows" (index array, None for all rows), "marker",
    "showlegend"}], "legend": [extra legend traces], "title": legend title}.
    """
    if colour_values is None:
        return {"parts": [{"name": "samples", "rows": None, "marker": {"color": POINT_COLOUR}, "showlegend": False}],
                "legend": [], "title": ""}
    title = plain(colour_name or "")
    if is_numeric_column(colour_values):
        numbers = pd.to_numeric(pd.Series(colour_values, dtype=object), errors="coerce").to_numpy(dtype=np.float64)
        missing = np.isnan(numbers)
        lo, hi = float(np.nanmin(numbers)), float(np.nanmax(numbers))
        bar = dict(title=dict(text=title, side="right"), thickness=14, len=0.8)
        legend = []
        marker = {"color": numbers, "colorscale": CONTINUOUS_SCALE, "cmin": lo, "cmax": hi, "showscale": True,
                  "colorbar": bar}
        if missing.any():
            floor = lo - 0.04 * ((hi - lo) or 1.0)
            steps = pcolors.get_colorscale(CONTINUOUS_SCALE)
            cut = (lo - floor) / (hi - floor)
            scale = [[0.0, MISSING_COLOUR], [cut * 0.999, MISSING_COLOUR]] + [
                [cut + (1 - cut) * float(pos), colour] for pos, colour in steps]
            marker.update(color=np.where(missing, floor, numbers), colorscale=scale, cmin=floor)
            legend = [_legend_entry("(missing)", MISSING_COLOUR)]
        return {"parts": [{"name": title or "samples", "rows": None, "marker": marker, "showlegend": False}],
                "legend": legend, "title": ""}
    labels, groups = _group_labels(colour_values)
    colours = group_colours(groups)
    codes = pd.Categorical(labels, categories=groups).codes
    return {"parts": [{"name": plain(g), "rows": np.flatnonzero(codes == i), "marker": {"color": colours[g]},
                       "showlegend": True} for i, g in enumerate(groups)],
            "legend": [], "title": title}


def score_point_traces(axes: dict, ids, colours: dict, *, labels: bool = False, symbols=None,
                       chosen: np.ndarray | None = None) -> list[dict]:
    """The WebGL point traces of a large score plot (plain trace dicts), one per part
    of ``score_colours``; every point carries its row index in ``customdata`` and its
    sample id in ``text``; ``chosen`` (``selection_mask``) rows are drawn as selected. Plain dicts, so a partial update sends them without the
    deep copy a graph object makes of 100,000 ids.
    Coordinates go as 32-bit floats (seven significant digits, far finer than a pixel
    or the three digits of the hover), which halves what a redraw sends."""
    n = axes["x"].size
    traces = []
    for part in colours["parts"]:
        rows = np.arange(n) if part["rows"] is None else part["rows"]
        marker = dict(size=4, opacity=0.8, **part["marker"])
        if symbols is not None:
            marker["symbol"] = symbols[rows]
        traces.append(dict(
            type="scattergl", x=axes["x"][rows].astype(np.float32), y=axes["y"][rows].astype(np.float32),
            mode="markers+text" if labels else "markers",
            text=ids[rows], customdata=rows.astype(np.int32), marker=marker, name=part["name"],
            showlegend=part["showlegend"], textposition="top center", textfont=dict(size=10, color="#3d4852"),
            hovertemplate=point_hover(axes, part), selectedpoints=selected_points(chosen, rows)))
    return traces


def point_hover(axes: dict, part: dict) -> str:
    """Hover of a point trace: sample id, both scores and, for a group, its name."""
    return axes["hover"] + ("<extra>%{fullData.name}</extra>" if part["showlegend"] else "<extra></extra>")


def patch_json(trace: dict) -> dict:
    """A trace dict for a partial figure update, numeric arrays as typed arrays
    (a dash.Patch sends numpy arrays as number lists otherwise)."""
    def walk(value):
        if isinstance(value, np.ndarray) and value.dtype.kind in "fiu":
            kind = "i4" if value.dtype.kind in "iu" else "f4" if value.dtype == np.float32 else "f8"
            return typed_array(value, kind)
        if isinstance(value, dict):
            return {k: walk(v) for k, v in value.items()}
        return value
    return walk(trace)


def score_axes(scores, explained_ratio, x: int, y: int, eigenvalues=None,
               t2_limits: Mapping[float, float] | None = None, highlight: Sequence[int] = ()) -> dict:
    """What changes with the plotted pair of components: point coordinates, hover
    text, axis titles, the T2 ellipses (sorted by confidence) and the picked points."""
    t = np.asarray(scores, dtype=np.float64)
    tx, ty = np.ascontiguousarray(t[:, x]), np.ascontiguousarray(t[:, y])
    ellipses = []
    if t2_limits and eigenvalues is not None:
        ev = _as_float(eigenvalues)
        ellipses = [ellipse_points(t2_limits[c], ev[x], ev[y]) for c in sorted(t2_limits)]
    h = np.asarray(list(highlight), dtype=np.int64)
    h = h[(h >= 0) & (h < t.shape[0])]
    return {
        "x": tx, "y": ty, "picked": (tx[h], ty[h]), "ellipses": ellipses,
        "xtitle": component_label(x, explained_ratio), "ytitle": component_label(y, explained_ratio),
        "hover": "<b>%{text}</b><br>" + f"{component_label(x)}: " + "%{x:.3g}<br>" + f"{component_label(y)}: "
                 + "%{y:.3g}",
    }


def large_score_figure(scores, explained_ratio, *, x: int = 0, y: int = 1, sample_ids=None, colour_values=None,
                       colour_name: str | None = None, symbol_values=None, symbol_name: str | None = None,
                       labels: bool = False, eigenvalues=None, t2_limits: Mapping[float, float] | None = None,
                       highlight: Sequence[int] = (), selected: Sequence[str] | None = None) -> go.Figure:
    """Score plot for many samples: WebGL point traces (``score_point_traces``).

    Trace order is fixed so a recolour or an axis change can be sent as a small
    update (``score_colours`` / ``score_axes``): first the point traces (one per
    group, else one), then one trace per T2 ellipse, then the picked points, then
    the extra legend entries.
    """
    t = np.asarray(scores, dtype=np.float64)
    n = t.shape[0]
    ids = id_text(sample_ids, n)
    axes = score_axes(t, explained_ratio, x, y, eigenvalues, t2_limits, highlight)
    colours = score_colours(colour_values, colour_name)
    legend = list(colours["legend"])
    symbols = None
    if symbol_values is not None:
        sym_labels, symbol_groups = _group_labels(symbol_values)
        sym_map = {g: SYMBOLS[i % len(SYMBOLS)] for i, g in enumerate(symbol_groups)}
        symbols = np.array([sym_map[s] for s in sym_labels], dtype=object)
        legend += [_legend_entry(plain(g), "#5b6570", sym_map[g], "symbols",
                                 title=plain(symbol_name or "shape") if i == 0 else None)
                   for i, g in enumerate(symbol_groups)]
    fig = _base_figure(None, height=520)
    chosen = selection_mask(sample_ids, selected, n)
    for trace in score_point_traces(axes, ids, colours, labels=labels, symbols=symbols, chosen=chosen):
        fig.add_trace(trace)
    for conf, (ex, ey) in zip(sorted(t2_limits or {}), axes["ellipses"]):
        fig.add_trace(go.Scatter(x=ex, y=ey, mode="lines", name=f"T² {_confidence_text(conf)} limit",
                                 line=dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot")),
                                 hoverinfo="skip", showlegend=True))
    h = np.asarray(list(highlight), dtype=np.int64)
    h = h[(h >= 0) & (h < n)]
    fig.add_trace(go.Scatter(x=axes["picked"][0], y=axes["picked"][1], mode="markers", name="picked",
                             customdata=h.astype(np.int32), text=ids[h], showlegend=False,
                             marker=dict(size=15, color="rgba(0,0,0,0)", line=dict(color="#000000", width=2)),
                             hovertemplate="<b>%{text}</b><extra>picked</extra>"))
    for entry in legend:
        fig.add_trace(entry)
    fig.update_xaxes(title_text=axes["xtitle"], zeroline=True)
    fig.update_yaxes(title_text=axes["ytitle"], zeroline=True)
    fig.update_layout(dragmode="select", clickmode="event", legend_title_text=colours["title"],
                      legend=dict(itemsizing="constant", orientation="h", x=0, y=1.01, yanchor="bottom"))
    return fig


# --------------------------------------------------------------- loadings
def loading_figure(loadings, variables: Sequence[str], explained_ratio: Sequence[float], *, x: int = 0,
                   y: int = 1, labels: bool = True) -> go.Figure:
    """Loading plot: one point per variable at its loadings on components x and y."""
    p = np.asarray(loadings, dtype=np.float64)
    names = np.array([plain(v) for v in variables], dtype=object)
    px, py = np.ascontiguousarray(p[:, x]), np.ascontiguousarray(p[:, y])
    fig = _base_figure(None, height=520)
    fig.add_trace(scatter_class(p.shape[0])(
        x=px, y=py, text=names, mode="markers+text" if labels else "markers",
        textposition=label_positions(px, py), cliponaxis=False,
        marker=dict(color="#0072B2", size=8), name="variables", showlegend=False,
        textfont=dict(size=11, color="#24303b"),
        hovertemplate="<b>%{text}</b><br>loading x: %{x:.3f}<br>loading y: %{y:.3f}<extra></extra>",
    ))
    longest = max((len(str(v)) for v in names), default=0) if labels else 0
    fig.update_xaxes(title_text=f"Loading on {component_label(x, explained_ratio)}", zeroline=True,
                     range=padded_range(px, label_chars=longest))
    fig.update_yaxes(title_text=f"Loading on {component_label(y, explained_ratio)}", zeroline=True,
                     range=padded_range(py, label_chars=2 if labels else 0))
    return fig


def label_positions(xs, ys) -> list[str]:
    """Each label on the side its point lies from the origin ('top right', 'bottom left',
    ...), so labels of points near each other spread apart instead of stacking."""
    return [("top " if dy >= 0 else "bottom ") + ("right" if dx >= 0 else "left") for dx, dy in zip(xs, ys)]


def padded_range(values, *, label_chars: int = 0, chars_per_span: float = 60.0) -> list[float]:
    """Axis range around ``values`` (and 0) with room for labels of ``label_chars``
    characters beside the outermost points: about ``chars_per_span`` characters fit
    across a plot, so a label takes that share of the span on its side."""
    v = _as_float(values)
    v = v[np.isfinite(v)]
    low, high = min(float(v.min()), 0.0) if v.size else -1.0, max(float(v.max()), 0.0) if v.size else 1.0
    span = (high - low) or 1.0
    room = span * (0.06 + label_chars / chars_per_span)
    return [low - room, high + room]


def loading_bars_figure(loadings, variables: Sequence[str], component: int,
                        explained_ratio: Sequence[float] | None = None) -> go.Figure:
    """Loadings of one component (0-based) as signed bars, in variable order."""
    p = np.asarray(loadings, dtype=np.float64)[:, component]
    names = np.array([plain(v) for v in variables], dtype=object)
    colours = np.where(p >= 0, POSITIVE_COLOUR, NEGATIVE_COLOUR)
    fig = _base_figure(f"Loadings of {component_label(component, explained_ratio)}", height=380)
    fig.add_trace(go.Bar(x=names, y=p, marker_color=colours, name="loading", showlegend=False,
                         hovertemplate="%{x}: %{y:.3f}<extra></extra>"))
    fig.update_xaxes(type="category", tickangle=-45 if names.size > 8 else 0)
    fig.update_yaxes(title_text="Loading", zeroline=True)
    return fig


def biplot_scaling(scores, loadings, eigenvalues, x: int = 0, y: int = 1):
    """Gabriel (1971) biplot coordinates for components x and y.

    Scores are divided by sqrt(lambda_a) (unit variance per component) and the
    loadings multiplied by sqrt(lambda_a); the product of the two reproduces the
    rank-2 approximation of the preprocessed data, and for autoscaled data the
    arrows are the correlations of the variables with the components. The arrows
    are then stretched by one stated factor ``k`` (a round number chosen so the
    longest arrow reaches about 80% of the farthest point) so both share one picture.

    Returns (points (n, 2), arrows (p, 2) already multiplied by k, k).
    """
    t = np.asarray(scores, dtype=np.float64)[:, [x, y]]
    p = np.asarray(loadings, dtype=np.float64)[:, [x, y]]
    root = np.sqrt(_as_float(eigenvalues)[[x, y]])
    points = t / root
    arrows = p * root
    reach = float(np.max(np.abs(points))) if points.size else 1.0
    longest = float(np.max(np.hypot(arrows[:, 0], arrows[:, 1]))) if arrows.size else 1.0
    k = _nice_number(0.8 * reach / longest) if longest > 0 and reach > 0 else 1.0
    return points, arrows * k, k


def _nice_number(value: float) -> float:
    """Round down to 1, 2 or 5 times a power of ten (so the stated factor reads easily)."""
    exponent = np.floor(np.log10(value))
    base = value / 10.0**exponent
    step = 5.0 if base >= 5 else 2.0 if base >= 2 else 1.0
    return float(step * 10.0**exponent)


def biplot_figure(scores, loadings, eigenvalues, explained_ratio, variables: Sequence[str], *, x: int = 0,
                  y: int = 1, sample_ids: Sequence[str] | None = None, colour_values=None,
                  colour_name: str | None = None) -> go.Figure:
    """Biplot: scores as points and variables as arrows (scaling: ``biplot_scaling``)."""
    points, arrows, k = biplot_scaling(scores, loadings, eigenvalues, x, y)
    scaled = np.zeros((points.shape[0], max(x, y) + 1))
    scaled[:, x], scaled[:, y] = points[:, 0], points[:, 1]
    fig = score_figure(scaled, explained_ratio, x=x, y=y, sample_ids=sample_ids, colour_values=colour_values,
                       colour_name=colour_name)
    for trace in fig.data:
        if trace.marker is not None:
            trace.marker.opacity = 0.55
    names = [plain(v) for v in variables]
    xs = np.column_stack([np.zeros(len(names)), arrows[:, 0], np.full(len(names), np.nan)]).ravel()
    ys = np.column_stack([np.zeros(len(names)), arrows[:, 1], np.full(len(names), np.nan)]).ravel()
    fig.add_trace(go.Scatter(x=xs, y=ys, mode="lines", line=dict(color="#b23a00", width=1.5),
                             name=f"variables (arrows × {k:g})", hoverinfo="skip"))
    # Each label sits beyond its arrow's tip, on the side the arrow points to.
    fig.add_trace(go.Scatter(x=arrows[:, 0], y=arrows[:, 1], mode="markers+text", text=names, cliponaxis=False,
                             textposition=label_positions(arrows[:, 0], arrows[:, 1]),
                             textfont=dict(size=11, color="#8a2d00"),
                             marker=dict(color="#b23a00", size=5), showlegend=False,
                             hovertemplate="<b>%{text}</b><extra>variable</extra>"))
    fig.update_xaxes(title_text=component_label(x, explained_ratio))
    fig.update_yaxes(title_text=component_label(y, explained_ratio))
    # The score plot's legend sits above the plot; here the title does, so the legend goes below.
    fig.update_layout(title_text=f"Biplot: scores / sqrt(λ), loadings × sqrt(λ) × {k:g}",
                      legend=dict(orientation="h", x=0, y=-0.14, yanchor="top"), margin=dict(b=110))
    return fig


# ------------------------------------------------------------ diagnostics
REGION_TEXT = {
    "inside": "Within both limits: fits the model and is typical",
    "t2": "Beyond the T² limit only: an extreme case of the usual pattern",
    "spe": "Beyond the SPE limit only: breaks the correlation pattern of the model",
    "both": "Beyond both limits: extreme and breaks the pattern",
}


def classify_regions(t2, spe, t2_limit: float, spe_limit: float) -> np.ndarray:
    """Region name per sample: 'inside', 't2', 'spe' or 'both' (keys of REGION_TEXT)."""
    high_t2 = _as_float(t2) > t2_limit
    high_spe = _as_float(spe) > spe_limit
    out = np.full(high_t2.shape, "inside", dtype=object)
    out[high_t2 & ~high_spe] = "t2"
    out[~high_t2 & high_spe] = "spe"
    out[high_t2 & high_spe] = "both"
    return out


def t2_spe_figure(t2, spe, t2_limits: Mapping[float, float], spe_limits: Mapping[float, float], *,
                  sample_ids: Sequence[str] | None = None, confidence: float = 0.95,
                  highlight: Sequence[int] = (), selected: Sequence[str] | None = None) -> go.Figure:
    """Hotelling T2 against SPE with both limits drawn at each confidence level and
    the four regions (split at ``confidence``) named in words; the samples named in
    ``selected`` are drawn as selected."""
    t2 = _as_float(t2)
    spe = _as_float(spe)
    n = t2.size
    ids = id_text(sample_ids, n)
    rows = np.arange(n, dtype=np.int32)
    regions = classify_regions(t2, spe, t2_limits[confidence], spe_limits[confidence])
    chosen = selection_mask(sample_ids, selected, n)
    Scatter = scatter_class(n)
    fig = _base_figure(None, height=520)
    region_colours = {"inside": POINT_COLOUR, "t2": "#E69F00", "spe": "#56B4E9", "both": FLAG_COLOUR}
    # Shapes carry the region too: colour is never the only sign of a flag (WCAG 2.2, 1.4.1).
    region_symbols = {"inside": "circle", "t2": "square", "spe": "triangle-up", "both": "diamond"}
    short = {"inside": "within limits", "t2": "high T² only", "spe": "high SPE only", "both": "high T² and SPE"}
    for region in ("inside", "t2", "spe", "both"):
        mask = regions == region
        if not mask.any():
            continue
        fig.add_trace(Scatter(
            x=t2[mask], y=spe[mask], mode="markers", name=f"{short[region]} ({int(mask.sum())})",
            text=ids[mask], customdata=rows[mask],
            marker=dict(color=region_colours[region], symbol=region_symbols[region],
                        size=7 if n <= WEBGL_THRESHOLD else 4, opacity=0.85),
            hovertemplate="<b>%{text}</b><br>T²: %{x:.3g}<br>SPE: %{y:.3g}<extra></extra>",
            selectedpoints=selected_points(chosen, mask),
        ))
    if highlight:
        h = np.asarray(list(highlight), dtype=np.int64)
        h = h[(h >= 0) & (h < n)]
        fig.add_trace(go.Scatter(x=t2[h], y=spe[h], mode="markers", customdata=rows[h], text=ids[h],
                                 marker=dict(size=15, color="rgba(0,0,0,0)", line=dict(color="#000", width=2)),
                                 showlegend=False, hovertemplate="<b>%{text}</b><extra>picked</extra>"))
    for conf in sorted(t2_limits):
        style = dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot"))
        fig.add_vline(x=t2_limits[conf], line=style, annotation_text=f"T² {_confidence_text(conf)}",
                      annotation_position="top right", annotation_font_size=11)
    for conf in sorted(spe_limits):
        style = dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot"))
        fig.add_hline(y=spe_limits[conf], line=style, annotation_text=f"SPE {_confidence_text(conf)}",
                      annotation_position="top right", annotation_font_size=11)
    fig.update_xaxes(title_text="Hotelling's T² (distance within the model)", rangemode="tozero")
    fig.update_yaxes(title_text="SPE (distance from the model)", rangemode="tozero")
    fig.update_layout(dragmode="select", clickmode="event", legend=dict(itemsizing="constant"))
    return fig


# The four regions of the outlier map (Hubert, Rousseeuw & Vanden Branden 2005), in our words;
# keys are analysis.robust.REGIONS.
MAP_REGION_TEXT = {
    "regular": "Regular: near the centre of the model and near its plane",
    "far along the model": "Far along the model: extreme scores, yet lies on the model plane",
    "off the model plane": "Off the model plane: ordinary scores, but the model does not describe it",
    "far and off": "Far and off: extreme scores and away from the plane; such samples pull a classical fit most",
}
_MAP_STYLE = {  # colour and shape: colour is never the only sign (WCAG 2.2, 1.4.1)
    "regular": (POINT_COLOUR, "circle"),
    "far along the model": ("#E69F00", "square"),
    "off the model plane": ("#56B4E9", "triangle-up"),
    "far and off": (FLAG_COLOUR, "diamond"),
}


def map_regions(score_distance, orthogonal_distance, sd_cutoff: float, od_cutoff: float) -> np.ndarray:
    """Region name per sample (keys of MAP_REGION_TEXT): beyond the SD cut-off, the OD cut-off, both or neither."""
    far = _as_float(score_distance) > sd_cutoff
    off = _as_float(orthogonal_distance) > od_cutoff
    names = np.array(list(MAP_REGION_TEXT), dtype=object)
    return names[far.astype(int) + 2 * off.astype(int)]


def outlier_map_figure(score_distance, orthogonal_distance, sd_cutoff: float, od_cutoff: float, *,
                       sample_ids: Sequence[str] | None = None, confidence: float = 0.95, method: str = "robust",
                       highlight: Sequence[int] = (), selected: Sequence[str] | None = None) -> go.Figure:
    """The outlier map of Hubert, Rousseeuw & Vanden Branden (2005): each sample's score
    distance (within the model) against its orthogonal distance (to the model plane), the
    two cut-offs at ``confidence`` as lines, and the four regions in words.

    For the robust fit (``method="robust"``) the distances and cut-offs are ROBPCA's; for
    the classical fit they are sqrt(T²), sqrt(SPE) and the square roots of their limits."""
    sd = _as_float(score_distance)
    od = _as_float(orthogonal_distance)
    n = sd.size
    ids = id_text(sample_ids, n)
    rows = np.arange(n, dtype=np.int32)
    regions = map_regions(sd, od, sd_cutoff, od_cutoff)
    chosen = selection_mask(sample_ids, selected, n)
    Scatter = scatter_class(n)
    which = "robust fit (ROBPCA)" if method == "robust" else "classical fit"
    fig = _base_figure(f"Outlier map of the {which}", height=500)
    for region, (colour, symbol) in _MAP_STYLE.items():
        mask = regions == region
        if not mask.any():
            continue
        fig.add_trace(Scatter(
            x=sd[mask], y=od[mask], mode="markers", name=f"{region} ({int(mask.sum())})",
            text=ids[mask], customdata=rows[mask],
            marker=dict(color=colour, symbol=symbol, size=7 if n <= WEBGL_THRESHOLD else 4, opacity=0.85),
            hovertemplate="<b>%{text}</b><br>score distance: %{x:.3g}<br>orthogonal distance: %{y:.3g}"
                          "<extra>" + region + "</extra>",
            selectedpoints=selected_points(chosen, mask),
        ))
    if highlight:
        h = np.asarray(list(highlight), dtype=np.int64)
        h = h[(h >= 0) & (h < n)]
        fig.add_trace(go.Scatter(x=sd[h], y=od[h], mode="markers", customdata=rows[h], text=ids[h],
                                 marker=dict(size=15, color="rgba(0,0,0,0)", line=dict(color="#000", width=2)),
                                 showlegend=False, hovertemplate="<b>%{text}</b><extra>picked</extra>"))
    level = _confidence_text(confidence)
    line = dict(color="#5b6570", width=1.3, dash="dash")
    fig.add_vline(x=sd_cutoff, line=line, annotation_text=f"score distance cut-off {level}",
                  annotation_position="top right", annotation_font_size=11)
    fig.add_hline(y=od_cutoff, line=line, annotation_text=f"orthogonal distance cut-off {level}",
                  annotation_position="top right", annotation_font_size=11)
    fig.update_xaxes(title_text="Score distance (within the model)", rangemode="tozero")
    fig.update_yaxes(title_text="Orthogonal distance (to the model plane)", rangemode="tozero")
    fig.update_layout(dragmode="select", clickmode="event", legend=dict(itemsizing="constant"))
    return fig


def control_chart_figure(values, limits: Mapping[float, float], *, name: str, confidence: float | None = None,
                         order=None, order_name: str | None = None, sample_ids: Sequence[str] | None = None,
                         highlight: Sequence[int] = (), selected: Sequence[str] | None = None) -> go.Figure:
    """A statistic (T2 or SPE) against sample order, or against a date/run column
    given as ``order``. Samples beyond the limit at ``confidence`` (the level the
    T2-vs-SPE plot and the outlier table use; default the highest drawn) are flagged
    by colour and by a diamond marker, never by colour alone; the samples named in
    ``selected`` are drawn as selected."""
    v = _as_float(values)
    n = v.size
    ids = id_text(sample_ids, n)
    rows = np.arange(n, dtype=np.int32)
    if order is None:
        xs = np.arange(1, n + 1, dtype=np.float64)
        x_title = "Sample order"
        sort = np.arange(n)
    else:
        parsed = _order_values(order)
        sort = np.argsort(parsed, kind="stable")
        xs = parsed[sort]
        x_title = plain(order_name) if order_name else "Order"
    v_sorted, ids_sorted, rows_sorted = v[sort], ids[sort], rows[sort]
    chosen = selection_mask(sample_ids, selected, n)
    if confidence is None and limits:
        confidence = max(limits, key=limits.get)
    flag_limit = limits[confidence] if limits else np.inf
    beyond = v_sorted > flag_limit
    # Name the limit the flags follow: the charts draw two.
    top_label = f"{_confidence_text(confidence)} limit" if limits else "limit"
    Scatter = scatter_class(n)
    fig = _base_figure(None, height=340)
    fig.add_trace(Scatter(x=xs, y=v_sorted, mode="lines", line=dict(color="#c3cad1", width=1),
                          hoverinfo="skip", showlegend=False))
    size = 6 if n <= WEBGL_THRESHOLD else 4
    for mask, label, colour, symbol, grow in ((~beyond, f"within {top_label}", POINT_COLOUR, "circle", 0),
                                              (beyond, f"beyond {top_label}", FLAG_COLOUR, "diamond", 3)):
        if mask.any():
            fig.add_trace(Scatter(
                x=xs[mask], y=v_sorted[mask], mode="markers", name=f"{label} ({int(mask.sum())})",
                text=ids_sorted[mask], customdata=rows_sorted[mask],
                marker=dict(color=colour, size=size + grow, symbol=symbol),
                hovertemplate="<b>%{text}</b><br>" + name + ": %{y:.3g}<extra></extra>",
                selectedpoints=selected_points(chosen, rows_sorted[mask]),
            ))
    if highlight:
        h = np.asarray(list(highlight), dtype=np.int64)
        pos = np.flatnonzero(np.isin(rows_sorted, h))
        fig.add_trace(go.Scatter(x=xs[pos], y=v_sorted[pos], mode="markers", customdata=rows_sorted[pos],
                                 text=ids_sorted[pos], showlegend=False,
                                 marker=dict(size=14, color="rgba(0,0,0,0)", line=dict(color="#000", width=2)),
                                 hovertemplate="<b>%{text}</b><extra>picked</extra>"))
    for conf in sorted(limits):
        fig.add_hline(y=limits[conf], line=dict(color="#5b6570", width=1.3, dash=_LIMIT_STYLES.get(conf, "dot")),
                      annotation_text=f"{_confidence_text(conf)} limit", annotation_position="top left",
                      annotation_font_size=11)
    fig.update_xaxes(title_text=x_title)
    fig.update_yaxes(title_text=name, rangemode="tozero")
    fig.update_layout(dragmode="select", clickmode="event",
                      legend=dict(orientation="h", y=1.02, yanchor="bottom", x=1, xanchor="right"))
    return fig


def _order_values(order) -> np.ndarray:
    """Numbers stay numbers, parseable dates become datetimes, anything else keeps text order."""
    series = pd.Series(order, dtype=object)
    numbers = pd.to_numeric(series, errors="coerce")
    if numbers.notna().all():
        return numbers.to_numpy(dtype=np.float64)
    dates = pd.to_datetime(series, errors="coerce", format="mixed")
    if dates.notna().all():
        return dates.to_numpy()
    return series.astype(str).to_numpy(dtype=object)


def contribution_figure(variables: Sequence[str], contributions, *, title: str, top: int = 15,
                        value_title: str = "Contribution") -> go.Figure:
    """Signed contribution bars (Westerhuis, Gurden & Smilde 2000), the ``top``
    variables by absolute size, largest at the top."""
    c = _as_float(contributions)
    names = np.array([plain(v) for v in variables], dtype=object)
    order = np.argsort(-np.abs(c), kind="stable")[:top][::-1]
    colours = np.where(c[order] >= 0, POSITIVE_COLOUR, NEGATIVE_COLOUR)
    fig = _base_figure(title, height=max(260, 24 * order.size + 110))
    fig.add_trace(go.Bar(x=c[order], y=names[order], orientation="h", marker_color=colours, showlegend=False,
                         hovertemplate="%{y}: %{x:.3g}<extra></extra>"))
    fig.update_xaxes(title_text=value_title, zeroline=True, zerolinecolor="#5b6570")
    fig.update_yaxes(type="category")
    return fig


def empty_figure(message: str, height: int = 320) -> go.Figure:
    """A blank figure carrying a short message (no data yet, nothing selected)."""
    fig = _base_figure(None, height=height)
    fig.add_annotation(text=message, showarrow=False, x=0.5, y=0.5, xref="paper", yref="paper",
                       font=dict(size=14, color="#5b6570"))
    fig.update_xaxes(visible=False)
    fig.update_yaxes(visible=False)
    return fig
