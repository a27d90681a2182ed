"""The numbers behind a plot (webapp.web.ui.plot_table), the dataset page's tab control
(webapp.web.pages.dataset_tabs) and labels tied to controls (webapp.web.ui.fields).

References: WCAG 2.2, success criteria 1.1.1 (a text alternative for a chart: its
data), 1.3.1 and 4.1.2 (a control's label and state in the markup); WAI-ARIA
Authoring Practices 1.2, "Tabs" pattern (role, aria-selected, aria-controls, one
tab in the Tab order). Typed arrays: plotly.py encodes numpy arrays as
base64 ``{"dtype", "bdata"}`` (plotly.js typed array spec), used below as the
reference encoder.
"""

from __future__ import annotations

import importlib
import json

import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
from dash import dcc, html

from webapp.url_state import TABS
from webapp.web.ui import fields, figures, ids, plot_table

# Invented values (made up for these tests).
T2 = np.array([0.4, 1.9, 7.5, 0.8, 12.25])
SPE = np.array([0.3, 6.1, 0.2, 0.9, 9.75])
IDS = ["S-1", "S-2", "S-3", "S-4", "S-5"]


def _page_module(name: str):
    """A module of webapp/web/pages as the app's page loader ran it (import it only once an
    app exists, as tests/webapp/test_dataset_callbacks.py does, so its callbacks register once)."""
    return importlib.import_module(f"webapp.web.pages.{name}")


def _as_dash_holds_it(fig: go.Figure) -> dict:
    """The figure as JSON, the way Dash sends it to the browser and back."""
    return json.loads(pio.to_json(fig))


def _by_label(numbers: plot_table.PlotNumbers) -> dict[str, tuple[str, ...]]:
    at = numbers.columns.index("Label")
    return {row[at]: row for row in numbers.rows}


def test_typed_arrays_decode_to_the_values_plotly_encoded():
    values = np.array([1.5, -2.25, 3.0e-7, 1.0e6])
    encoded = _as_dash_holds_it(go.Figure(go.Scatter(x=values.astype("f4"), y=values)))["data"][0]
    assert isinstance(encoded["x"], dict) and "bdata" in encoded["x"]  # plotly.py chose the typed array form
    assert plot_table.decode_array(encoded["y"]) == values.tolist()
    assert plot_table.decode_array(encoded["x"]) == values.astype("f4").tolist()
    # a JavaScript typed array that JSON.stringify wrote as an object of indices
    assert plot_table.decode_array({"1": 20, "0": 10, "2": 30}) == [10, 20, 30]
    assert plot_table.decode_array(None) == []


def test_t2_spe_plot_lists_every_sample_with_its_region_and_the_limit_lines():
    fig = figures.t2_spe_figure(T2, SPE, {0.95: 5.0, 0.99: 8.0}, {0.95: 4.0, 0.99: 7.0}, sample_ids=IDS,
                                highlight=[2])
    numbers = plot_table.figure_rows(_as_dash_holds_it(fig))
    assert numbers.columns == ("Series", "Label", "Hotelling's T² (distance within the model)",
                               "SPE (distance from the model)")
    rows = _by_label(numbers)
    assert len(numbers.rows) == len(IDS)  # the ring around the picked sample is not a second row
    for sid, t2, spe in zip(IDS, T2, SPE):
        assert rows[sid][2:] == (f"{t2:.4g}", f"{spe:.4g}")
    # the series says which limits a sample is beyond (in words, not by colour)
    assert rows["S-5"][0].startswith("high T² and SPE")
    assert rows["S-3"][0].startswith("high T² only")
    assert rows["S-2"][0].startswith("high SPE only")
    assert {"T² 95%: x = 5", "T² 99%: x = 8", "SPE 95%: y = 4", "SPE 99%: y = 7"} <= set(numbers.lines)


def test_score_plot_leaves_out_the_ellipses_but_names_them():
    scores = np.column_stack([T2 - T2.mean(), SPE - SPE.mean()])
    fig = figures.large_score_figure(scores, [0.6, 0.3], sample_ids=IDS, eigenvalues=[2.0, 1.0],
                                     t2_limits={0.95: 6.0})
    numbers = plot_table.figure_rows(_as_dash_holds_it(fig))
    assert [row[0] for row in numbers.rows] == IDS
    assert numbers.columns[1:] == ("PC1 (60.0%)", "PC2 (30.0%)")
    assert numbers.lines == ("T² 95% limit: drawn as a curve",)


def test_bars_and_long_plots_and_empty_plots():
    fig = figures.contribution_figure(["a", "b", "c"], [0.5, -2.0, 1.0], title="SPE contributions",
                                      value_title="squared residual × its sign")
    numbers = plot_table.figure_rows(_as_dash_holds_it(fig))
    assert numbers.title == "SPE contributions"
    assert numbers.columns == ("squared residual × its sign", "y")
    assert sorted(numbers.rows) == [("-2", "b"), ("0.5", "a"), ("1", "c")]

    many = go.Figure(go.Scatter(x=np.arange(30.0), y=np.arange(30.0), mode="markers"))
    short = plot_table.figure_rows(many.to_plotly_json(), max_rows=10)
    assert len(short.rows) == 10 and "first 10 of 30" in short.notes[0]

    empty = plot_table.figure_rows(_as_dash_holds_it(figures.empty_figure("No model yet.")))
    assert empty.rows == () and empty.notes == ("No model yet.",)


def test_a_plot_is_a_named_figure_with_a_closed_disclosure():
    wrapped = plot_table.plot_figure(dcc.Graph(id=ids.GRAPH_SCORES))
    assert wrapped.role == "figure"
    assert getattr(wrapped, "aria-label") == plot_table.PLOT_NAMES[ids.GRAPH_SCORES]
    button = next(c for c in wrapped.children if isinstance(c, html.Button))
    assert getattr(button, "aria-expanded") == "false"
    assert getattr(button, "aria-controls") == ids.plot_numbers(ids.GRAPH_SCORES)
    closed = plot_table.numbers_view(2, {}, "Score plot")
    assert closed[1:] == (True, "false", plot_table.SHOW)
    opened = plot_table.numbers_view(1, _as_dash_holds_it(figures.empty_figure("x")), "Score plot")
    assert opened[1:] == (False, "true", plot_table.HIDE)


def test_tabs_follow_the_tabs_pattern(app):
    dataset_tabs = _page_module("dataset_tabs")
    tabs = dataset_tabs.tab_list({key: key.title() for key in TABS}, "loadings")
    assert tabs.role == "tablist" and getattr(tabs, "aria-label")
    for button in tabs.children:
        assert button.role == "tab"
        assert getattr(button, "aria-controls") == ids.VIEW_TABPANEL
    chosen = [b for b in tabs.children if getattr(b, "aria-selected") == "true"]
    assert [b.id for b in chosen] == [ids.view_tab("loadings")]
    assert [b.tabIndex for b in tabs.children].count("0") == 1  # one tab in the Tab order
    assert chosen[0].tabIndex == "0"
    panel = dataset_tabs.tab_panel([], "loadings")
    assert panel.role == "tabpanel" and getattr(panel, "aria-labelledby") == ids.view_tab("loadings")


def test_labels_point_at_their_controls():
    dropdown = dcc.Dropdown(id="some-choice")
    label, control = fields.labelled("Some choice", dropdown)
    assert isinstance(label, html.Label) and label.htmlFor == "some-choice" and control is dropdown
    assert label.id == fields.label_id("some-choice")  # the name assets/a11y.js gives the dropdown button
    group = fields.field_label("Options", dcc.RadioItems(id="some-options"))
    assert isinstance(group, html.Span) and group.id == "some-options-label"  # no <label for> on a div
    assert "ld-visually-hidden" in fields.field_label("Hidden", dropdown, hidden=True).className


def test_the_explained_sample_joins_the_selection_once(app):
    dataset_samples = _page_module("dataset_samples")
    result = {"dataset_id": 3, "fingerprint": "abc"}
    added = dataset_samples.with_sample({"dataset_id": 3, "sample_ids": ["S-1"], "drawn_on": "graph-scores"},
                                        "S-2", result)
    assert added["sample_ids"] == ["S-1", "S-2"] and added["drawn_on"] is None and added["fingerprint"] == "abc"
    assert dataset_samples.with_sample(added, "S-2", result) is None
    assert dataset_samples.with_sample(None, None, result) is None
