"""Figures of the monitoring pages: the continuing control chart of a reference model.

Pure functions: a chart dict as ``webapp.services.batches.chart`` returns it in,
a ``go.Figure`` out.  Every checked sample sits at its run index (1, 2, ...
continuing across batches, after the training samples); the warning and action
limits are drawn as labelled lines, each batch starts at a labelled vertical
line, and flagged points differ by marker shape as well as colour, so the
chart reads without colour vision.  Above ``WEBGL_ABOVE`` points the traces
are ``go.Scattergl`` (plotly.js reference, "scattergl"; common practice for
large series).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import plotly.graph_objects as go

from webapp.web.ui.figures import FLAG_COLOUR, NEGATIVE_COLOUR, POINT_COLOUR, _base_figure, id_text

WEBGL_ABOVE = 2000
TRAINING_COLOUR = "#6b7480"  # grey: the points before the first checked batch
STATISTIC_TITLES = {"t2": "Hotelling's T²", "spe": "SPE (Q residual)"}
# (key, legend name, marker symbol, colour): shape and name carry the meaning, colour repeats it
POINT_CLASSES = (
    ("in_control", "Within the warning limit", "circle", POINT_COLOUR),
    ("warning", "Beyond the warning limit only", "triangle-up", NEGATIVE_COLOUR),
    ("flagged", "Flagged (action limit or run rule)", "x", FLAG_COLOUR),
)


@dataclass(frozen=True)
class ChartLimitLines:
    """Horizontal limit lines of one chart (None: not drawn)."""

    warning: float | None
    action: float | None
    centre: float | None = None
    lower_warning: float | None = None
    lower_action: float | None = None


def statistic_title(statistic: str) -> str:
    """'Hotelling's T²', 'SPE (Q residual)' or 'Score on PC<k>'."""
    return STATISTIC_TITLES.get(statistic, f"Score on {statistic}")


def statistic_values(series: Mapping[str, Any], statistic: str) -> np.ndarray:
    """The plotted value of each checked sample (``chart["series"]``): its T², SPE or score on
    ``PC<k>`` (1-based)."""
    if statistic in STATISTIC_TITLES:
        return np.asarray(series[statistic], dtype=np.float64)
    return np.asarray(series["scores"][int(statistic.removeprefix("PC")) - 1], dtype=np.float64)


def limit_lines(chart: Mapping[str, Any], statistic: str, score_limits=None) -> ChartLimitLines:
    """The limit lines: the frozen new-sample limits for T² and SPE, ``score_limits`` for a score.

    ``score_limits`` is an ``analysis.monitoring.ChartLimits`` (two-sided, centre 0)
    or None, in which case a score chart shows only its centre line 0.
    """
    limits = chart["limits"]
    if statistic == "t2":
        return ChartLimitLines(limits["t2_warning_limit"], limits["t2_limit"])
    if statistic == "spe":
        return ChartLimitLines(limits["spe_warning_limit"], limits["spe_limit"])
    if score_limits is None:
        return ChartLimitLines(None, None, 0.0)
    return ChartLimitLines(score_limits.warning, score_limits.action, score_limits.centre,
                           score_limits.lower_warning, score_limits.lower_action)


def point_classes(series: Mapping[str, Any], statistic: str, limits: Mapping[str, Any]) -> np.ndarray:
    """'flagged', 'warning' or 'in_control' per checked sample.

    Flagged: the service's flag (T² or SPE beyond the action limit, or a run
    rule fired at the sample).  Warning: beyond the warning limit (``limits``,
    the chart's frozen limits) of the statistic shown, or of T² or SPE on a
    score chart, and not flagged.
    """
    flagged = np.asarray(series["flagged"], dtype=bool)
    t2 = statistic_values(series, "t2") > limits["t2_warning_limit"]
    spe = statistic_values(series, "spe") > limits["spe_warning_limit"]
    warning = {"t2": t2, "spe": spe}.get(statistic, t2 | spe)
    return np.where(flagged, "flagged", np.where(warning, "warning", "in_control"))


def training_values(chart: Mapping[str, Any], statistic: str) -> np.ndarray:
    """The training samples' T², SPE or score on ``PC<k>``, in training order (empty without them)."""
    training = chart.get("training") or {}
    if not training.get("samples"):
        return np.empty(0)
    if statistic in STATISTIC_TITLES:
        return np.asarray(training[statistic], dtype=np.float64)
    return np.asarray(training["scores"], dtype=np.float64)[:, int(statistic.removeprefix("PC")) - 1]


def batch_boundaries(chart: Mapping[str, Any]) -> list[tuple[float, str]]:
    """(x of the line, label) at the start of each batch that has samples: half a run before its first."""
    return [(b["first_run"] - 0.5, f"batch {b['id']}") for b in chart["batches"] if b["first_run"] > 0]


def _limit_line(fig: go.Figure, y: float | None, text: str, dash: str, position: str = "top right") -> None:
    if y is not None:
        fig.add_hline(y=y, line_dash=dash, line_color="#5b6570", line_width=1.2,
                      annotation_text=text, annotation_position=position)


def control_chart_figure(chart: Mapping[str, Any], statistic: str = "t2", score_limits=None,
                         webgl_above: int = WEBGL_ABOVE) -> go.Figure:
    """The continuing control chart of one statistic across every checked batch.

    Parameters
    ----------
    chart : dict
        ``webapp.services.batches.chart`` (series in run order, limits, batches, training).
    statistic : str
        ``t2``, ``spe`` or ``PC<k>`` (a score, 1-based).
    score_limits : analysis.monitoring.ChartLimits, optional
        Limits of a score chart (``analysis.monitoring.score_limits``).
    webgl_above : int
        Draw with WebGL (``go.Scattergl``) when there are more points than this.
    """
    series = chart["series"]
    count = len(series["sample"])
    title = statistic_title(statistic)
    fig = _base_figure(f"{title}: {chart['name']} v{chart['version']}, every checked sample in run order",
                       height=460)
    trained = training_values(chart, statistic)
    if not count:
        fig.add_annotation(text="No batch has been checked against this reference model yet.", showarrow=False,
                           x=0.5, y=0.96 if trained.size else 0.5, xref="paper", yref="paper")
        if not trained.size:
            return fig
    trace = go.Scattergl if count + trained.size > webgl_above else go.Scatter
    if trained.size:
        _training_trace(fig, trace, chart, statistic, trained)
    runs = np.asarray(series["run_index"], dtype=np.int64)
    values = statistic_values(series, statistic) if count else np.array([])
    classes = point_classes(series, statistic, chart["limits"]) if count else np.array([])
    names = id_text(series["sample"], count)
    batches = np.asarray(series["batch_id"], dtype=np.int64)
    for key, label, symbol, colour in POINT_CLASSES:
        chosen = classes == key
        if not chosen.any():
            continue
        fig.add_trace(trace(
            x=runs[chosen], y=values[chosen], mode="markers", name=label,
            marker=dict(symbol=symbol, color=colour, size=11 if key == "flagged" else 7,
                        line=dict(width=2 if key == "flagged" else 0, color=colour)),
            customdata=np.column_stack([names[chosen], batches[chosen]]),
            hovertemplate="%{customdata[0]} (batch %{customdata[1]})<br>run %{x}: %{y:.4g}<extra></extra>",
        ))
    lines = limit_lines(chart, statistic, score_limits)
    levels = chart["limits"]["confidence"]
    warning_text = f"warning {100 * levels['warning']:g}%"
    action_text = f"action {100 * levels['action']:g}%"
    # the warning label sits inside the band between the two limits, so the labels never overlap
    _limit_line(fig, lines.warning, warning_text, "dash", "bottom right")
    _limit_line(fig, lines.action, action_text, "solid")
    _limit_line(fig, lines.lower_warning, warning_text, "dash")
    _limit_line(fig, lines.lower_action, action_text, "solid", "bottom right")
    _limit_line(fig, lines.centre if statistic not in STATISTIC_TITLES else None, "centre", "dot")
    for x, label in batch_boundaries(chart):
        fig.add_vline(x=x, line_dash="dot", line_color="#8a949e", line_width=1,
                      annotation_text=label, annotation_position="top left", annotation_textangle=-90)
    fig.update_xaxes(title_text="Run order: the training samples (0 and before), then every checked sample (1, 2, ...)"
                     if trained.size else f"Run order (new samples, after the {chart['n_training_samples']} "
                     "training samples)")
    fig.update_yaxes(title_text=title)
    fig.update_layout(legend=dict(orientation="h", y=-0.22))
    return fig


def derived_chart_figure(chart: Mapping[str, Any], webgl_above: int = WEBGL_ABOVE) -> go.Figure:
    """A derived chart (``chart["derived"]``: EWMA of T², MEWMA or combined index) in run order.

    Points beyond the limit are crosses, the others circles; an EWMA's
    per-point limits are drawn as lines, single limits as labelled lines.
    """
    derived = chart["derived"]
    fig = _base_figure(f"{derived['title']}: {chart['name']} v{chart['version']} ({derived['source']})",
                       height=460)
    series = chart["series"]
    if not derived["values"]:
        fig.add_annotation(text="No batch has been checked against this reference model yet.", showarrow=False,
                           x=0.5, y=0.5, xref="paper", yref="paper")
        return fig
    runs = np.asarray(series["run_index"], dtype=np.int64)
    values = np.asarray(derived["values"], dtype=np.float64)
    beyond = np.asarray(derived["exceeds"], dtype=bool)
    names = id_text(series["sample"], runs.size)
    trace = go.Scattergl if runs.size > webgl_above else go.Scatter
    for chosen, label, symbol, colour in ((~beyond, "Within the limit", "circle", POINT_COLOUR),
                                          (beyond, "Beyond the limit", "x", FLAG_COLOUR)):
        if chosen.any():
            fig.add_trace(trace(x=runs[chosen], y=values[chosen], mode="markers", name=label, text=names[chosen],
                                marker=dict(symbol=symbol, color=colour, size=11 if symbol == "x" else 7),
                                hovertemplate="%{text}<br>run %{x}: %{y:.4g}<extra></extra>"))
    for key, label in (("upper", "Upper limit"), ("lower", "Lower limit")):
        if derived[key] is not None:
            fig.add_trace(trace(x=runs, y=derived[key], mode="lines", name=label, hoverinfo="skip",
                                line=dict(color="#5b6570", width=1.2)))
    levels = chart["limits"]["confidence"]
    if derived["statistic"] == "mewma":
        _limit_line(fig, derived["action"], "limit (in-control ARL 200)", "solid")
    else:
        _limit_line(fig, derived["warning"], f"warning {100 * levels['warning']:g}%", "dash", "bottom right")
        _limit_line(fig, derived["action"], f"action {100 * levels['action']:g}%", "solid")
    for x, label in batch_boundaries(chart):
        fig.add_vline(x=x, line_dash="dot", line_color="#8a949e", line_width=1,
                      annotation_text=label, annotation_position="top left", annotation_textangle=-90)
    fig.update_xaxes(title_text="Run order (every checked sample)")
    fig.update_yaxes(title_text=derived["title"])
    fig.update_layout(legend=dict(orientation="h", y=-0.22))
    return fig


def _training_trace(fig: go.Figure, trace, chart: Mapping[str, Any], statistic: str, values: np.ndarray) -> None:
    """The training samples at runs 1-n .. 0, in grey, and on the T² chart their own (Phase I) action
    limit over their span: the beta-distribution limit of Tracy, Young & Mason (1992)."""
    training = chart["training"]
    runs = np.arange(1 - values.size, 1)
    fig.add_trace(trace(
        x=runs, y=values, mode="markers", name="Training samples",
        marker=dict(symbol="circle-open", color=TRAINING_COLOUR, size=6),
        text=id_text(training["samples"], values.size),
        hovertemplate="%{text} (training)<br>%{y:.4g}<extra></extra>",
    ))
    if statistic == "t2" and training.get("t2_limit") is not None:
        fig.add_trace(go.Scatter(x=[runs[0] - 0.5, 0.5], y=[training["t2_limit"]] * 2, mode="lines",
                                 name="Training action limit (beta distribution)", hoverinfo="skip",
                                 line=dict(color=TRAINING_COLOUR, dash="longdash", width=1.2)))
    fig.add_vrect(x0=runs[0] - 0.5, x1=0.5, fillcolor=TRAINING_COLOUR, opacity=0.08, line_width=0,
                  annotation_text="training", annotation_position="top left")


def reference_score_figure(training_scores, training_ids: Sequence[str], sample_scores: Sequence[float],
                           sample_id: str, x: int = 0, y: int = 1, webgl_above: int = WEBGL_ABOVE) -> go.Figure:
    """One new sample on the reference model's score plot, among the training samples.

    ``training_scores`` is (n, A); ``x`` and ``y`` are 0-based components.  The
    training samples are small circles, the new sample a large labelled cross.
    """
    scores = np.asarray(training_scores, dtype=np.float64)
    fig = _base_figure(f"{sample_id} among the {scores.shape[0]} training samples", height=420)
    trace = go.Scattergl if scores.shape[0] > webgl_above else go.Scatter
    fig.add_trace(trace(x=scores[:, x], y=scores[:, y], mode="markers", name="Training samples",
                        marker=dict(symbol="circle", color=POINT_COLOUR, size=6, opacity=0.6),
                        text=id_text(list(training_ids), scores.shape[0]),
                        hovertemplate="%{text}<extra>training</extra>"))
    fig.add_trace(go.Scatter(x=[float(sample_scores[x])], y=[float(sample_scores[y])], mode="markers+text",
                             name=f"New sample {sample_id}", text=[sample_id], textposition="top center",
                             marker=dict(symbol="x", color=FLAG_COLOUR, size=14, line=dict(width=2, color=FLAG_COLOUR)),
                             hovertemplate="%{text}<extra>new sample</extra>"))
    fig.update_xaxes(title_text=f"PC{x + 1} score", zeroline=True)
    fig.update_yaxes(title_text=f"PC{y + 1} score", zeroline=True)
    return fig
