"""Ids, JSON bodies and their limits: bad input is a 4xx naming the problem, never a 500.

The id routes are read from the app's URL map, so a route added later is covered
without editing this file.

Outside references:
- OWASP Input Validation Cheat Sheet: syntactic validation against an allow-list
  (ASCII digits only), semantic validation of the range, before the value is used.
- PostgreSQL documentation, section 8.1.1 "Integer Types": ``integer`` runs from
  -2147483648 to +2147483647, so a row id is at most 2**31 - 1.
- Python documentation, ``str.isdigit``: true for Unicode digits such as
  Arabic-Indic (U+0661) and full-width (U+FF11) ones; ``int()`` accepts them too.
- RFC 8259 section 9: a JSON parser may limit the size of texts and the depth of
  nesting it accepts.
- RFC 9110 sections 15.5.1 (400), 15.5.5 (404), 15.5.6 (405), 15.5.14 (413).
"""

from __future__ import annotations

import io
import json
import re
import tempfile

import pytest
import requests
from werkzeug.exceptions import NotFound

from analysis.errors import InputError
from live_server import prepared_home, running_server
from wine_data import wine_csv
from webapp.api.responses import MAX_JSON_BYTES, MAX_JSON_DEPTH, json_depth
from webapp.app import create_app
from webapp.store.ids import MAX_ID, check_id, is_id, parse_id

PG_INTEGER_MAX = 2147483647  # PostgreSQL docs 8.1.1
BAD_URL_IDS = [
    "99999999999999999999999",  # past 64 bits: SQLite cannot bind it
    str(2**63),  # one past SQLite's INTEGER
    str(PG_INTEGER_MAX + 1),  # one past PostgreSQL's integer
    "-1",
    "0",
    "+1",
    "01",  # a second spelling of 1
    "\u0661\u0662\u0663",  # Arabic-Indic 123
    "\uff11\uff12",  # full-width 12
    "1.0",
    "abc",
]
TEXT_PARTS = {"sample_id", "view_id"}  # names, not row numbers: <path:sample_id>, the saved-view token
PART = re.compile(r"<(?:(\w+)(?:\([^)]*\))?:)?(\w+)>")


def _id_rules():
    """(rule, method, id part names) for every route that takes a row id, from the URL map."""
    with tempfile.TemporaryDirectory() as home:
        app = create_app({"TESTING": True, "SECRET_KEY": "hardening", "HOME": home})
        found = []
        for rule in app.url_map.iter_rules():
            parts = [(conv or "default", name) for conv, name in PART.findall(rule.rule)]
            id_parts = [name for conv, name in parts if name.endswith("_id") and name not in TEXT_PARTS]
            if id_parts:
                for method in sorted(rule.methods - {"HEAD", "OPTIONS"}):
                    found.append((rule.rule, rule.endpoint, method, tuple(id_parts)))
        app.extensions["latentdesk.engine"].dispose()
    return found


ID_ROUTES = _id_rules()


def _path(rule: str, value: str, id_parts: tuple[str, ...]) -> str:
    def fill(match: re.Match) -> str:
        return value if match.group(2) in id_parts else "S-1"

    return PART.sub(fill, rule)


@pytest.fixture(scope="module")
def module_app(tmp_path_factory):
    from tests.webapp.conftest import add_user
    from webapp import auth
    from webapp.store import accounts, session_scope

    app = create_app({"TESTING": True, "SECRET_KEY": "hardening", "HOME": str(tmp_path_factory.mktemp("home"))})
    name, _ = add_user(app, "admin")
    with app.app_context(), session_scope() as s:
        token = auth.create_token(s, accounts.get_user_by_name(s, name).id, "hardening")
    app.config["TEST_HEADERS"] = {"Authorization": f"Bearer {token}"}
    yield app
    app.extensions["latentdesk.engine"].dispose()


@pytest.fixture(scope="module")
def admin(module_app):
    return module_app.config["TEST_HEADERS"]


@pytest.fixture(scope="module")
def dataset_id(module_app, admin):
    data = {"file": (io.BytesIO(wine_csv()), "wine.csv")}
    response = module_app.test_client().post("/api/v1/datasets", data=data, headers=admin,
                                             content_type="multipart/form-data")
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


def _error(response, status: int) -> dict:
    assert response.status_code == status, response.get_data(as_text=True)[:300]
    body = response.get_json()
    assert body["ok"] is False and body["error"]["message"]
    return body["error"]


def _nested(depth: int) -> str:
    """A JSON array nested ``depth`` levels deep: ``[[...]]``."""
    return "[" * depth + "]" * depth


# --- the id rule itself ---------------------------------------------------------------------


def test_the_id_range_is_the_id_columns_range():
    assert MAX_ID == PG_INTEGER_MAX
    assert is_id(1) and is_id(MAX_ID)
    assert not any(is_id(v) for v in (0, -1, MAX_ID + 1, 2**64, True, 1.0, "1", None))


@pytest.mark.parametrize("text", BAD_URL_IDS + ["", " 1", "1 ", "1e3", "0x1", "1_000", "\u0966", "12\n"])
def test_only_canonical_ascii_digits_in_range_parse(text):
    assert parse_id(text) is None


def test_canonical_ids_parse():
    assert parse_id("1") == 1 and parse_id("42") == 42 and parse_id(str(MAX_ID)) == MAX_ID
    assert int("\u0661\u0662\u0663") == 123, "Python's int() takes Arabic-Indic digits (Python docs)"


@pytest.mark.parametrize("value", [2**70, 2**31, -1, 0, True, False, "3", 3.0, 1.5, None, [3], {"id": 3}])
def test_a_body_id_of_the_wrong_kind_names_its_field(value):
    with pytest.raises(InputError, match="model_id") as err:
        check_id(value, "model_id")
    assert err.value.field == "model_id"


def test_a_huge_body_id_keeps_the_message_short():
    with pytest.raises(InputError, match="out of range") as err:
        check_id(10**5000, "dataset_id")
    assert len(str(err.value)) < 200


# --- ids in URLs: every route of the URL map ------------------------------------------------


def test_the_map_has_id_routes_and_none_uses_the_int_converter():
    assert len(ID_ROUTES) > 20, "the URL map lost its id routes"
    with tempfile.TemporaryDirectory() as home:
        app = create_app({"TESTING": True, "SECRET_KEY": "hardening", "HOME": home})
        for rule in app.url_map.iter_rules():
            for conv, name in PART.findall(rule.rule):
                assert conv != "int", f"{rule.rule}: use <id:{name}> (webapp.api.responses.IdConverter)"
                if name.endswith("_id") and name not in TEXT_PARTS:
                    assert conv == "id", f"{rule.rule}: <{name}> must use the id converter"
        app.extensions["latentdesk.engine"].dispose()


@pytest.mark.parametrize(("rule", "endpoint", "method", "id_parts"), ID_ROUTES, ids=lambda v: str(v))
def test_a_good_id_reaches_the_route_and_a_bad_one_is_not_found(module_app, rule, endpoint, method, id_parts):
    adapter = module_app.url_map.bind("localhost")
    assert adapter.match(_path(rule, "1", id_parts), method)[0] == endpoint
    assert adapter.match(_path(rule, str(MAX_ID), id_parts), method)[0] == endpoint
    for bad in BAD_URL_IDS:
        with pytest.raises(NotFound):
            adapter.match(_path(rule, bad, id_parts), method)


@pytest.mark.parametrize("bad", BAD_URL_IDS)
@pytest.mark.parametrize(("rule", "endpoint", "method", "id_parts"), ID_ROUTES, ids=lambda v: str(v))
def test_a_bad_url_id_is_404_whatever_the_method(module_app, admin, rule, endpoint, method, id_parts, bad):
    path = _path(rule, bad, id_parts)
    response = module_app.test_client().open(path, method=method, headers=admin,
                                             json={} if method == "POST" else None)
    assert response.status_code == 404, (path, response.status_code, response.get_data(as_text=True)[:200])
    if path.startswith("/api/"):
        error = _error(response, 404)
        assert error["code"] == "not_found" and repr(bad) in error["message"] and "is not an id" in error["message"]


def test_the_probe_from_the_issue(module_app, admin):
    error = _error(module_app.test_client().get("/api/v1/datasets/99999999999999999999999", headers=admin), 404)
    assert error["code"] == "not_found"


@pytest.mark.parametrize("bad", BAD_URL_IDS)
@pytest.mark.parametrize("suffix", ["report", "report.pdf"])
def test_a_sign_off_report_for_a_bad_dataset_id_is_404(module_app, admin, bad, suffix):
    response = module_app.test_client().get(f"/-/review/datasets/{bad}/{suffix}", headers=admin)
    assert response.status_code == 404


@pytest.mark.parametrize("bad", BAD_URL_IDS)
def test_a_sign_off_report_with_a_bad_proposal_id_is_400_naming_it(module_app, admin, dataset_id, bad):
    response = module_app.test_client().get(f"/-/review/datasets/{dataset_id}/report?proposal={bad}",
                                            headers=admin)
    assert response.status_code == 400 and "proposal" in response.get_data(as_text=True)


@pytest.mark.parametrize("bad", BAD_URL_IDS)
def test_a_bad_actor_id_in_the_review_log_filter_is_400_naming_it(module_app, admin, dataset_id, bad):
    response = module_app.test_client().get(f"/api/v1/datasets/{dataset_id}/review-log",
                                            query_string={"actor": bad}, headers=admin)
    assert _error(response, 400)["field"] == "actor"


@pytest.mark.parametrize("bad", BAD_URL_IDS + ["abc"])
@pytest.mark.parametrize("page", ["/datasets/{}", "/monitoring/{}", "/monitoring/batches/{}"])
def test_a_page_path_with_a_bad_id_is_404(module_app, admin, page, bad):
    response = module_app.test_client().get(page.format(bad), headers=admin)
    assert response.status_code == 404


def test_a_page_path_with_a_good_id_and_a_view_token_still_open(module_app, admin, dataset_id):
    client = module_app.test_client()
    assert client.get(f"/datasets/{dataset_id}", headers=admin).status_code == 200
    assert client.get("/views/a-Token_9", headers=admin).status_code == 200  # tokens are not row numbers


def test_a_page_does_not_read_non_ascii_digits_as_another_id(module_app, dataset_id):
    from webapp.web.pages.dataset import dataset_or_none

    arabic = "".join(chr(0x0660 + int(d)) for d in str(dataset_id))
    with module_app.test_request_context("/"):
        assert dataset_or_none(str(dataset_id))["id"] == dataset_id
        assert dataset_or_none(arabic) is None


# --- ids in JSON bodies ---------------------------------------------------------------------


BAD_BODY_IDS = [2**70, 2**63, PG_INTEGER_MAX + 1, -1, 0, True, "1", 1.5, 1.0, None, [1], {"id": 1}]


@pytest.mark.parametrize("value", BAD_BODY_IDS, ids=repr)
@pytest.mark.parametrize(("path", "field", "rest"), [
    ("/api/v1/reference-models", "model_id", {"name": "Line A release"}),
    ("/api/v1/views", "dataset_id", {"title": "a view"}),
])
def test_a_bad_body_id_is_400_naming_the_field(module_app, admin, path, field, rest, value):
    response = module_app.test_client().post(path, json={field: value, **rest}, headers=admin)
    error = _error(response, 400)
    assert error["code"] == "bad_input" and error["field"] == field and field in error["message"]


# --- JSON bodies: shape, depth, size --------------------------------------------------------


def test_json_depth_counts_arrays_and_objects():
    assert json_depth(1) == 0 and json_depth([]) == 1 and json_depth({}) == 1
    assert json_depth({"a": [1, {"b": []}]}) == 4  # object > array > object > array
    assert json_depth(json.loads(_nested(500))) == 500  # walked without recursion


@pytest.mark.parametrize("depth", [MAX_JSON_DEPTH + 1, 1000, 100_000])
def test_a_body_nested_past_the_limit_is_400(module_app, admin, depth):
    body = '{"model_id": 1, "name": "x", "note": ' + _nested(depth - 1) + "}"
    response = module_app.test_client().post("/api/v1/reference-models", data=body, headers=admin,
                                             content_type="application/json")
    error = _error(response, 400)
    assert error["code"] == "bad_input" and "nested too deeply" in error["message"]
    assert f"limit is {MAX_JSON_DEPTH}" in error["message"]


def test_a_body_nested_to_the_limit_is_read(module_app, admin):
    body = '{"model_id": 1, "name": "x", "note": ' + _nested(MAX_JSON_DEPTH - 1) + "}"
    response = module_app.test_client().post("/api/v1/reference-models", data=body, headers=admin,
                                             content_type="application/json")
    error = _error(response, 400)
    assert error["field"] == "note" and "nest" not in error["message"]  # read, then the note is refused


def test_a_deep_body_to_a_dash_callback_is_400_not_500(module_app, admin):
    body = '{"output": "x", "inputs": ' + _nested(1000) + "}"
    response = module_app.test_client().post("/_dash-update-component", data=body, headers=admin,
                                             content_type="application/json")
    assert _error(response, 400)["code"] == "bad_input"


def test_a_deep_body_without_a_user_is_refused_before_it_is_read(module_app):
    response = module_app.test_client().post("/api/v1/reference-models", data=_nested(1000),
                                             content_type="application/json")
    assert response.status_code == 401


def test_an_oversized_body_is_413_with_a_json_message(module_app, admin):
    body = json.dumps({"model_id": 1, "name": "x", "note": "n" * MAX_JSON_BYTES})
    response = module_app.test_client().post("/api/v1/reference-models", data=body, headers=admin,
                                             content_type="application/json")
    error = _error(response, 413)
    assert error["code"] == "too_large" and "KiB" in error["message"]


def test_an_oversized_body_sent_as_text_is_413_too(module_app, admin, dataset_id):
    response = module_app.test_client().post(f"/api/v1/datasets/{dataset_id}/models", data="x" * (MAX_JSON_BYTES + 1),
                                             headers=admin, content_type="text/plain")
    assert _error(response, 413)["code"] == "too_large"


@pytest.mark.parametrize("body", ["[1]", '"text"', "3", "null"])
def test_a_body_that_is_not_an_object_is_400(module_app, admin, body):
    response = module_app.test_client().post("/api/v1/reference-models", data=body, headers=admin,
                                             content_type="application/json")
    assert "request body" in _error(response, 400)["message"]


@pytest.mark.parametrize(("payload", "field"), [
    ({"components": "two"}, "components"),
    ({"components": [2]}, "components"),
    ({"components": "\uff12"}, "components"),  # full-width 2 is not a number here either
    ({"exclude": "W-001"}, "exclude"),
    ({"variables": {"a": 1}}, "variables"),
    ({"confidence": [0.95]}, "confidence"),
    ({"scaling": ["autoscale"]}, "scaling"),
    ({"bogus": 1}, "bogus"),
])
def test_wrong_types_in_fit_settings_are_400_naming_the_field(module_app, admin, dataset_id, payload, field):
    response = module_app.test_client().post(f"/api/v1/datasets/{dataset_id}/models", json=payload, headers=admin)
    error = _error(response, 400)
    assert error["field"] == field and field in error["message"]


@pytest.mark.parametrize(("payload", "field"), [
    ({"settings": [1]}, "settings"),
    ({"settings": "autoscale"}, "settings"),
    ({"samples": "W-001"}, "samples"),
    ({"samples": [["W-001"]]}, "samples"),
    ({"action": ["exclude"]}, "action"),
    ({"reason": {"text": "x"}}, "reason"),
])
def test_wrong_types_in_a_proposal_are_400_naming_the_field(module_app, admin, dataset_id, payload, field):
    body = {"samples": ["W-001"], "reason_category": "other", "reason": "bad vial", **payload}
    response = module_app.test_client().post(f"/api/v1/datasets/{dataset_id}/exclusions", json=body, headers=admin)
    error = _error(response, 400)
    assert error["field"] == field and field in error["message"]


@pytest.mark.parametrize(("payload", "field"), [
    ({"name": ["x"]}, "name"),
    ({"note": 5}, "note"),
    ({"confidence": "0.95"}, "confidence"),
])
def test_wrong_types_in_a_reference_model_proposal_are_400_naming_the_field(module_app, admin, payload, field):
    body = {"model_id": 1, "name": "Line A release", **payload}
    response = module_app.test_client().post("/api/v1/reference-models", json=body, headers=admin)
    assert _error(response, 400)["field"] == field


# --- the same probes against a real server: gunicorn, two workers ---------------------------


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def database(request, tmp_path):
    return None if request.param == "sqlite" else request.getfixturevalue("pg_url")


@pytest.mark.slow
def test_the_probes_against_a_live_server(tmp_path, database):
    home = tmp_path / "home"
    people = prepared_home(home, database, [("ana", "analyst", "Ana Analyst")])
    people.pop("_app").extensions["latentdesk.engine"].dispose()
    headers = people["ana"]["headers"]
    with running_server(home, database) as base:
        for _ in range(4):  # more requests than workers: both processes answer
            for bad in BAD_URL_IDS:
                for path in (f"/api/v1/datasets/{bad}", f"/api/v1/models/{bad}/samples",
                             f"/api/v1/exclusions/{bad}", f"/api/v1/batches/{bad}"):
                    response = requests.get(base + path, headers=headers, timeout=30)
                    assert response.status_code == 404, (path, response.text[:200])
                    assert response.json()["ok"] is False
                report = requests.get(f"{base}/-/review/datasets/{bad}/report", headers=headers, timeout=30)
                assert report.status_code == 404
            for depth in (MAX_JSON_DEPTH + 1, 1000, 100_000):
                response = requests.post(f"{base}/api/v1/reference-models", headers={
                    **headers, "Content-Type": "application/json"}, data=_nested(depth), timeout=30)
                assert response.status_code == 400 and f"limit is {MAX_JSON_DEPTH}" in response.json()["error"]["message"]
            big = requests.post(f"{base}/api/v1/reference-models", headers={
                **headers, "Content-Type": "application/json"}, data=b"[" + b"1," * MAX_JSON_BYTES + b"1]", timeout=30)
            assert big.status_code == 413 and big.json()["error"]["code"] == "too_large"
