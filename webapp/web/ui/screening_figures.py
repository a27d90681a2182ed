"""The respondent-screening plot: longest run of identical answers against IRV.

A pure function: the screening table (``webapp.services.screening``) in, a
``go.Figure`` out. Straight-lining sits bottom right (a long run, little
spread); the two cut-offs are labelled lines. Respondents are drawn in three
classes by how many indices flag them, told apart by marker shape and name
as well as colour, so the plot reads without colour vision (WCAG 2.2, 1.4.1).
Above ``WEBGL_THRESHOLD`` points the traces are ``go.Scattergl``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from webapp.web.ui.figures import (
    FLAG_COLOUR,
    NEGATIVE_COLOUR,
    POINT_COLOUR,
    WEBGL_THRESHOLD,
    _base_figure,
    id_text,
    scatter_class,
)

# (fewest flags, most flags, legend name, marker symbol, colour)
POINT_CLASSES = (
    (0, 0, "Not flagged", "circle", POINT_COLOUR),
    (1, 1, "Flagged by one index", "triangle-up", NEGATIVE_COLOUR),
    (2, 3, "Flagged by two or more indices", "x", FLAG_COLOUR),
)
LONG_STRING_TITLE = "Longest run of identical answers (items)"
IRV_TITLE = "IRV: spread of a respondent's answers (SD)"


def screening_figure(table: pd.DataFrame, long_string_cutoff: float | None, irv_cutoff: float | None,
                     n_items: int) -> go.Figure:
    """Long-string index (x) against IRV (y) for every respondent of ``table``
    (columns ``sample_id``, ``long_string``, ``irv``, ``n_flags``, ``flags``), with both cut-offs."""
    n = len(table)
    ids = id_text(table["sample_id"].to_numpy(dtype=object), n)
    x = table["long_string"].to_numpy(dtype=np.float64)
    y = table["irv"].to_numpy(dtype=np.float64)
    flags = table["n_flags"].to_numpy()
    words = table["flags"].fillna("").to_numpy(dtype=object)
    words = np.where(words == "", "none", words)
    Scatter = scatter_class(n)
    fig = _base_figure(None, height=480)
    for low, high, name, symbol, colour in POINT_CLASSES:
        mask = (flags >= low) & (flags <= high)
        if not mask.any():
            continue
        fig.add_trace(Scatter(
            x=x[mask], y=y[mask], mode="markers", name=f"{name} ({int(mask.sum())})", text=ids[mask],
            customdata=words[mask],
            marker=dict(color=colour, symbol=symbol, size=9 if n <= WEBGL_THRESHOLD else 5, opacity=0.8,
                        line=dict(width=1.5 if symbol == "x" else 0, color=colour)),
            hovertemplate="<b>%{text}</b><br>longest run: %{x}<br>IRV: %{y:.3g}<br>flags: %{customdata}"
                          "<extra></extra>",
        ))
    style = dict(color="#5b6570", width=1.3, dash="dash")
    if long_string_cutoff is not None:
        fig.add_vline(x=long_string_cutoff, line=style, annotation_text="long-string cut-off",
                      annotation_position="top left", annotation_font_size=11)
    if irv_cutoff is not None:
        fig.add_hline(y=irv_cutoff, line=style, annotation_text="IRV cut-off",
                      annotation_position="top right", annotation_font_size=11)
    fig.update_xaxes(title_text=LONG_STRING_TITLE, range=[0, n_items + 1], dtick=max(1, round(n_items / 10)))
    fig.update_yaxes(title_text=IRV_TITLE, rangemode="tozero")
    fig.update_layout(clickmode="event", legend=dict(itemsizing="constant"))
    return fig
