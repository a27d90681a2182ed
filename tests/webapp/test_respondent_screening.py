"""Respondent screening of stored datasets: the service, the API (JSON and CSV) and the tab's plain parts.

Outside references: HTTP status semantics (RFC 9110 section 15.5.21, 422 Unprocessable
Content); CSV formula injection (OWASP "CSV Injection"); scikit-learn's wine data as a
file that is not a questionnaire (13 continuous measurements). The demo survey checks
are demo design checks: our own invented data must carry the straight-liners planted
in it (``demo_data.planted_anomalies("survey")``) in a form the screening flags, by the
cut-offs of analysis.screening (long string: Curran 2016; IRV: Dunn et al. 2018).
"""

from __future__ import annotations

import csv
import io
from urllib.parse import parse_qs, urlsplit

import numpy as np
import pytest

from webapp.services import demo_data
from webapp.services.demo_data import SURVEY_VARIABLES, planted_anomalies, survey_scenario
from wine_data import wine_csv

STRAIGHT_LINERS = planted_anomalies("survey")["straight_liners"]["samples"]
REVERSED_BLOCK = planted_anomalies("survey")["reversed_page_two"]["samples"]


def _upload(client, headers, raw: bytes, name: str) -> dict:
    data = {"file": (io.BytesIO(raw), name)}
    response = client.post("/api/v1/datasets", data=data, headers=headers, content_type="multipart/form-data")
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]


@pytest.fixture
def analyst(auth):
    return auth.token("analyst")


@pytest.fixture
def viewer(auth):
    return auth.token("viewer")


@pytest.fixture
def survey(client, analyst):
    name, raw = survey_scenario()
    return _upload(client, analyst, raw, name)


@pytest.fixture
def wine(client, analyst):
    return _upload(client, analyst, wine_csv(), "wine.csv")


def _rows(body: dict) -> dict[str, dict]:
    return {r["sample_id"]: r for r in body["respondents"]}


# ---------------------------------------------------------------------- API
def test_demo_survey_is_detected_and_its_straight_liners_flagged(client, viewer, survey):
    response = client.get(f"/api/v1/datasets/{survey['id']}/screening", headers=viewer)
    assert response.status_code == 200 and response.mimetype == "application/json"
    body = response.get_json()
    assert body["ok"] is True and body["items"] == "auto"
    assert body["scale"]["looks_like_items"] is True and (body["scale"]["low"], body["scale"]["high"]) == (1, 5)
    assert body["n_items"] == len(SURVEY_VARIABLES) == 16 and body["n_respondents"] == 320
    rows = _rows(body)
    for sample in STRAIGHT_LINERS:
        # every item the same answer: a run of all 16 (> 8, half the items) and zero spread
        assert rows[sample]["long_string"] == 16 and rows[sample]["irv"] == 0.0
        assert {"long string", "low IRV"} <= set(rows[sample]["flags"]), rows[sample]
    # the straight-liners are exactly the respondents with a run longer than half the form
    assert sorted(s for s, r in rows.items() if "long string" in r["flags"]) == sorted(STRAIGHT_LINERS)
    assert body["reason_category"] == "careless response"
    assert [c["name"] for c in body["cutoffs"]] == ["long string", "low IRV", "robust distance"]


def test_demo_survey_reversed_block_is_far_off_but_not_straight_lining(client, viewer, survey):
    rows = _rows(client.get(f"/api/v1/datasets/{survey['id']}/screening", headers=viewer).get_json())
    block = [rows[s] for s in REVERSED_BLOCK]
    # pages that disagree put most of the block beyond the 99.9 % robust distance, none into a long string
    assert sum("robust distance" in r["flags"] for r in block) >= 12
    assert not any("long string" in r["flags"] for r in block)
    # the answer-3 straight-liner sits near the centre: only its run and its zero spread find it
    quiet = rows[STRAIGHT_LINERS[-1]]
    assert "robust distance" not in quiet["flags"] and quiet["distance_sq"] < quiet["distance_cutoff"]


def test_rows_with_blanks_are_measured_on_their_answers(client, viewer, survey):
    rows = _rows(client.get(f"/api/v1/datasets/{survey['id']}/screening", headers=viewer).get_json())
    partial = [r for r in rows.values() if r["answered"] < 16]
    assert partial, "the demo survey has blank answers"
    for r in partial:
        assert r["distance_df"] == r["answered"] and r["distance_sq"] is not None
        assert r["distance_cutoff"] == pytest.approx(float(_chi2(0.999, r["answered"])))


def _chi2(level, df):
    from scipy import stats

    return stats.chi2.ppf(level, df)


def test_csv_twin_holds_the_same_table(client, viewer, survey):
    body = client.get(f"/api/v1/datasets/{survey['id']}/screening", headers=viewer).get_json()
    response = client.get(f"/api/v1/datasets/{survey['id']}/screening.csv", headers=viewer)
    assert response.status_code == 200 and response.mimetype == "text/csv"
    assert "attachment" in response.headers["Content-Disposition"]
    table = list(csv.DictReader(io.StringIO(response.get_data(as_text=True))))
    assert len(table) == body["n_respondents"]
    by_id = {r["sample_id"]: r for r in table}
    for sample, row in _rows(body).items():
        assert int(by_id[sample]["long_string"]) == row["long_string"]
        assert float(by_id[sample]["irv"]) == pytest.approx(row["irv"])
        assert by_id[sample]["flags"] == "; ".join(row["flags"])
        assert int(by_id[sample]["n_flags"]) == len(row["flags"])


def test_a_file_that_is_not_a_questionnaire_gets_a_clear_422(client, viewer, wine):
    for path in ("screening", "screening.csv"):
        response = client.get(f"/api/v1/datasets/{wine['id']}/{path}", headers=viewer)
        assert response.status_code == 422 and response.mimetype == "application/json"
        error = response.get_json()["error"]
        assert response.get_json()["ok"] is False and error["code"] == "not_items" and error["field"] == "items"
        # the message names the dataset, the column at fault, its value and the rule
        assert f"dataset {wine['id']}" in error["message"] and "not a whole number" in error["message"]
        assert "alcohol" in error["message"] and "items=declared" in error["message"]


def test_declared_items_are_screened_anyway_with_a_note(client, viewer, wine):
    response = client.get(f"/api/v1/datasets/{wine['id']}/screening?items=declared", headers=viewer)
    assert response.status_code == 200
    body = response.get_json()
    assert body["items"] == "declared" and body["scale"]["looks_like_items"] is False
    assert body["n_respondents"] == 178 and body["notes"][0].startswith("Declared as items on one scale")
    # continuous measurements seldom repeat: no run comes near half of the 13 variables
    assert max(r["long_string"] for r in body["respondents"]) <= 3
    assert not any("long string" in r["flags"] for r in body["respondents"])


def test_declared_and_auto_agree_on_a_questionnaire(client, viewer, survey):
    auto = client.get(f"/api/v1/datasets/{survey['id']}/screening?items=auto", headers=viewer).get_json()
    declared = client.get(f"/api/v1/datasets/{survey['id']}/screening?items=declared", headers=viewer).get_json()
    assert auto["respondents"] == declared["respondents"] and declared["notes"] == []


def test_bad_items_value_unknown_dataset_and_no_sign_in(client, viewer, survey):
    bad = client.get(f"/api/v1/datasets/{survey['id']}/screening?items=maybe", headers=viewer)
    assert bad.status_code == 400 and bad.get_json()["error"]["field"] == "items"
    assert "'auto' or 'declared'" in bad.get_json()["error"]["message"]
    missing = client.get("/api/v1/datasets/999999/screening", headers=viewer)
    assert missing.status_code == 404 and missing.get_json()["error"]["code"] == "not_found"
    not_an_id = client.get("/api/v1/datasets/01/screening", headers=viewer)
    assert not_an_id.status_code == 404
    anonymous = client.get(f"/api/v1/datasets/{survey['id']}/screening")
    assert anonymous.status_code == 401 and anonymous.get_json()["ok"] is False


def test_csv_neutralises_formula_ids(client, analyst, viewer):
    # OWASP "CSV Injection": an id starting with '=' gets a leading quote in the CSV
    rng = np.random.default_rng(4)
    lines = ["id,Q1,Q2,Q3,Q4"] + [f"{'=cmd' if i == 0 else f'P{i:02d}'},"
                                  + ",".join(str(v) for v in rng.integers(1, 6, size=4)) for i in range(40)]
    dataset = _upload(client, analyst, ("\n".join(lines) + "\n").encode(), "formula.csv")
    text = client.get(f"/api/v1/datasets/{dataset['id']}/screening.csv", headers=viewer).get_data(as_text=True)
    assert "\n'=cmd," in text


# ------------------------------------------------------------ the tab, plain
def test_tab_view_and_proposal_link_for_the_demo_survey(app, survey):
    from webapp.web.pages import dataset_screening

    with app.app_context():
        status, cutoffs, figure, rows, note = dataset_screening.screening_view(survey["id"], [], "two")
    assert sorted(r["sample_id"] for r in rows) == sorted(STRAIGHT_LINERS)
    assert "flagged by two or more" in note and "look like items" in str(status)
    # flagged respondents are drawn with their own marker shape, named in the legend
    shapes = {t.name.split(" (")[0]: t.marker.symbol for t in figure.data}
    assert shapes["Not flagged"] == "circle" and shapes["Flagged by two or more indices"] == "x"
    href, text, style = dataset_screening.proposal_link(survey["id"], rows, [], "two", "?a=4&tab=screening", True)
    query = parse_qs(urlsplit(href).query)
    assert urlsplit(href).path == "/review/propose" and style is None
    assert sorted(query["sample"]) == sorted(STRAIGHT_LINERS) and query["category"] == ["careless response"]
    assert query["a"] == ["4"] and "4 respondent(s) shown" in text  # the page's model settings travel along
    ticked, text, _ = dataset_screening.proposal_link(survey["id"], rows, [rows[0]], "two", "", True)
    assert parse_qs(urlsplit(ticked).query)["sample"] == [rows[0]["sample_id"]] and "ticked" in text
    assert dataset_screening.proposal_link(survey["id"], rows, [], "all", "", True)[2] == {"display": "none"}
    assert dataset_screening.proposal_link(survey["id"], rows, [], "two", "", False)[2] == {"display": "none"}


def test_tab_view_explains_a_file_that_is_not_a_questionnaire(app, wine):
    from webapp.web.pages import dataset_screening

    with app.app_context():
        status, _, _, rows, _ = dataset_screening.screening_view(wine["id"], [], "all")
        declared = dataset_screening.screening_view(wine["id"], ["declared"], "all")
    assert rows == [] and "do not look like items" in str(status) and "ld-alert" in str(status)
    assert len(declared[3]) == 178 and "Screened as declared" in str(declared[0])


def test_screening_plot_has_its_numbers(app, survey):
    from webapp.web.pages import dataset_screening
    from webapp.web.ui import ids, plot_table

    with app.app_context():
        figure = dataset_screening.screening_view(survey["id"], [], "all")[2]
    numbers = plot_table.figure_rows(figure.to_plotly_json())
    assert ids.SCREENING_PLOT in plot_table.PLOT_NAMES
    assert len(numbers.rows) == 320 and numbers.columns[-2:] == (
        "Longest run of identical answers (items)", "IRV: spread of a respondent's answers (SD)")
    assert any(line.startswith("long-string cut-off: x = 8") for line in numbers.lines)


def test_proposal_form_takes_the_category_from_the_link(app, auth, survey):
    import flask_login

    from webapp.web.pages import review_propose
    from webapp.web.ui import ids

    name = auth.login("analyst")
    with app.test_request_context("/review/propose"):
        from webapp.auth import CurrentUser
        from webapp.store import accounts, session_scope

        with session_scope() as s:
            row = accounts.get_user_by_name(s, name)
            user = CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role)
        flask_login.login_user(user)
        preset = review_propose.layout(dataset=str(survey["id"]), sample=STRAIGHT_LINERS[:2],
                                       category="careless response", a="4")
        unknown = review_propose.layout(dataset=str(survey["id"]), sample=STRAIGHT_LINERS[:2],
                                        category="not a category", a="4")

    def dropdown(tree):
        found = []

        def walk(node):
            if getattr(node, "id", None) == ids.PROPOSE_CATEGORY:
                found.append(node)
            children = getattr(node, "children", None)
            for child in children if isinstance(children, list) else [children]:
                if child is not None and not isinstance(child, str):
                    walk(child)

        walk(tree)
        return found[0]

    assert dropdown(preset).value == "careless response"
    assert dropdown(unknown).value is None


def test_demo_seed_does_not_move_the_straight_liners(app, client, analyst, viewer):
    # planted by design, not by the value seed (demo_data module docstring)
    name, raw = survey_scenario(seed=demo_data.SURVEY_SEED + 7)
    dataset = _upload(client, analyst, raw, name)
    rows = _rows(client.get(f"/api/v1/datasets/{dataset['id']}/screening", headers=viewer).get_json())
    assert sorted(s for s, r in rows.items() if len(r["flags"]) >= 2) == sorted(STRAIGHT_LINERS)
