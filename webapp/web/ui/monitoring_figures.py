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


def statistic_values(samples: Sequence[Mapping[str, Any]], statistic: str) -> np.ndarray:
    """The plotted value of each sample: its T², SPE or score on ``PC<k>`` (1-based)."""
    if statistic in STATISTIC_TITLES:
        return np.array([s[statistic] for s in samples], dtype=np.float64)
    component = int(statistic.removeprefix("PC")) - 1
    return np.array([s["scores"][component] for s in samples], dtype=np.float64)


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


def point_classes(samples: Sequence[Mapping[str, Any]], statistic: str) -> np.ndarray:
    """'flagged', 'warning' or 'in_control' per sample.

    Flagged: the service's flag (T² or SPE beyond the action limit, or a run
    rule fired at the sample).  Warning: beyond the warning limit of the
    statistic shown (of T² or SPE on a score chart) and not flagged.
    """
    flagged = np.array([bool(s["flagged"]) for s in samples], dtype=bool)
    if statistic in STATISTIC_TITLES:
        warning = np.array([bool(s[f"{statistic}_exceeds_warning"]) for s in samples], dtype=bool)
    else:
        warning = np.array([bool(s["t2_exceeds_warning"] or s["spe_exceeds_warning"]) for s in samples],
                           dtype=bool)
    return np.where(flagged, "flagged", np.where(warning, "warning", "in_control"))


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
        ``webapp.services.batches.chart`` (samples in run order, limits, batches).
    statistic : str
        ``t2``, ``spe`` or ``PC<k>`` (a score, 1-based).
    score_limits : analysis.monitoring.ChartLimits, optional
        Limits of a score chart (``analysis.monitoring.score_limits``).
    webgl_above : int
        Draw with WebGL (``go.Scattergl``) when there are more points than this.
    """
    samples = chart["samples"]
    title = statistic_title(statistic)
    fig = _base_figure(f"{title}: {chart['name']} v{chart['version']}, every checked sample in run order",
                       height=460)
    if not samples:
        fig.add_annotation(text="No batch has been checked against this reference model yet.", showarrow=False,
                           x=0.5, y=0.5, xref="paper", yref="paper")
        return fig
    runs = np.array([s["run_index"] for s in samples], dtype=np.int64)
    values = statistic_values(samples, statistic)
    classes = point_classes(samples, statistic)
    names = id_text([s["sample"] for s in samples], len(samples))
    batches = np.array([s["batch_id"] for s in samples], dtype=np.int64)
    trace = go.Scattergl if len(samples) > webgl_above else go.Scatter
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
    fig.update_xaxes(title_text=f"Run order (new samples, after the {chart['n_training_samples']} training samples)")
    fig.update_yaxes(title_text=title)
    fig.update_layout(legend=dict(orientation="h", y=-0.22))
    return fig


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
