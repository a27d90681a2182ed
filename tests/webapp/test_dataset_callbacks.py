"""The dataset and upload pages' callback bodies, called as plain functions.

Data: the wine recognition data shipped with scikit-learn (Aeberhard, Coomans &
de Vel 1992; ``sklearn.datasets.load_wine``), with sample ids and the cultivar
column added (tests/webapp/wine_data.py). Reference numbers come from numpy/scipy
on the same data, never from our own output.
"""

from __future__ import annotations

import base64
import csv
import importlib
import io

import numpy as np
import pytest
from scipy import stats

from analysis.errors import InputError
from tests.webapp.wine_data import variables, wine_csv, wine_frame
from webapp.services import modelling
from webapp.web.ui import ids
from webapp.url_state import ViewState


def _pages():
    # Dash's page loader runs the page modules when the app is built; take those modules.
    return (importlib.import_module("webapp.web.pages.dataset"), importlib.import_module("webapp.web.pages.dataset_views"),
            importlib.import_module("webapp.web.pages.dataset_samples"), importlib.import_module("webapp.web.pages.upload"))


@pytest.fixture
def wine(app, make_user):
    """(app, dataset id, user id) with the wine data stored."""
    from webapp.services import ingest
    from webapp.store import accounts, session_scope

    name, _ = make_user("analyst")
    with app.app_context():
        with session_scope() as s:
            user_id = accounts.get_user_by_name(s, name).id
        dataset = ingest.ingest_upload(wine_csv(), "wine.csv", user_id, id_column="sample")
    return app, dataset["id"], user_id


@pytest.fixture
def fitted(wine):
    app, dataset_id, user_id = wine
    dataset, *_ = _pages()
    with app.app_context():
        result = dataset.fit_summary(dataset_id, dataset.applied_settings(ViewState(components=3)), user_id)
    return app, result


def _autoscaled_wine():
    x = wine_frame()[variables()].to_numpy(dtype=float)
    return (x - x.mean(0)) / x.std(0, ddof=1)


# ------------------------------------------------------------ URL <-> controls
def test_location_wins_on_load_and_back(app):
    dataset, *_ = _pages()
    state, notes, set_controls = dataset.sync_state(ids.DATASET_LOCATION, "?tab=outliers&colour=cultivar&a=2",
                                                    {}, None, {})
    assert set_controls and notes == []
    assert state == ViewState(tab="outliers", colour="cultivar", components=2)
    assert dataset.view_values(state)["tab"] == "outliers"
    assert dataset.form_values(state)["components"] == "2"


def test_a_control_changed_together_with_the_address_wins(app):
    # The address decides only when it changed alone; with a control in the same round trip
    # it is the page's own earlier write (common practice for URL-synced state).
    dataset, *_ = _pages()
    assert dataset.deciding_trigger([ids.DATASET_LOCATION]) == ids.DATASET_LOCATION
    assert dataset.deciding_trigger([ids.DATASET_LOCATION, ids.VIEW_TABS]) == ids.VIEW_TABS
    assert dataset.deciding_trigger([ids.VIEW_TABS, ids.DATASET_LOCATION]) == ids.VIEW_TABS
    assert dataset.deciding_trigger([]) is None


def test_view_control_change_keeps_applied_settings(app):
    dataset, *_ = _pages()
    applied = dataset.applied_settings(ViewState(components=4, exclude=("W-001",)))
    view = dataset.view_values(ViewState())
    view.update(colour="cultivar", pcx=2, pcy=3, labels=["on"])
    state, _, set_controls = dataset.sync_state(ids.VIEW_COLOUR, "", view, applied, {})
    assert not set_controls
    assert (state.colour, state.pcx, state.pcy, state.labels) == ("cultivar", 2, 3, True)
    assert (state.components, state.exclude) == (4, ("W-001",))


def test_fit_button_applies_the_form_and_keeps_left_out_samples(app):
    dataset, *_ = _pages()
    applied = dataset.applied_settings(ViewState(exclude=("W-007",)))
    form = {"drop": ["Ash"], "log10": ["Ash", "Proline"], "scaling": "pareto", "components": "2", "confidence": 0.99}
    state, _, _ = dataset.sync_state(ids.SETTINGS_FIT, "", dataset.view_values(ViewState()), applied, form)
    assert state.components == 2 and state.scaling == "pareto" and state.confidence == 0.99
    assert state.drop == ("Ash",) and state.log10 == ("Proline",)  # a dropped variable is not transformed
    assert state.exclude == ("W-007",)


def test_same_component_on_both_axes_is_corrected(app):
    dataset, *_ = _pages()
    state = dataset.state_from_controls({"pcx": 2, "pcy": 2}, None)
    assert state.pcx != state.pcy


def test_toolbar_groups_per_tab(app):
    dataset, *_ = _pages()
    assert dataset.toolbar_hidden("scores") == {"axes": False, "loadings": True, "order": True}
    assert dataset.toolbar_hidden("diagnostics") == {"axes": True, "loadings": True, "order": False}


# --------------------------------------------------------------------- fitting
def test_fit_summary_matches_an_svd_and_then_comes_from_the_cache(wine):
    app, dataset_id, user_id = wine
    dataset, *_ = _pages()
    settings = dataset.applied_settings(ViewState(components=3))
    with app.app_context():
        first = dataset.fit_summary(dataset_id, settings, user_id)
        again = dataset.fit_summary(dataset_id, settings, user_id)
    assert first["ok"] and first["cache_hit"] is False and again["cache_hit"] is True
    assert first["fingerprint"] == again["fingerprint"]
    s = np.linalg.svd(_autoscaled_wine(), compute_uv=False)
    np.testing.assert_allclose(first["explained_variance_ratio"], (s**2 / np.sum(s**2))[:3], rtol=1e-8)
    assert first["rank"] is None  # with a number given, the component-choice table is computed on request
    with app.app_context():
        rank = modelling.rank_summary(dataset_id, first["settings"], user_id)
    assert [row["components"] for row in rank["table"]][:3] == [1, 2, 3]
    np.testing.assert_allclose([row["explained"] for row in rank["table"]][:3], (s**2 / np.sum(s**2))[:3],
                               rtol=1e-8)


def test_bad_settings_give_the_services_message(wine):
    app, dataset_id, user_id = wine
    dataset, *_ = _pages()
    with app.app_context():
        result = dataset.fit_summary(dataset_id, dataset.applied_settings(ViewState(components=40)), user_id)
    assert result["ok"] is False and "40" in result["error"]


def test_fit_line_says_where_the_model_came_from(fitted):
    _, result = fitted
    dataset, *_ = _pages()
    recommendation, source, _ = dataset.fit_line(result)
    assert source.startswith("Showing 3 components, model ")
    assert "fitted in" in source or "from the cache" in source


# ------------------------------------------------------------------- the plots
def test_recolouring_and_axes_never_refit(fitted, monkeypatch):
    app, result = fitted
    _, views, _, _ = _pages()
    from webapp.services import modelling

    def no_fit(*args, **kwargs):
        raise AssertionError("a view change refitted the model")

    monkeypatch.setattr(modelling, "_fit", no_fit)
    with app.app_context():
        plain, hit = views.score_view(result, pcx=1, pcy=2, colour=None, shape=None, labels=False)
        coloured, hit2 = views.score_view(result, pcx=1, pcy=3, colour="cultivar", shape=None, labels=True)
    assert hit and hit2
    groups = [t.name for t in coloured.data if t.name and t.name.startswith("cultivar")]
    assert groups == ["cultivar 1", "cultivar 2", "cultivar 3"]
    assert coloured.layout.yaxis.title.text.startswith("PC3 (")
    assert coloured.data[0].mode == "markers+text"


def test_score_ellipses_use_the_two_component_training_limit(fitted):
    app, result = fitted
    _, views, _, _ = _pages()
    n = 178
    for confidence in (0.95, 0.99):
        # Tracy, Young & Mason (1992): T2 ~ ((n-1)^2/n) Beta(A/2, (n-A-1)/2), A = 2 plotted components
        expected = (n - 1) ** 2 / n * stats.beta.ppf(confidence, 1.0, (n - 3) / 2)
        assert views.ellipse_limits(n)[confidence] == pytest.approx(expected, rel=1e-12)
    with app.app_context():
        fig, _ = views.score_view(result, pcx=1, pcy=2, colour=None, shape=None, labels=False)
    ellipse = [t for t in fig.data if t.name == "T² 95% limit"][0]
    s = np.linalg.svd(_autoscaled_wine(), compute_uv=False)
    eig = s**2 / (n - 1)
    limit = (n - 1) ** 2 / n * stats.beta.ppf(0.95, 1.0, (n - 3) / 2)
    assert max(ellipse.x) == pytest.approx(np.sqrt(limit * eig[0]), rel=1e-8)


def test_a_one_component_model_still_has_a_score_plot(wine):
    # PC1 against sample order with +-sqrt(L lambda_1), L the training T2 limit for A = 1
    # (Tracy, Young & Mason 1992: ((n-1)^2/n) Beta(1/2, (n-2)/2)); lambda_1 from numpy's SVD.
    app, dataset_id, user_id = wine
    dataset, views, _, _ = _pages()
    n = 178
    with app.app_context():
        result = dataset.fit_summary(dataset_id, dataset.applied_settings(ViewState(components=1)), user_id)
        fig, _ = views.score_view(result, pcx=1, pcy=2, colour="cultivar", shape=None, labels=False)
    points = [t for t in fig.data if t.mode == "markers" and t.customdata is not None and len(t.x) > 1]
    assert sum(len(t.x) for t in points) == n and len(points) == 3  # one trace per cultivar
    z = _autoscaled_wine()
    u, s, vt = np.linalg.svd(z, full_matrices=False)
    t1 = u[:, 0] * s[0] * np.sign(vt[0, np.argmax(np.abs(vt[0]))])
    rows = np.concatenate([t.customdata for t in points])
    np.testing.assert_allclose(np.concatenate([t.y for t in points]), t1[rows], rtol=1e-8, atol=1e-10)
    np.testing.assert_array_equal(np.concatenate([t.x for t in points]), rows + 1)
    eig = s[0] ** 2 / (n - 1)
    limit = (n - 1) ** 2 / n * stats.beta.ppf(0.95, 0.5, (n - 2) / 2)
    bounds = sorted(shape.y0 for shape in fig.layout.shapes)
    assert any(abs(b - np.sqrt(limit * eig)) < 1e-8 * np.sqrt(limit * eig) for b in bounds)
    assert any(abs(b + np.sqrt(limit * eig)) < 1e-8 * np.sqrt(limit * eig) for b in bounds)
    assert fig.layout.xaxis.title.text == "Sample order"


def test_control_charts_flag_at_the_fitted_confidence(fitted):
    # the charts flag what the T2-vs-SPE plot flags: the fit's chosen level (95% by default)
    app, result = fitted
    _, views, _, _ = _pages()
    with app.app_context():
        both, t2_chart, _ = views.diagnostics_view(result, order=None)
    assert any(str(t.name).startswith("within 95% limit") for t in t2_chart.data)
    assert not any("99% limit (" in str(t.name) for t in t2_chart.data)


def test_diagnostics_draw_training_limits_at_95_and_99(fitted):
    app, result = fitted
    _, views, _, _ = _pages()
    with app.app_context():
        both, t2_chart, spe_chart = views.diagnostics_view(result, order=None)
    n, a = 178, 3
    expected = sorted((n - 1) ** 2 / n * stats.beta.ppf(c, a / 2, (n - a - 1) / 2) for c in (0.95, 0.99))
    vlines = sorted(s.x0 for s in both.layout.shapes if s.x0 == s.x1 and s.xref == "x")
    np.testing.assert_allclose(vlines, expected, rtol=1e-10)
    np.testing.assert_allclose(sorted(s.y0 for s in t2_chart.layout.shapes), expected, rtol=1e-10)
    assert spe_chart.layout.yaxis.title.text == "SPE"


def test_outlier_table_lists_every_sample_beyond_a_limit(fitted):
    app, result = fitted
    _, views, _, _ = _pages()
    with app.app_context():
        rows, columns, note = views.outlier_rows(result)
    # independent check: T2 from an SVD of the autoscaled data (sum of t_a^2 / lambda_a)
    z = _autoscaled_wine()
    u, s, vt = np.linalg.svd(z, full_matrices=False)
    n, a = z.shape[0], 3
    t2 = np.sum((u[:, :a] * np.sqrt(n - 1)) ** 2, axis=1)
    spe = np.sum((z - (u[:, :a] * s[:a]) @ vt[:a]) ** 2, axis=1)
    t2_limit = (n - 1) ** 2 / n * stats.beta.ppf(0.95, a / 2, (n - a - 1) / 2)
    beyond_t2 = set(np.flatnonzero(t2 > t2_limit))
    listed = {r["sample_id"] for r in rows}
    assert {f"W-{i + 1:03d}" for i in beyond_t2} <= listed
    spe_limit = result["spe_limit"]
    expected = {f"W-{i + 1:03d}" for i in np.flatnonzero((t2 > t2_limit) | (spe > spe_limit))}
    assert listed == expected
    assert note.startswith(f"{len(expected)} of 178 samples")
    assert all(r["top variables"] for r in rows)
    assert "meta: cultivar" in {c["field"] for c in columns}


def test_variance_view_marks_the_recommendation(fitted):
    app, result = fitted
    dataset, views, _, _ = _pages()
    with app.app_context():
        _, waiting, _ = views.variance_view(result)
        rank = modelling.rank_summary(result["dataset_id"], result["settings"])
        scree, table, per_variable = views.variance_view(result, rank)
    assert "Compute the component-choice table" in str(waiting)
    rec = rank["recommended"]
    assert any(f"recommended: {rec}" in (a.text or "") for a in scree.layout.annotations)
    assert len(per_variable.data[0].y) == 13


def test_loading_views(fitted):
    app, result = fitted
    _, views, _, _ = _pages()
    with app.app_context():
        plot = views.loading_view(result, pcx=1, pcy=2, mode="plot")
        bars = views.loading_view(result, pcx=2, pcy=1, mode="bars")
        biplot = views.loading_view(result, pcx=1, pcy=2, mode="biplot", colour="cultivar")
    _, _, vt = np.linalg.svd(_autoscaled_wine(), full_matrices=False)
    # loadings equal the right singular vectors up to sign (sign convention: largest |element| positive)
    np.testing.assert_allclose(np.abs(plot.data[0].x), np.abs(vt[0]), atol=1e-8)
    assert bars.layout.title.text.startswith("Loadings of PC2")
    assert "Biplot" in biplot.layout.title.text


# ------------------------------------------------ clicks, selection, explanation
def test_clicks_and_selections_give_the_sample_ids_back(app):
    _, views, samples, _ = _pages()
    assert views.clicked_sample({"points": [{"text": "a&amp;b &lt;1&gt;", "customdata": 3}]}) == "a&b <1>"
    assert views.clicked_sample({"points": [{"x": 1}]}) is None
    event = {"points": [{"text": "W-002"}, {"text": "W-001"}, {"text": "W-002"}]}
    assert views.selected_samples(event) == ["W-002", "W-001"]
    store = views.selection_data(event, {"dataset_id": 5, "sample_ids": []}, {"fingerprint": "f", "dataset_id": 5},
                                 ids.GRAPH_SCORES)
    assert store == {"dataset_id": 5, "fingerprint": "f", "sample_ids": ["W-002", "W-001"],
                     "drawn_on": ids.GRAPH_SCORES}
    applied = {"exclude": ["W-009"], "components": 2}
    assert samples.leave_out(applied, store)["exclude"] == ["W-009", "W-002", "W-001"]
    assert samples.leave_out(applied, {"sample_ids": []}) is None


def test_explanation_names_the_driving_variables(fitted):
    app, result = fitted
    _, views, samples, _ = _pages()
    with app.app_context():
        rows, _, _ = views.outlier_rows(result)
        panel = samples.explain_view(result, rows[0]["sample_id"])
        missing = samples.explain_view(result, "no-such-sample")
    text = str(panel)
    assert rows[0]["sample_id"] in text and "mainly because of" in text
    assert "has no sample no-such-sample" in str(missing)


def test_csv_download_has_one_row_per_sample_and_numbers(fitted):
    app, result = fitted
    _, _, samples, _ = _pages()
    with app.app_context():
        content, name = samples.download_payload(result, "samples", "csv")
        xlsx, xname = samples.download_payload(result, "loadings", "xlsx")
    rows = list(csv.DictReader(io.StringIO(content.decode("utf-8"))))
    assert name.endswith(".csv") and len(rows) == 178
    assert rows[0]["sample_id"] == "W-001" and float(rows[0]["T2"]) >= 0
    assert xname.endswith(".xlsx") and xlsx[:2] == b"PK"  # XLSX is a zip container (ECMA-376)


# ---------------------------------------------------------------------- upload
def _data_url(raw: bytes) -> str:
    return "data:text/csv;base64," + base64.b64encode(raw).decode()


def test_upload_preview_shows_the_report_and_stores_nothing(wine):
    app, _, user_id = wine
    *_, upload = _pages()
    raw = "id;grp;a;b\nx1;g;1,5;<0,1\nx2;g;2,5;0,3\nx3;h;1,0;0,2\n".encode()
    with app.app_context():
        from webapp.services import ingest

        before = len(ingest.list_datasets())
        report, rows, id_options, ok = upload.preview(_data_url(raw), "semi.csv", upload.intake_options(
            None, None, "half", "error", None))
        assert len(ingest.list_datasets()) == before
    assert ok and {r["column"]: r["role"] for r in rows}["grp"] == "metadata"
    text = str(report)
    assert "semicolon" in text and "Decimal mark" in text
    assert {"label": "a", "value": "a"} in id_options


def test_upload_error_names_row_and_column_and_confirm_stores(wine):
    app, _, user_id = wine
    *_, upload = _pages()
    bad = b"id,a,b\nx1,1,2\nx2,oops,3\n"
    good = b"id,a,b\nx1,1,2\nx2,2,3\nx3,4,1\n"
    with app.app_context():
        report, rows, _, ok = upload.preview(_data_url(bad), "bad.csv", upload.intake_options(None, None, None,
                                                                                               None, None))
        url, message = upload.store(_data_url(good), "good.csv", upload.intake_options(None, None, None, None,
                                                                                        None), user_id)
    assert not ok and rows is None and "row" in str(report) and "'oops'" in str(report)
    assert url.startswith("/datasets/") and "good.csv" in message


def test_upload_roles_from_the_grid_and_bad_transport(app):
    *_, upload = _pages()
    options = upload.intake_options("id", " Sheet1 ", "sqrt2", "missing",
                                    [{"column": "x", "role": "ignore"}, {"column": "y", "role": "bogus"}])
    assert options == {"id_column": "id", "sheet": "Sheet1", "roles": {"x": "ignore"}, "below_limit": "sqrt2",
                       "bad_cells": "missing"}
    with pytest.raises(InputError, match="unreadable"):
        upload.decode_upload("not a data url")


def _decode(spec: dict) -> np.ndarray:
    # plotly.js typed-array spec: little-endian bytes, base64 (plotly.js "b64 typed arrays")
    return np.frombuffer(base64.b64decode(spec["bdata"]), dtype=np.dtype(spec["dtype"]).newbyteorder("<"))


def test_large_score_plot_recolours_and_changes_axes_by_patch(fitted, monkeypatch):
    app, result = fitted
    _, views, _, _ = _pages()
    from dash import Patch

    from webapp.web.ui import figures

    monkeypatch.setattr(figures, "WEBGL_THRESHOLD", 100)  # treat the 178 wine samples as "many"
    with app.app_context():
        fig, drawn = views.score_update(result, pcx=1, pcy=2, colour=None, shape=None, labels=False)
        assert drawn["large"] and drawn["n_points"] == 1 and drawn["n_legend"] == 0
        assert fig.data[0].type == "scattergl"
        patch, drawn2 = views.score_update(result, pcx=1, pcy=2, colour="cultivar", shape=None, labels=False,
                                           drawn=drawn)
        patch3, drawn3 = views.score_update(result, pcx=1, pcy=3, colour="cultivar", shape=None, labels=True,
                                            drawn=drawn2)
        full, _ = views.score_update(result, pcx=1, pcy=2, colour=None, shape="cultivar", labels=False,
                                     drawn=drawn3)
    assert isinstance(patch, Patch) and isinstance(patch3, Patch) and not isinstance(full, Patch)
    ops = patch.to_plotly_json()["operations"]
    # the one uncoloured point trace is replaced by one flat-coloured trace per cultivar
    assert [o["location"] for o in ops if o["operation"] == "Delete"] == [["data", 0]]
    inserted = [o["params"]["value"] for o in ops if o["operation"] == "Insert"]
    assert [t["name"] for t in inserted] == ["cultivar 1", "cultivar 2", "cultivar 3"] and drawn2["n_points"] == 3
    cultivar = wine_frame()["cultivar"].to_numpy()
    for trace in inserted:
        rows = _decode(trace["customdata"])
        assert (cultivar[rows] == trace["name"]).all() and isinstance(trace["marker"]["color"], str)
    assert sorted(np.concatenate([_decode(t["customdata"]) for t in inserted]).tolist()) == list(range(178))
    ops3 = patch3.to_plotly_json()["operations"]
    u, s, _ = np.linalg.svd(_autoscaled_wine(), full_matrices=False)
    for i, trace in enumerate(inserted):
        y = next(o for o in ops3 if o["location"] == ["data", i, "y"])["params"]["value"]
        rows = _decode(trace["customdata"])
        np.testing.assert_allclose(np.abs(_decode(y)), np.abs(u[rows, 2] * s[2]), rtol=1e-6, atol=1e-6)  # float32
        assert {"operation": "Assign", "location": ["data", i, "mode"], "params": {"value": "markers+text"}} in ops3
    assert not any(o["operation"] in ("Delete", "Insert") for o in ops3)


# ------------------------------------------------------- the selection on the plots
# Plotly's ``selectedpoints`` (plotly.js reference): indices of the selected points within
# a trace; an empty array dims all of the trace's points, no value draws none as selected.
def _selected_ids(trace) -> set[str]:
    return {trace.text[i] for i in trace.selectedpoints}


def test_score_and_diagnostics_plots_draw_the_stored_selection(fitted):
    app, result = fitted
    _, views, _, _ = _pages()
    # a selection made for another model names a sample this fit lacks: it is simply not drawn
    store = {"dataset_id": result["dataset_id"], "fingerprint": "another-model",
             "sample_ids": ["W-010", "W-120", "W-177", "X-999"]}
    chosen = views.stored_selection(store)
    drawn = {"W-010", "W-120", "W-177"}
    with app.app_context():
        scores, _ = views.score_update(result, pcx=2, pcy=3, colour="cultivar", shape=None, labels=False,
                                       selected=chosen)
        diagnostics = views.diagnostics_view(result, order="cultivar", selected=chosen)
        cleared = views.diagnostics_view(result, order=None, selected=views.stored_selection(
            {**store, "sample_ids": []}))
    cultivar = dict(zip(wine_frame()["sample"], wine_frame()["cultivar"]))
    groups = [t for t in scores.data if t.name and t.name.startswith("cultivar")]
    for trace in groups:
        # each cultivar trace marks exactly the chosen samples of that cultivar
        assert _selected_ids(trace) == {s for s in drawn if cultivar[s] == trace.name}
    assert set().union(*(_selected_ids(t) for t in groups)) == drawn
    for fig in diagnostics:
        marked = [t for t in fig.data if t.mode == "markers" and t.name]
        assert set().union(*(_selected_ids(t) for t in marked)) == drawn
    assert all(t.selectedpoints is None for fig in cleared for t in fig.data)


def test_a_box_select_is_not_drawn_again_but_clear_and_saved_views_are(app):
    _, views, samples, _ = _pages()
    event = {"points": [{"text": "W-002", "customdata": 1}, {"text": "W-001", "customdata": 0}]}
    dragged = views.selection_data(event, None, {"dataset_id": 5, "fingerprint": "f"}, ids.GRAPH_T2_SPE)
    assert views.shows_selection(ids.GRAPH_T2_SPE, dragged)  # plotly.js already shows the drag
    assert not views.shows_selection(ids.GRAPH_T2_CHART, dragged)  # the other plots are drawn again
    # "Clear": the store no longer names the plot, so every plot is drawn again
    cleared = samples.cleared_selection(dragged)
    assert cleared["sample_ids"] == [] and cleared["dataset_id"] == 5
    assert not views.shows_selection(ids.GRAPH_T2_SPE, cleared)
    # an empty box on the plot, then Clear: still drawn again, plotly.js dimmed every point
    empty = views.selection_data({"points": []}, None, None, ids.GRAPH_SCORES)
    assert views.shows_selection(ids.GRAPH_SCORES, empty)
    assert not views.shows_selection(ids.GRAPH_SCORES, samples.cleared_selection(empty))
    # a saved view opened: nothing was dragged, every plot draws the selection
    assert not views.shows_selection(ids.GRAPH_SCORES, {"dataset_id": 5, "sample_ids": ["W-001"]})
    assert views.stored_selection(None) == []


def test_only_a_drawn_box_or_lasso_changes_the_selection(app):
    # plotly.js reference, "plotly_selected" event data: a box carries `range`, a lasso
    # `lassoPoints`; after a redraw (e.g. a refit) it sends `{"points": []}` with neither.
    _, views, _, _ = _pages()
    assert views.is_drawn_selection({"points": [], "range": {"x": [0, 1], "y": [0, 1]}})
    assert views.is_drawn_selection({"points": [{"text": "a"}], "lassoPoints": {"x": [0], "y": [0]}})
    assert not views.is_drawn_selection({"points": []})
    assert not views.is_drawn_selection(None)


def test_large_score_plot_sends_the_selection_by_patch(fitted, monkeypatch):
    app, result = fitted
    _, views, _, _ = _pages()
    from dash import Patch

    from webapp.web.ui import figures

    monkeypatch.setattr(figures, "WEBGL_THRESHOLD", 100)  # treat the 178 wine samples as "many"
    sample_ids = list(wine_frame()["sample"])
    chosen = ["W-003", "W-060", "W-150", "X-999"]
    rows = sorted(sample_ids.index(s) for s in chosen[:3])
    with app.app_context():
        fig, drawn = views.score_update(result, pcx=1, pcy=2, colour=None, shape=None, labels=False,
                                        selected=chosen)
        selected, drawn2 = views.score_update(result, pcx=1, pcy=2, colour=None, shape=None, labels=False,
                                              selected=chosen[:1], drawn=drawn)
        recoloured, drawn3 = views.score_update(result, pcx=1, pcy=2, colour="cultivar", shape=None, labels=False,
                                                selected=chosen, drawn=drawn2)
        cleared, _ = views.score_update(result, pcx=1, pcy=3, colour="cultivar", shape=None, labels=False,
                                        selected=[], drawn=drawn3)
    # the whole figure: one point trace in model order, so positions are rows
    assert drawn["n_points"] == 1 and list(fig.data[0].selectedpoints) == rows
    # the same view with another selection: only the selected points of the point trace change
    assert isinstance(selected, Patch)
    ops = selected.to_plotly_json()["operations"]
    assert {tuple(o["location"]) for o in ops} == {("data", 0, "selectedpoints"), ("data", 3, "selectedpoints")}
    point_op = next(o for o in ops if o["location"] == ["data", 0, "selectedpoints"])
    assert _decode(point_op["params"]["value"]).tolist() == [sample_ids.index("W-003")]
    picked_op = next(o for o in ops if o["location"] == ["data", 3, "selectedpoints"])  # 1 point trace + 2 ellipses
    assert picked_op["params"]["value"] is None
    # a recolour inserts one trace per cultivar, each carrying its part of the selection
    ops = recoloured.to_plotly_json()["operations"]
    inserted = [o["params"]["value"] for o in ops if o["operation"] == "Insert"]
    assert drawn3["n_points"] == 3 == len(inserted)
    marked = []
    for trace in inserted:
        members = _decode(trace["customdata"])
        marked += members[_decode(trace["selectedpoints"])].tolist()
    assert sorted(marked) == rows
    assert next(o for o in ops if o["location"] == ["data", 5, "selectedpoints"])["params"]["value"] is None
    # "Clear" (with an axis change): every point trace back to no selection
    ops = cleared.to_plotly_json()["operations"]
    for i in range(3):
        assert {"operation": "Assign", "location": ["data", i, "selectedpoints"], "params": {"value": None}} in ops
    assert not any(o["operation"] in ("Delete", "Insert") for o in ops)


def test_fit_warnings_say_how_missing_cells_were_filled_and_when_it_did_not_converge():
    # The non-convergence of the imputation is shown on the page, never a silent cap (common practice).
    dataset, *_ = _pages()
    result = {"ok": True, "n_missing": 12, "warnings": ["missing-value imputation did not converge: ..."],
              "imputation": {"method": "regularised", "rounds": 1000, "tolerance": 1e-6, "achieved": 3e-4,
                             "converged": False}}
    shown = [li.children for li in dataset.fit_warnings(result).children]
    assert shown[0].startswith("12 missing cells filled by regularised iterative PCA (Josse & Husson 2012): "
                               "1000 rounds, last change 3.0e-04 of the data's RMS (tolerance 1e-06)")
    assert shown[1].startswith("missing-value imputation did not converge")
    assert dataset.fit_warnings({"ok": True, "n_missing": 0, "warnings": [], "imputation": None}) is None
