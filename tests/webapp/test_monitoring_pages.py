"""The monitoring pages' layouts and callback bodies, called as plain functions, and their figures.

Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn, the
reference model of tests/webapp/test_batches.py (45 training samples of cultivar 1, 3 components)
and its 14 held-out samples as the new batch, one of them with a planted magnesium fault.

Outside sources beside the checks:
- New-observation T² limit: NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3, and
  Tracy, Young & Mason (1992): A (n+1)(n-1) / (n (n-A)) F(conf; A, n-A), F quantile from scipy.
- Score chart limits: the same limit with A = 1, so +-sqrt(lambda_a (n+1)/n F(conf; 1, n-1)),
  lambda_a the sample variance (ddof=1) of the training scores (scikit-learn ``PCA.explained_variance_``).
- Reconstruction-based contributions: Alcala & Qin (2009), Automatica 45:1593, who prove that a
  large enough fault along one variable gives that variable the largest SPE contribution.
"""

from __future__ import annotations

import base64
import importlib
import io

import numpy as np
import plotly.graph_objects as go
import pytest
from flask_login import login_user
from scipy import stats
from sklearn.decomposition import PCA

from tests.webapp.test_batches import (  # noqa: F401  (fixtures)
    COMPONENTS, N_TRAIN, UNITS, as_csv, held_out, ref_id, team, training, variables,
)
from webapp import url_state
from webapp.auth import CurrentUser
from webapp.web.ui import ids
from webapp.web.ui import monitoring_figures as mf

FAULTY = "FAULT-MG"


def _pages():
    return (importlib.import_module("webapp.web.pages.monitoring"),
            importlib.import_module("webapp.web.pages.monitoring_model"),
            importlib.import_module("webapp.web.pages.monitoring_batch"),
            importlib.import_module("webapp.web.pages.monitoring_link"))


def _user(who) -> CurrentUser:
    return CurrentUser(id=who.id, name=who.name, display_name=who.display_name, role=who.role)


def _as_upload(raw: bytes) -> str:
    return "data:text/csv;base64," + base64.b64encode(raw).decode("ascii")


def _faulty_batch_csv() -> bytes:
    frame = held_out()
    frame.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)  # a large single-variable fault
    frame.loc[0, "sample"] = FAULTY
    return as_csv(frame, UNITS)


def _text(component) -> str:
    """All text of a Dash component tree."""
    if component is None:
        return ""
    if isinstance(component, (str, int, float)):
        return str(component)
    if isinstance(component, (list, tuple)):
        return " ".join(_text(c) for c in component)
    return _text(getattr(component, "children", None))


def _find(component, component_id):
    if isinstance(component, (list, tuple)):
        return next((f for f in (_find(c, component_id) for c in component) if f is not None), None)
    if getattr(component, "id", None) == component_id:
        return component
    children = getattr(component, "children", None)
    return _find(children, component_id) if children is not None and not isinstance(children, str) else None


@pytest.fixture
def checked(app, team, ref_id):
    """(batch dict) of the faulty batch, checked by the analyst through the page's upload function."""
    _, model_page, *_ = _pages()
    with app.test_request_context("/"):
        message, batch = model_page.check_uploaded_batch(_user(team["analyst"]), ref_id,
                                                         _as_upload(_faulty_batch_csv()), "week-1.csv", None, False)
    assert batch is not None, _text(message)
    return batch


# ---------------------------------------------------------------- figure builders
def _hand_chart(n: int) -> dict:
    """A chart dict written by hand: two batches, sample 3 flagged, sample 2 beyond the T² warning limit
    (7 > 6.25) only."""
    runs = range(1, n + 1)
    series = {
        "sample": [f"S{i}" for i in runs], "run_index": list(runs),
        "batch_id": [7 if i <= n // 2 else 8 for i in runs],
        "t2": [{2: 7.0, 3: 10.0}.get(i, 1.0 + i % 3) for i in runs], "spe": [0.25 * (i % 4) for i in runs],
        "scores": [[i - 3.0 for i in runs], [1.0] * n], "flagged": [i == 3 for i in runs], "outcome": [None] * n,
    }
    return {
        "name": "Line 9", "version": 2, "n_training_samples": 40, "series": series,
        "limits": {"t2_limit": 9.5, "t2_warning_limit": 6.25, "spe_limit": 4.0, "spe_warning_limit": 3.0,
                   "confidence": {"warning": 0.95, "action": 0.99}},
        "batches": [{"id": 7, "first_run": 1}, {"id": 8, "first_run": n // 2 + 1}, {"id": 9, "first_run": 0}],
    }


def _hlines(fig: go.Figure) -> list[float]:
    return sorted(s.y0 for s in fig.layout.shapes if s.y0 == s.y1 and s.xref != "x")


def _vlines(fig: go.Figure) -> list[float]:
    return sorted(s.x0 for s in fig.layout.shapes if s.x0 == s.x1 and s.yref != "y")


def test_chart_marks_flagged_points_by_shape_and_draws_limits_and_boundaries():
    chart = _hand_chart(6)
    fig = mf.control_chart_figure(chart, "t2")
    by_name = {t.name: t for t in fig.data}
    flagged = by_name["Flagged (action limit or run rule)"]
    assert list(flagged.x) == [3] and list(flagged.y) == [10.0] and flagged.marker.symbol == "x"
    assert list(by_name["Beyond the warning limit only"].x) == [2]
    assert list(by_name["Within the warning limit"].x) == [1, 4, 5, 6]
    assert len({t.marker.symbol for t in fig.data}) == 3  # shape, not colour alone
    assert _hlines(fig) == [6.25, 9.5]
    assert _vlines(fig) == [0.5, 3.5]  # the empty batch 9 draws no boundary
    labels = {a.text for a in fig.layout.annotations}
    assert {"batch 7", "batch 8", "warning 95%", "action 99%"} <= labels
    assert all(isinstance(t, go.Scatter) for t in fig.data)


def test_score_chart_values_and_webgl_above_the_threshold():
    chart = _hand_chart(2400)
    fig = mf.control_chart_figure(chart, "PC1")
    assert all(isinstance(t, go.Scattergl) for t in fig.data)
    values = np.concatenate([np.asarray(t.y) for t in fig.data])
    assert sorted(values) == sorted(i - 3.0 for i in range(1, 2401))
    assert _hlines(fig) == [0.0]  # no score limits given: the centre line only
    assert list(mf.statistic_values(chart["series"], "PC2")[:3]) == [1.0, 1.0, 1.0]


def test_empty_chart_says_so():
    chart = {**_hand_chart(1), "batches": []}
    chart["series"] = {key: [] for key in chart["series"]}
    fig = mf.control_chart_figure(chart, "spe")
    assert not fig.data and "No batch has been checked" in fig.layout.annotations[0].text


def test_reference_score_figure_places_the_new_sample_among_the_training_samples():
    training_scores = np.array([[1.0, 2.0, 0.1], [-1.0, 0.5, 0.2], [0.0, -2.5, 0.3]])
    fig = mf.reference_score_figure(training_scores, ["T1", "T2", "T3"], [4.0, -1.0, 9.0], "NEW", x=0, y=2)
    training, new = fig.data
    assert list(training.x) == [1.0, -1.0, 0.0] and list(training.y) == [0.1, 0.2, 0.3]
    assert (list(new.x), list(new.y), list(new.text)) == ([4.0], [9.0], ["NEW"])
    assert training.marker.symbol != new.marker.symbol and fig.layout.yaxis.title.text == "PC3 score"


# ---------------------------------------------------------------- /monitoring
def test_list_page_shows_models_and_the_form_only_to_analysts(app, team, ref_id):
    listing, *_ = _pages()
    with app.test_request_context("/"):
        login_user(_user(team["analyst"]))
        page = listing.layout(model="12")
    assert _find(page, ids.MON_PROPOSE_MODEL).value == 12
    text = _text(page)
    assert "Cellar 1" in text and "v1" in text and "approved" in text
    assert f"approved by {team['reviewer'].display_name}" in text
    assert "Flags support, and never replace, QA judgement and site procedures" in text
    with app.test_request_context("/"):
        login_user(_user(team["viewer"]))
        page = listing.layout()
    assert _find(page, ids.MON_PROPOSE_SUBMIT) is None and "Cellar 1" in _text(page)


def test_propose_from_the_page_and_its_messages(app, client, team):
    listing, *_ = _pages()
    upload = client.post("/api/v1/datasets", data={"file": (io.BytesIO(as_csv(training(), UNITS)),
                                                            "cellar.csv"), "id_column": "sample"},
                         headers=team["analyst"].headers, content_type="multipart/form-data")
    dataset_id = upload.get_json()["dataset"]["id"]
    model_id = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": 2},
                           headers=team["analyst"].headers).get_json()["model"]["id"]
    with app.test_request_context("/"):
        message, chosen = listing.propose_reference_model(_user(team["analyst"]), model_id, "  ", "", 0.95, 0.99)
        assert chosen is None and "name is required" in _text(message)
        message, chosen = listing.propose_reference_model(_user(team["analyst"]), model_id, "Cellar", "", 0.99, 0.95)
        assert chosen is None and "warning level 0.99 is not below the action level 0.95" in _text(message)
        message, chosen = listing.propose_reference_model(_user(team["analyst"]), 999999, "Cellar", "", 0.95, 0.99)
        assert chosen is None and "no fitted model 999999" in _text(message)
        message, chosen = listing.propose_reference_model(_user(team["viewer"]), model_id, "Cellar", "", 0.95, 0.99)
        assert chosen is None
        message, chosen = listing.propose_reference_model(_user(team["analyst"]), float(model_id), "Cellar",
                                                          "weekly", 0.9, 0.99)
    assert chosen["state"] == "proposed" and chosen["confidence"] == {"warning": 0.9, "action": 0.99}
    assert "waits for a reviewer" in _text(message)
    with app.test_request_context("/"):
        message, none = listing.propose_reference_model(_user(team["analyst"]), model_id, "Cellar", "", 0.95, 0.99,
                                                        [])
        assert none is None and "run rules" in _text(message)
        _, ticked = listing.propose_reference_model(_user(team["analyst"]), model_id, "Cellar", "", 0.95, 0.99,
                                                    ["9-one-side", "beyond-action"])
    # Nelson (1984) test 2: nine points in a row on one side of the centre line
    assert [(r["id"], r["source"]) for r in ticked["run_rules"]] == [
        ("beyond-action", "Western Electric (1956) rule 1; Nelson (1984) test 1"),
        ("9-one-side", "Nelson (1984) test 2")]


# ---------------------------------------------------------------- /monitoring/<id>
def test_model_page_facts_and_who_may_sign(app, client, team):
    listing, model_page, *_ = _pages()
    upload = client.post("/api/v1/datasets", data={"file": (io.BytesIO(as_csv(training(), UNITS)),
                                                            "cellar.csv"), "id_column": "sample"},
                         headers=team["analyst"].headers, content_type="multipart/form-data")
    dataset_id = upload.get_json()["dataset"]["id"]
    model_id = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": COMPONENTS},
                           headers=team["analyst"].headers).get_json()["model"]["id"]
    with app.test_request_context("/"):
        _, proposed = listing.propose_reference_model(_user(team["analyst"]), model_id, "Cellar", "", 0.95, 0.99)
        login_user(_user(team["analyst"]))
        page = model_page.layout(reference_model_id=str(proposed["id"]))
        assert _find(page, ids.MON_APPROVE) is None and "your proposal" in _text(page)
        assert _find(page, ids.MON_UPLOAD) is None  # not approved yet
    text = _text(page)
    assert "magnesium" in text and "mg/L" in text and proposed["training_sha256"] in text
    assert proposed["fingerprint"] in text and "State: proposed" in text
    # NIST/SEMATECH 6.5.4.3: the action T2 limit for new samples, n = 45, A = 3.
    n, a = N_TRAIN, COMPONENTS
    expected = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(0.99, a, n - a)
    assert f"{expected:.4g}" in text
    with app.test_request_context("/"):
        login_user(_user(team["reviewer"]))
        page = model_page.layout(reference_model_id=str(proposed["id"]))
        assert _find(page, ids.MON_APPROVE) is not None and _find(page, ids.MON_RETIRE) is None
        message, signed = model_page.sign_reference_model(_user(team["reviewer"]), "approve", proposed["id"],
                                                          "checked", "not the password")
        assert signed is None and "password" in _text(message)
        message, signed = model_page.sign_reference_model(_user(team["analyst"]), "approve", proposed["id"],
                                                          "mine", team["analyst"].password)
        assert signed is None
        message, signed = model_page.sign_reference_model(_user(team["reviewer"]), "approve", proposed["id"],
                                                          "checked", team["reviewer"].password)
    assert signed["state"] == "approved" and f"Signed as {team['reviewer'].display_name}" in _text(message)
    with app.test_request_context("/"):
        login_user(_user(team["reviewer"]))
        assert _find(model_page.signing_form(signed, _user(team["reviewer"])), ids.MON_RETIRE) is not None
        assert "There is no reference model 999" in _text(model_page.layout(reference_model_id="999"))


def test_upload_errors_are_words_and_store_nothing(app, team, ref_id):
    _, model_page, *_ = _pages()
    frame = held_out().drop(columns=["proline"])
    with app.test_request_context("/"):
        message, batch = model_page.check_uploaded_batch(_user(team["analyst"]), ref_id,
                                                         _as_upload(as_csv(frame, UNITS)), "short.csv", None, False)
        assert batch is None and "missing" in _text(message) and "proline" in _text(message)
        message, batch = model_page.check_uploaded_batch(_user(team["analyst"]), ref_id, "not a data url",
                                                         "x.csv", None, False)
        assert batch is None and "unreadable" in _text(message)
        from webapp.services import batches
        assert batches.chart(ref_id)["batches"] == []


def test_the_chart_of_the_page_flags_the_planted_sample_at_the_published_limits(app, team, ref_id, checked):
    _, model_page, *_ = _pages()
    assert FAULTY in [s["sample"] for s in checked["samples"] if s["flagged"]]
    with app.test_request_context("/"):
        spe = model_page.chart_figure(ref_id, "spe")
        t2 = model_page.chart_figure(ref_id, "t2")
        pc1 = model_page.chart_figure(ref_id, "PC1")
        violations, batch_list = model_page.history_blocks(ref_id)
        message, again = model_page.check_uploaded_batch(_user(team["analyst"]), ref_id,
                                                         _as_upload(_faulty_batch_csv()), "week-1.csv", None, False)
    flagged = next(t for t in spe.data if t.name.startswith("Flagged"))
    assert FAULTY in [c[0] for c in flagged.customdata]
    n, a = N_TRAIN, COMPONENTS
    expected = [a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(c, a, n - a) for c in (0.95, 0.99)]
    np.testing.assert_allclose(_hlines(t2), expected, rtol=1e-12)
    # Score limits: +-sqrt(lambda_1 (n+1)/n F(c; 1, n-1)), lambda_1 from scikit-learn on the autoscaled data.
    train = training()[variables()].to_numpy(float)
    lam = PCA(n_components=COMPONENTS).fit((train - train.mean(0)) / train.std(0, ddof=1)).explained_variance_[0]
    limits = [np.sqrt(lam * (n + 1) / n * stats.f.ppf(c, 1, n - 1)) for c in (0.95, 0.99)]
    np.testing.assert_allclose(_hlines(pc1), sorted([-limits[1], -limits[0], 0.0, limits[0], limits[1]]),
                               rtol=1e-9, atol=1e-12)
    assert _vlines(spe) == [0.5]
    assert f"batch {checked['id']}" in _text(batch_list) and "open" in _text(batch_list)
    # Western Electric (1956) rule 1 / Nelson (1984) test 1: the planted sample beyond the SPE action limit.
    assert "1 point beyond the action limit" in _text(violations) and FAULTY in _text(violations)
    # The same file again is refused in words, naming the earlier batch.
    assert again is None and f"batch {checked['id']}" in _text(message)


# ---------------------------------------------------------------- /monitoring/batches/<id>
def _hrefs(component) -> set:
    found = set()
    href = getattr(component, "href", None)
    if href:
        found.add(href)
    children = getattr(component, "children", None)
    for child in children if isinstance(children, (list, tuple)) else [children]:
        if child is not None and not isinstance(child, str):
            found |= _hrefs(child)
    return found


def test_batch_page_contributions_and_outcome(app, team, ref_id, checked):
    *_, batch_page, _ = _pages()
    with app.test_request_context("/"):
        login_user(_user(team["reviewer"]))
        page = batch_page.layout(batch_id=str(checked["id"]))
        choice = _find(page, ids.MON_SAMPLE_CHOICE)
        panel = batch_page.contributions_panel(checked["id"], FAULTY)
    text = _text(page)
    assert "FLAGGED: SPE beyond the action limit" in text and "State: open" in text and "needs an outcome" in text
    assert choice.value == FAULTY
    report = f"/-/monitoring/batches/{checked['id']}/report"
    assert report in _hrefs(page) and report + ".pdf" in _hrefs(page)
    waiting = [o["value"] for o in _find(page, ids.MON_OUTCOME_SAMPLES).options]
    assert waiting == [s["sample"] for s in checked["samples"] if s["flagged"]]
    sentence, *graphs = panel.children
    assert "magnesium" in sentence.children
    # Alcala & Qin (2009): the faulty variable has the largest SPE reconstruction-based contribution;
    # contribution_figure puts the largest bar last (at the top).
    spe_rbc = graphs[3].figure
    assert "SPE reconstruction-based" in spe_rbc.layout.title.text and spe_rbc.data[0].y[-1] == "magnesium"
    # The score plot: the training scores are scikit-learn's PCA.transform of the autoscaled training data
    # (up to each component's sign), the new sample sits at its stored scores.
    scores_plot = graphs[4].figure
    training_trace, new_trace = scores_plot.data
    train = training()[variables()].to_numpy(float)
    expected = PCA(n_components=COMPONENTS).fit_transform((train - train.mean(0)) / train.std(0, ddof=1))
    plotted = np.column_stack([training_trace.x, training_trace.y])
    signs = np.sign(np.sum(plotted * expected[:, :2], axis=0))
    np.testing.assert_allclose(plotted, expected[:, :2] * signs, rtol=1e-9, atol=1e-10)
    faulty = next(s for s in checked["samples"] if s["sample"] == FAULTY)
    assert [new_trace.x[0], new_trace.y[0]] == faulty["scores"][:2]
    with app.test_request_context("/"):
        reviewer = _user(team["reviewer"])
        message, batch = batch_page.sign_outcome(reviewer, checked["id"], waiting, "assignable_cause",
                                                 "bench log", "", team["reviewer"].password)
        assert batch is None and "cause" in _text(message)
        message, batch = batch_page.sign_outcome(reviewer, checked["id"], waiting, "assignable_cause",
                                                 "bench log", "balance drift", "wrong")
        assert batch is None and "password" in _text(message)
        message, batch = batch_page.sign_outcome(_user(team["analyst"]), checked["id"], waiting, "rejected",
                                                 "bench log", "", team["analyst"].password)
        assert batch is None
        message, batch = batch_page.sign_outcome(reviewer, checked["id"], waiting, "assignable_cause",
                                                 "bench log", "balance drift", team["reviewer"].password)
    assert batch["state"] == "reviewed" and "State: reviewed" in _text(message)
    assert batch_page.awaiting_outcome(batch) == []
    assert "assignable cause found; cause: balance drift; reason: bench log; signed by" in _text(batch_page.samples_table(batch))
    with app.test_request_context("/"):
        login_user(_user(team["analyst"]))
        page = batch_page.layout(batch_id=str(checked["id"]))
        assert _find(page, ids.MON_OUTCOME_SUBMIT) is None and "State: reviewed" in _text(page)
        assert "There is no batch 999" in _text(batch_page.layout(batch_id="999"))


# ---------------------------------------------------------------- links
def test_dataset_page_link_points_at_the_fitted_model():
    *_, link = _pages()
    assert link.link_for({"ok": True, "id": 41}, True) == ("/monitoring?model=41", None)
    assert link.link_for({"ok": True, "id": 41}, False)[1] == link.HIDDEN
    assert link.link_for({"ok": False, "error": "bad"}, True)[1] == link.HIDDEN
    assert link.link_for(None, True)[1] == link.HIDDEN


def test_monitoring_urls_fit_their_page_templates():
    from webapp.auth import matches_path_template

    assert url_state.monitoring_url() == "/monitoring" and url_state.monitoring_url(5) == "/monitoring?model=5"
    assert matches_path_template(url_state.reference_model_path_template(), url_state.reference_model_url(3))
    assert matches_path_template(url_state.batch_path_template(), url_state.batch_url(4))
    assert not matches_path_template(url_state.reference_model_path_template(), url_state.batch_url(4))
