"""Figure builders on data: the right traces, limits and colours.

Outside sources named beside each check.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import pytest
from scipy import stats
from sklearn.datasets import load_iris

from webapp.web.ui import figures as F

# Okabe, M., Ito, K. (2008) Color Universal Design (CUD): How to make figures and
# presentations that are friendly to colorblind people, J*FLY; the eight colours as published.
OKABE_ITO_PUBLISHED = ["#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000"]


def _iris_pca():
    """Autoscaled iris (shipped by scikit-learn), PCA by numpy SVD: scores, eigenvalues, ratio."""
    x = load_iris().data
    z = (x - x.mean(0)) / x.std(0, ddof=1)
    u, s, vt = np.linalg.svd(z, full_matrices=False)
    scores = u * s
    eig = s**2 / (x.shape[0] - 1)
    return scores, vt.T, eig, eig / eig.sum()


def _training_t2_limit(n: int, a: int, confidence: float) -> float:
    # Tracy, Young & Mason (1992), J. Quality Technology 24(2) 88-95: for training samples
    # T2 ~ ((n-1)^2 / n) Beta(A/2, (n-A-1)/2); quantile from scipy.
    return (n - 1) ** 2 / n * stats.beta.ppf(confidence, a / 2, (n - a - 1) / 2)


def _traces(fig, name_prefix):
    return [t for t in fig.data if t.name and str(t.name).startswith(name_prefix)]


def test_okabe_ito_palette_is_the_published_one():
    assert list(F.OKABE_ITO) == OKABE_ITO_PUBLISHED


def test_groups_get_okabe_ito_colours_in_order_and_missing_is_grey():
    colours = F.group_colours(["a", "b", "c", "(missing)"])
    assert [colours["a"], colours["b"], colours["c"]] == OKABE_ITO_PUBLISHED[:3]
    assert colours["(missing)"] not in OKABE_ITO_PUBLISHED


def test_score_plot_axis_titles_carry_percent_explained():
    scores, _, eig, ratio = _iris_pca()
    fig = F.score_figure(scores, ratio, x=0, y=2)
    assert fig.layout.xaxis.title.text == f"PC1 ({100 * ratio[0]:.1f}%)"
    assert fig.layout.yaxis.title.text == f"PC3 ({100 * ratio[2]:.1f}%)"
    # correlation PCA of iris: first eigenvalue 2.918 of a total of 4, i.e. 73.0% (from memory).
    assert fig.layout.xaxis.title.text == "PC1 (73.0%)"


def test_score_plot_categorical_colour_one_trace_per_group_with_okabe_ito():
    scores, _, _, ratio = _iris_pca()
    species = np.array(load_iris().target_names)[load_iris().target]
    fig = F.score_figure(scores, ratio, colour_values=species, colour_name="species")
    groups = [t for t in fig.data if t.name in set(species)]
    assert [t.name for t in groups] == ["setosa", "versicolor", "virginica"]
    assert [t.marker.color for t in groups] == OKABE_ITO_PUBLISHED[:3]
    assert sum(len(t.x) for t in groups) == 150
    # every point carries its row so clicks map back to the sample
    rows = np.concatenate([np.asarray(t.customdata) for t in groups])
    assert sorted(rows.tolist()) == list(range(150))
    setosa_rows = np.asarray(groups[0].customdata)
    assert np.all(species[setosa_rows] == "setosa")
    np.testing.assert_allclose(groups[0].x, scores[setosa_rows, 0])


def test_score_plot_numeric_colour_uses_a_continuous_scale_with_colour_bar():
    scores, _, _, ratio = _iris_pca()
    petal = load_iris().data[:, 2]
    fig = F.score_figure(scores, ratio, colour_values=petal.astype(str), colour_name="petal length")
    main = fig.data[0]
    assert main.marker.showscale is True
    assert main.marker.colorbar.title.text == "petal length"
    np.testing.assert_allclose(main.marker.color, petal)


def test_few_distinct_numbers_are_coloured_as_groups():
    # common practice: a batch code 1..3 is a grouping, not a measurement
    assert not F.is_numeric_column([1, 2, 3, 1, 2, 3] * 5)
    assert F.is_numeric_column(np.linspace(0, 1, 30))
    assert not F.is_numeric_column(["a", "b"] * 10)


def test_symbols_follow_a_second_column_and_get_legend_entries():
    scores, _, _, ratio = _iris_pca()
    site = np.where(np.arange(150) % 2 == 0, "north", "south")
    fig = F.score_figure(scores, ratio, symbol_values=site, symbol_name="site")
    main = fig.data[0]
    expected = np.where(site == "north", F.SYMBOLS[0], F.SYMBOLS[1])
    assert list(main.marker.symbol) == expected.tolist()
    shapes = [t for t in fig.data if t.legendgroup == "symbols"]
    # The column name heads the group once; each entry is the plain value, never 'site: north'.
    assert [t.name for t in shapes] == ["north", "south"]
    assert [t.legendgrouptitle.text for t in shapes] == ["site", None]


def test_shape_legend_never_repeats_the_column_name_on_large_plots():
    rng = np.random.default_rng(5)
    n = F.WEBGL_THRESHOLD + 10
    site = rng.choice(["Site North", "Site South"], size=n)
    fig = F.score_figure(rng.normal(size=(n, 2)), [0.6, 0.4], symbol_values=site, symbol_name="Site")
    shapes = [t for t in fig.data if t.legendgroup == "symbols"]
    assert [t.name for t in shapes] == ["Site North", "Site South"]
    assert not any(str(t.name).startswith("Site: ") for t in fig.data)


def test_labels_switch_text_mode():
    scores, _, _, ratio = _iris_pca()
    ids = [f"S{i}" for i in range(150)]
    assert F.score_figure(scores, ratio, sample_ids=ids, labels=True).data[0].mode == "markers+text"
    assert F.score_figure(scores, ratio, sample_ids=ids, labels=False).data[0].mode == "markers"


@pytest.mark.parametrize("confidence", [0.95, 0.99])
def test_t2_ellipse_radius_from_the_beta_quantile(confidence):
    scores, _, eig, ratio = _iris_pca()
    n = scores.shape[0]
    limit = _training_t2_limit(n, 2, confidence)  # Tracy, Young & Mason 1992
    fig = F.score_figure(scores, ratio, eigenvalues=eig, t2_limits={confidence: limit})
    (ellipse,) = _traces(fig, "T² ")
    assert ellipse.name == f"T² {100 * confidence:g}% limit"
    ex, ey = np.asarray(ellipse.x), np.asarray(ellipse.y)
    # semi-axis along component a = sqrt(limit * lambda_a)
    assert ex.max() == pytest.approx(np.sqrt(limit * eig[0]), rel=1e-9)
    assert ey.max() == pytest.approx(np.sqrt(limit * eig[1]), rel=1e-3)
    # every point on the curve has T2 (on these two components) equal to the limit
    np.testing.assert_allclose(ex**2 / eig[0] + ey**2 / eig[1], limit, rtol=1e-9)


def test_ellipse_covers_about_the_stated_share_of_model_samples():
    # Tracy, Young & Mason 1992: about 5% of in-control training samples beyond the 95% limit.
    rng = np.random.default_rng(7)
    n = 4000
    scores = rng.normal(size=(n, 2)) * [3.0, 1.5]
    scores -= scores.mean(0)
    eig = scores.var(0, ddof=1)
    limit = _training_t2_limit(n, 2, 0.95)
    ax, ay = F.ellipse_semi_axes(limit, eig[0], eig[1])
    outside = (scores[:, 0] / ax) ** 2 + (scores[:, 1] / ay) ** 2 > 1
    assert 0.04 < outside.mean() < 0.06


def test_scattergl_above_threshold_and_svg_below():
    rng = np.random.default_rng(1)
    small = F.score_figure(rng.normal(size=(F.WEBGL_THRESHOLD, 2)), [0.6, 0.4])
    large = F.score_figure(rng.normal(size=(F.WEBGL_THRESHOLD + 1, 2)), [0.6, 0.4])
    assert isinstance(small.data[0], go.Scatter)
    assert isinstance(large.data[0], go.Scattergl)
    assert isinstance(F.t2_spe_figure(rng.chisquare(2, 3000), rng.chisquare(2, 3000), {0.95: 6.0}, {0.95: 6.0}).data[0],
                      go.Scattergl)


def test_point_coordinates_are_sent_as_binary_arrays():
    # Plotly.py serialises numpy arrays as base64 typed arrays ("bdata"), plotly.js >= 2.28 reads them.
    rng = np.random.default_rng(2)
    fig = F.score_figure(rng.normal(size=(5000, 3)), [0.5, 0.3, 0.2])
    trace = json.loads(fig.to_json())["data"][0]
    assert set(trace["x"]) == {"dtype", "bdata"}
    assert set(trace["customdata"]) == {"dtype", "bdata"}


def test_user_text_is_escaped_for_plotly_labels():
    scores = np.array([[1.0, 0.0], [-1.0, 0.0], [0.0, 1.0]])
    fig = F.score_figure(scores, [0.5, 0.5], sample_ids=["<b>x</b>", "a&b", "ok"],
                         colour_values=["<img src=x>", "g", "g"], colour_name="<i>c</i>")
    texts = [s for t in fig.data if t.text is not None for s in t.text]
    assert "&lt;b&gt;x&lt;/b&gt;" in texts and "a&amp;b" in texts
    assert "&lt;img src=x&gt;" in [t.name for t in fig.data]
    assert fig.layout.legend.title.text == "&lt;i&gt;c&lt;/i&gt;"


def test_variance_figure_marks_cv_curve_and_recommendation():
    _, _, eig, ratio = _iris_pca()
    cv = np.array([0.6, 0.8, 0.85, 0.86])
    fig = F.variance_figure(ratio, cv_cumulative=cv, recommended=2)
    names = [t.name for t in fig.data]
    assert names == ["Per component", "Cumulative", "Cumulative, cross-validated"]
    np.testing.assert_allclose(fig.data[1].y, 100 * np.cumsum(ratio))
    np.testing.assert_allclose(fig.data[2].y, 100 * cv)
    marks = [s for s in fig.layout.shapes if s.type == "line"]
    assert [s.x0 for s in marks] == [2]
    assert any("recommended: 2" in a.text for a in fig.layout.annotations)
    assert tuple(fig.layout.yaxis.range) == (0, 102)  # no negative shares here: full 0-100% scale
    worse = F.variance_figure(ratio, cv_cumulative=[0.6, 0.2, -4.0, -80.0], recommended=1)
    assert worse.layout.yaxis.range[0] == F.CV_FLOOR
    assert any("run off the chart" in a.text for a in worse.layout.annotations)


def test_variable_explained_sorted_in_percent():
    fig = F.variable_explained_figure(["a", "b", "c"], [0.5, 0.1, 0.9])
    assert list(fig.data[0].y) == ["b", "a", "c"]
    np.testing.assert_allclose(fig.data[0].x, [10, 50, 90])


def test_loading_plot_and_bars():
    _, loadings, _, ratio = _iris_pca()
    names = load_iris().feature_names
    fig = F.loading_figure(loadings, names, ratio, x=0, y=1)
    np.testing.assert_allclose(fig.data[0].x, loadings[:, 0])
    assert fig.layout.xaxis.title.text.startswith("Loading on PC1 (")
    bars = F.loading_bars_figure(loadings, names, 1, ratio)
    np.testing.assert_allclose(bars.data[0].y, loadings[:, 1])
    assert list(bars.data[0].x) == names


def test_biplot_scaling_reproduces_the_rank_two_approximation():
    # Gabriel (1971), Biometrika 58: G H' equals the rank-2 approximation when G = T / sqrt(lambda)
    # (times sqrt(n-1)) and H = P sqrt(lambda) (divided by sqrt(n-1)).
    x = load_iris().data
    z = (x - x.mean(0)) / x.std(0, ddof=1)
    scores, loadings, eig, ratio = _iris_pca()
    points, arrows, k = F.biplot_scaling(scores, loadings, eig)
    approx = points @ (arrows / k).T
    u, s, vt = np.linalg.svd(z, full_matrices=False)
    np.testing.assert_allclose(approx, (u[:, :2] * s[:2]) @ vt[:2], atol=1e-10)
    np.testing.assert_allclose(points.std(0, ddof=1), [1.0, 1.0])
    # for autoscaled data the unscaled arrows are correlations of variables with the scores
    corr = [np.corrcoef(z[:, j], scores[:, 0])[0, 1] for j in range(4)]
    np.testing.assert_allclose((arrows / k)[:, 0], corr, atol=1e-10)
    fig = F.biplot_figure(scores, loadings, eig, ratio, load_iris().feature_names)
    assert f"× {k:g}" in fig.layout.title.text


def test_t2_spe_regions_and_both_limits():
    t2 = np.array([1.0, 9.0, 1.0, 9.0])
    spe = np.array([1.0, 1.0, 9.0, 9.0])
    assert F.classify_regions(t2, spe, 5.0, 5.0).tolist() == ["inside", "t2", "spe", "both"]
    fig = F.t2_spe_figure(t2, spe, {0.95: 5.0, 0.99: 7.0}, {0.95: 5.0, 0.99: 8.0}, sample_ids=list("abcd"))
    assert [t.name for t in fig.data] == ["within limits (1)", "high T² only (1)", "high SPE only (1)",
                                          "high T² and SPE (1)"]
    vlines = sorted(s.x0 for s in fig.layout.shapes if s.x0 == s.x1 and s.xref == "x")
    hlines = sorted(s.y0 for s in fig.layout.shapes if s.y0 == s.y1 and s.yref == "y")
    assert vlines == [5.0, 7.0] and hlines == [5.0, 8.0]
    assert set(F.REGION_TEXT) == {"inside", "t2", "spe", "both"}


def test_control_chart_against_dates_flags_points_beyond_limit():
    values = np.array([1.0, 12.0, 2.0, 3.0])
    dates = ["2024-03-04", "2024-01-02", "2024-02-01", "2024-05-06"]
    fig = F.control_chart_figure(values, {0.95: 6.0, 0.99: 10.0}, name="T²", order=dates, order_name="run date",
                                 sample_ids=list("abcd"))
    beyond = _traces(fig, "beyond 99% limit")[0]
    assert list(beyond.text) == ["b"] and list(beyond.customdata) == [1]
    within = _traces(fig, "within 99% limit")[0]
    assert list(within.text) == ["c", "a", "d"]  # sorted by date
    assert fig.layout.xaxis.title.text == "run date"
    assert sorted(s.y0 for s in fig.layout.shapes) == [6.0, 10.0]


def test_control_chart_default_order_is_sample_order():
    fig = F.control_chart_figure([3.0, 1.0, 2.0], {0.95: 2.5}, name="SPE")
    assert fig.layout.xaxis.title.text == "Sample order"
    np.testing.assert_allclose(fig.data[0].x, [1, 2, 3])


def test_contribution_bars_signed_and_ranked():
    fig = F.contribution_figure(["a", "b", "c", "d"], [0.5, -3.0, 2.0, 0.1], title="SPE", top=3)
    bar = fig.data[0]
    assert list(bar.y) == ["a", "c", "b"]  # largest |value| at the top (last drawn)
    np.testing.assert_allclose(bar.x, [0.5, 2.0, -3.0])
    assert list(bar.marker.color) == [F.POSITIVE_COLOUR, F.POSITIVE_COLOUR, F.NEGATIVE_COLOUR]


def test_hover_metadata_shown_for_moderate_sizes():
    scores = np.zeros((3, 2))
    meta = pd.DataFrame({"site": ["n", "s", None]})
    fig = F.score_figure(scores, [0.5, 0.5], metadata=meta)
    assert list(fig.data[0].hovertext) == ["site: n", "site: s", "site: "]


def test_colour_and_shape_together_keep_a_plain_colour_legend():
    scores, _, _, ratio = _iris_pca()
    species = np.array(load_iris().target_names)[load_iris().target]
    site = np.where(np.arange(150) % 2 == 0, "north", "south")
    fig = F.score_figure(scores, ratio, colour_values=species, symbol_values=site, symbol_name="site")
    points = [t for t in fig.data if t.x is not None and len(t.x) > 1 and t.mode == "markers"]
    assert sum(len(t.x) for t in points) == 150 and not any(t.showlegend for t in points)
    legend = [t for t in fig.data if t.showlegend is not False and t.name in set(species)]
    assert [t.marker.symbol for t in legend] == ["circle"] * 3
    assert [t.marker.color for t in legend] == OKABE_ITO_PUBLISHED[:3]


def _decode(spec):
    import base64

    return np.frombuffer(base64.b64decode(spec["bdata"]), dtype=np.dtype(spec["dtype"]).newbyteorder("<"))


def test_large_score_plot_has_one_flat_coloured_trace_per_group():
    rng = np.random.default_rng(3)
    n = F.WEBGL_THRESHOLD + 500
    scores = rng.normal(size=(n, 3))
    groups = rng.choice(["b", "a", "c"], size=n)
    eig = scores.var(0, ddof=1)
    limits = {0.95: 6.0, 0.99: 9.2}
    fig = F.score_figure(scores, [0.5, 0.3, 0.2], colour_values=groups, colour_name="grp", eigenvalues=eig,
                         t2_limits=limits, highlight=[7])
    assert [t.name for t in fig.data] == ["a", "b", "c", "T² 95% limit", "T² 99% limit", "picked"]
    rows = []
    for trace, group, colour in zip(fig.data[:3], ["a", "b", "c"], OKABE_ITO_PUBLISHED):
        assert isinstance(trace, go.Scattergl) and trace.showlegend is True
        # one flat colour per group, in sorted group order (Okabe & Ito 2008 palette)
        assert trace.marker.color.lower() == colour.lower()
        members = np.asarray(trace.customdata)
        assert (groups[members] == group).all()
        np.testing.assert_allclose(np.asarray(trace.x), scores[members, 0], rtol=1e-6)  # sent as float32
        assert list(trace.text) == [str(i + 1) for i in members]
        rows.append(members)
    np.testing.assert_array_equal(np.sort(np.concatenate(rows)), np.arange(n))  # every sample exactly once
    assert list(fig.data[5].customdata) == [7]
    plain_fig = F.score_figure(scores, [0.5, 0.3, 0.2])
    assert [t.name for t in plain_fig.data] == ["samples", "picked"] and plain_fig.data[0].showlegend is False


def test_large_numeric_colour_keeps_missing_values_grey():
    values = np.linspace(0.0, 10.0, 40).astype(object)
    values[3] = None
    enc = F.score_colours(values, "temperature")
    (part,) = enc["parts"]
    colour = part["marker"]["color"]
    assert part["rows"] is None
    assert colour[3] < part["marker"]["cmin"] + 1e-12 and part["marker"]["cmin"] < 0.0
    assert part["marker"]["colorscale"][0][1] == F.MISSING_COLOUR
    assert [t.name for t in enc["legend"]] == ["(missing)"]
    full = F.score_colours(np.linspace(0.0, 10.0, 40), "temperature")
    assert full["parts"][0]["marker"]["colorscale"] == F.CONTINUOUS_SCALE and full["legend"] == []


def test_typed_array_round_trip():
    values = np.array([1.5, -2.25, 3e-9])
    spec = F.typed_array(values)
    assert spec["dtype"] == "f8"
    np.testing.assert_array_equal(_decode(spec), values)


def test_score_axes_for_another_pair():
    rng = np.random.default_rng(4)
    scores = rng.normal(size=(50, 3))
    axes = F.score_axes(scores, [0.5, 0.3, 0.2], 2, 0, scores.var(0, ddof=1), {0.95: 5.0}, [4])
    np.testing.assert_array_equal(axes["x"], scores[:, 2])
    assert axes["xtitle"] == "PC3 (20.0%)" and axes["ytitle"] == "PC1 (50.0%)"
    assert axes["picked"][0].tolist() == [scores[4, 2]]
    ex, ey = axes["ellipses"][0]
    np.testing.assert_allclose(ex**2 / scores[:, 2].var(ddof=1) + ey**2 / scores[:, 0].var(ddof=1), 5.0)


# ------------------------------------------------------------------ selection
# Plotly's trace attribute ``selectedpoints`` (plotly.js reference, scatter / scattergl):
# indices of the selected points within the trace; an empty array dims all of the trace's
# points, and no value (None) means no selection at all, every point drawn as usual.
def _expected_selected(trace, chosen: set) -> list[int]:
    """Positions within the trace of the chosen ids, read off the trace's own point ids."""
    return [i for i, text in enumerate(trace.text) if text in chosen]


def test_selected_ids_map_to_selectedpoints_of_each_group_trace():
    scores, _, _, ratio = _iris_pca()
    species = np.array(load_iris().target_names)[load_iris().target]
    ids = [f"iris-{i + 1}" for i in range(150)]
    # two setosa (rows 0-49), one virginica (rows 100-149), none of versicolor; one unknown id
    chosen = ["iris-3", "iris-120", "iris-41", "no-such-sample"]
    fig = F.score_figure(scores, ratio, sample_ids=ids, colour_values=species, colour_name="species",
                         selected=chosen)
    groups = {t.name: t for t in fig.data if t.name in set(species)}
    assert list(groups["setosa"].selectedpoints) == [2, 40]  # rows 2 and 40 in a trace of rows 0-49
    assert list(groups["virginica"].selectedpoints) == [19]  # row 119 in a trace of rows 100-149
    assert list(groups["versicolor"].selectedpoints) == []  # all dimmed, as after a drag
    for trace in groups.values():
        assert list(trace.selectedpoints) == _expected_selected(trace, set(chosen))
    assert fig.layout.selectionrevision is False  # the figure's selection wins over an earlier drag


def test_nothing_selected_or_only_unknown_ids_draw_every_point_as_usual():
    scores, _, _, ratio = _iris_pca()
    species = np.array(load_iris().target_names)[load_iris().target]
    for chosen in (None, [], ["not-in-this-fit"]):
        fig = F.score_figure(scores, ratio, colour_values=species, selected=chosen)
        assert all(t.selectedpoints is None for t in fig.data)
    # without sample ids the points are named 1..n, and the selection uses those names
    fig = F.score_figure(scores, ratio, selected=["1", "150"])
    assert list(fig.data[0].selectedpoints) == [0, 149]


def test_selection_in_a_large_score_plot_and_the_diagnostics_plots():
    rng = np.random.default_rng(5)
    n = F.WEBGL_THRESHOLD + 300
    ids = [f"s{i:05d}" for i in range(n)]
    groups = rng.choice(["b", "a", "c"], size=n)
    chosen = {ids[i] for i in rng.choice(n, size=60, replace=False)} | {"gone"}
    fig = F.score_figure(rng.normal(size=(n, 2)), [0.6, 0.4], sample_ids=ids, colour_values=groups,
                         selected=sorted(chosen))
    points = [t for t in fig.data if t.type == "scattergl"]
    assert len(points) == 3
    for trace in points:
        assert list(trace.selectedpoints) == _expected_selected(trace, chosen)
    assert sum(len(t.selectedpoints) for t in points) == 60
    assert fig.data[-1].name == "picked" and fig.data[-1].selectedpoints is None

    t2, spe = rng.chisquare(2, n), rng.chisquare(3, n)
    both = F.t2_spe_figure(t2, spe, {0.95: 6.0}, {0.95: 7.8}, sample_ids=ids, selected=sorted(chosen))
    order = rng.permutation(n).astype(float)  # the chart sorts the points by this column
    chart = F.control_chart_figure(t2, {0.95: 6.0, 0.99: 9.2}, name="T²", order=order, order_name="run",
                                   sample_ids=ids, selected=sorted(chosen))
    for fig in (both, chart):
        marked = [t for t in fig.data if t.mode == "markers"]
        assert marked and all(list(t.selectedpoints) == _expected_selected(t, chosen) for t in marked)
        assert sum(len(t.selectedpoints) for t in marked) == 60
    assert chart.data[0].mode == "lines" and chart.data[0].selectedpoints is None


def test_control_chart_flags_at_the_chosen_confidence_with_a_shape():
    # The chart flags what the T2-vs-SPE plot and the outlier table flag: the chosen level
    # (95% here), not the highest limit drawn; flagged points also change shape (WCAG 2.2 SC 1.4.1,
    # use of colour).
    values = np.array([1.0, 7.0, 2.0, 11.0])
    fig = F.control_chart_figure(values, {0.95: 6.0, 0.99: 10.0}, name="T²", confidence=0.95)
    beyond = _traces(fig, "beyond 95% limit")[0]
    assert sorted(beyond.customdata) == [1, 3]
    assert beyond.marker.symbol == "diamond" and beyond.marker.color == F.FLAG_COLOUR
    assert _traces(fig, "within 95% limit")[0].marker.symbol == "circle"


def test_t2_spe_regions_differ_by_shape_as_well_as_colour():
    fig = F.t2_spe_figure([1.0, 9.0, 1.0, 9.0], [1.0, 1.0, 9.0, 9.0], {0.95: 5.0}, {0.95: 5.0}, confidence=0.95)
    symbols = [t.marker.symbol for t in fig.data if t.mode == "markers"]
    assert len(set(symbols)) == 4


def test_loading_labels_stay_inside_the_picture_and_spread_outwards():
    scores, loadings, eig, ratio = _iris_pca()
    names = ["a rather long variable name (%)"] + list(load_iris().feature_names[1:])
    fig = F.loading_figure(loadings, names, ratio)
    trace = fig.data[0]
    assert trace.cliponaxis is False
    # a label sits on the side its point lies from the origin
    for px, py, pos in zip(trace.x, trace.y, trace.textposition):
        assert pos.endswith("right" if px >= 0 else "left") and pos.startswith("top" if py >= 0 else "bottom")
    # the x range leaves room beyond the outermost points for the longest label
    low, high = fig.layout.xaxis.range
    span = max(trace.x.max(), 0) - min(trace.x.min(), 0)
    assert high - max(trace.x.max(), 0) > 0.3 * span and min(trace.x.min(), 0) - low > 0.3 * span


def test_biplot_title_and_legend_do_not_share_the_top():
    scores, loadings, eig, ratio = _iris_pca()
    fig = F.biplot_figure(scores, loadings, eig, ratio, load_iris().feature_names,
                          colour_values=np.array(load_iris().target_names)[load_iris().target], colour_name="species")
    assert fig.layout.title.text.startswith("Biplot")
    assert fig.layout.legend.y < 0 and fig.layout.legend.yanchor == "top"
