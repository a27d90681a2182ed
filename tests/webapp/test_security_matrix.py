"""Every route x every role (and member or not of the project): who gets in, who is sent away, and how.

The route list is read from the running app (Flask's URL map plus the Dash
pages), so routes added later are covered without editing this file. Every id
in a filled-in path names a real resource (``_real_resources``), so each route's
own answer is asserted (``EXPECTED``), not a 404 for a missing row. A view
declares its role with ``webapp.auth.role_required`` (kept as ``min_role``);
a Dash page with ``register_page(..., min_role=...)``.

Expected answers follow docs/design.md section 5 (401 unauthenticated, 403 wrong
role) and the OWASP Authentication Cheat Sheet (lockout, redirect checks;
common practice).
"""

from __future__ import annotations

import re
import tempfile
from dataclasses import dataclass
from datetime import timedelta
from urllib.parse import parse_qs, urlsplit

import dash
import pytest
from werkzeug.routing import Rule

from tests.webapp.conftest import add_user, csrf_from, login
from webapp import auth
from webapp.app import create_app
from webapp.store import accounts, session_scope, utcnow
from webapp.store.tables import ROLES

PUBLIC = {"/-/login", "/health", "/assets/<path:filename>"}
METHODS = ("GET", "POST", "PUT", "PATCH", "DELETE")


@dataclass(frozen=True)
class Route:
    method: str
    rule: str
    path: str
    min_role: str | None

    @property
    def json(self) -> bool:
        return self.path.startswith(auth.JSON_PREFIXES)

    def __str__(self) -> str:
        return f"{self.method} {self.rule}"


def _fill(rule: Rule) -> str:
    """A concrete path for a rule: numbers for ints and ids, a harmless word otherwise."""
    def value(match: re.Match) -> str:
        converter = match.group(1) or "default"
        return {"int": "1", "id": "1", "float": "1.0", "path": "x/y"}.get(converter, "x1")

    return re.sub(r"<(?:(\w+)(?:\([^)]*\))?:)?\w+>", value, rule.rule)


def _page_path(page: dict) -> str:
    template = page.get("path_template")
    return re.sub(r"<\w+>", "1", template) if template else page["path"]


def _routes() -> list[Route]:
    with tempfile.TemporaryDirectory() as home:
        app = create_app({"TESTING": True, "SECRET_KEY": "matrix", "HOME": home})
        found = []
        for rule in app.url_map.iter_rules():
            view = app.view_functions[rule.endpoint]
            for method in sorted(rule.methods & set(METHODS)):
                found.append(Route(method, rule.rule, _fill(rule), getattr(view, "min_role", None)))
        for page in dash.page_registry.values():
            found.append(Route("GET", f"page:{page['module']}", _page_path(page), page.get("min_role")))
        app.extensions["latentdesk.engine"].dispose()
    return sorted(found, key=str)


ROUTES = _routes()
PROTECTED = [r for r in ROUTES if r.rule not in PUBLIC]
ROLE_GUARDED = [(r, role) for r in PROTECTED if r.min_role for role in ROLES
                if not auth.has_role(role, r.min_role)]


def _call(client, route: Route, **kwargs):
    return client.open(route.path, method=route.method, **kwargs)


@pytest.fixture(scope="module")
def matrix_app(tmp_path_factory):
    app = create_app({"TESTING": True, "SECRET_KEY": "matrix", "HOME": str(tmp_path_factory.mktemp("home"))})
    # User 1, whom the filled-in paths name (``/api/v1/users/1/reset-password``): nobody signs in as
    # this account, so an admin route acting on it leaves the other clients of the module alone.
    add_user(app, "viewer", "matrix-bystander")
    app.matrix_resources = _real_resources(app)
    yield app
    app.extensions["latentdesk.engine"].dispose()


def _real_resources(app) -> dict[str, str]:
    """Id 1 of everything a path can name, made through the API: a dataset (wine recognition data,
    scikit-learn), its model, an approved reference model, a checked batch, a proposal, a saved
    view, the first project. Returns what the filled-in paths must say instead of their placeholders."""
    import io

    from tests.webapp.review_helpers import actor
    from tests.webapp.wine_data import wine_frame

    analyst, reviewer = actor(app, "analyst"), actor(app, "reviewer")
    client = app.test_client()

    def ok(response, status=200):
        assert response.status_code == status, response.get_json()
        return response.get_json()

    frame = wine_frame()
    training, batch = frame.iloc[:60], frame.iloc[60:70]
    dataset = ok(client.post("/api/v1/datasets", data={"file": (io.BytesIO(training.to_csv(index=False).encode()),
                                                                 "wine.csv"), "id_column": "sample"},
                             headers=analyst.headers, content_type="multipart/form-data"), 201)["dataset"]
    model = ok(client.post(f"/api/v1/datasets/{dataset['id']}/models", json={"components": 2},
                           headers=analyst.headers))["model"]
    reference = ok(client.post("/api/v1/reference-models", json={"model_id": model["id"], "name": "matrix"},
                               headers=analyst.headers), 201)["reference_model"]
    ok(client.post(f"/api/v1/reference-models/{reference['id']}/approve",
                   json={"password": reviewer.password, "comment": "ok"}, headers=reviewer.headers))
    checked = ok(client.post(f"/api/v1/reference-models/{reference['id']}/batches",
                             data={"file": (io.BytesIO(batch.to_csv(index=False).encode()), "batch.csv")},
                             headers=analyst.headers, content_type="multipart/form-data"), 201)["batch"]
    proposal = ok(client.post(f"/api/v1/datasets/{dataset['id']}/exclusions",
                              json={"samples": [training["sample"].iloc[0]], "reason_category": "measurement error",
                                    "reason": "matrix fixture", "action": "exclude"}, headers=analyst.headers), 201)
    view = ok(client.post("/api/v1/views", json={"dataset_id": dataset["id"], "query": "tab=scores",
                                                 "title": "matrix"}, headers=analyst.headers), 201)["view"]
    assert (dataset["id"], model["id"], reference["id"], checked["id"], proposal["proposal"]["id"],
            dataset["project_id"]) == (1, 1, 1, 1, 1, 1), "the filled-in paths name id 1"
    return {"model_sample": training["sample"].iloc[0], "batch_sample": batch["sample"].iloc[0],
            "view": view["id"]}


@pytest.fixture(scope="module")
def role_clients(matrix_app):
    """One signed-in test client per role."""
    clients = {}
    for role in ROLES:
        name, password = add_user(matrix_app, role)
        client = matrix_app.test_client()
        assert login(client, name, password).status_code == 302
        clients[role] = client
    return clients


def test_the_matrix_sees_the_api_and_dash_routes():
    rules = {r.rule for r in ROUTES}
    assert "/_dash-update-component" in rules and "/_dash-layout" in rules
    assert any(rule.startswith("/api/v1/") for rule in rules)
    assert any(r.min_role == "analyst" for r in ROUTES), "no role-guarded route found"


@pytest.mark.parametrize("route", PROTECTED, ids=str)
def test_unauthenticated_is_refused(matrix_app, route):
    response = _call(matrix_app.test_client(), route)
    if route.json:
        assert response.status_code == 401
        body = response.get_json()
        assert body["ok"] is False and body["error"]["code"] == "unauthenticated"
    else:
        assert response.status_code == 302
        target = urlsplit(response.headers["Location"])
        assert target.path == auth.LOGIN_PATH
        if route.method == "GET":
            assert parse_qs(target.query)["next"] == [route.path]


@pytest.mark.parametrize("route", [r for r in ROUTES if r.rule in PUBLIC and r.method == "GET"], ids=str)
def test_public_routes_need_no_sign_in(matrix_app, route):
    path = "/assets/latentdesk.css" if route.rule.startswith("/assets/") else route.path
    assert matrix_app.test_client().get(path).status_code == 200


@pytest.mark.parametrize(("route", "role"), ROLE_GUARDED, ids=lambda v: str(v))
def test_wrong_role_is_forbidden(role_clients, route, role):
    response = _call(role_clients[role], route)
    assert response.status_code == 403
    if route.json:
        assert response.get_json()["error"]["code"] == "forbidden"


def _concrete(path: str, rule: str, resources: dict[str, str]) -> str:
    """The filled-in path with the real sample ids and view token of ``_real_resources``."""
    if rule.startswith("/api/v1/models/") and "<path:sample_id>" in rule:
        return path.replace("x/y", resources["model_sample"])
    if rule.startswith("/api/v1/batches/") and "<path:sample_id>" in rule:
        return path.replace("x/y", resources["batch_sample"])
    if "view_id" in rule or rule == "page:webapp.web.pages.views_open":
        return path.rsplit("/", 1)[0] + "/" + resources["view"]
    return path


# What the needed role meets on a real resource when it sends no body (writes) or nothing special
# (reads). Reads answer 200; a write without a body is refused as bad input (400) after the role
# check; the exceptions, each with its reason:
EXPECTED = {
    "GET /-/logout": 200,  # the sign-out page; only a POST with the CSRF token signs out
    "POST /-/logout": 400,  # no CSRF token
    "DELETE /api/v1/me/tokens/<id:token_id>": 404,  # token 1 is not the caller's own
    "POST /api/v1/users/<id:user_id>/reset-password": 200,  # needs no body; user 1 is the bystander
    "POST /_dash-update-component": 400,  # not a Dash callback body
    "GET /api/v1/datasets/<id:dataset_id>/screening": 422,  # the wine data are not questionnaire items
    "GET /api/v1/datasets/<id:dataset_id>/screening.csv": 422,
    "POST /api/v1/datasets/<id:dataset_id>/models": 200,  # a fit needs no body: the default settings
    "POST /api/v1/exclusions/<id:proposal_id>/withdraw": 403,  # only its proposer withdraws a proposal
    "POST /api/v1/exclusions/<id:proposal_id>/approve": 403,  # wrong_password: a signature re-asks it
    "POST /api/v1/exclusions/<id:proposal_id>/reject": 403,
    "POST /api/v1/reference-models/<id:reference_model_id>/approve": 409,  # approved already
    "POST /api/v1/reference-models/<id:reference_model_id>/reject": 409,
    "POST /api/v1/reference-models/<id:reference_model_id>/retire": 403,  # wrong_password
}
# A 403 above is the route's own refusal, never the role check's.
ROLE_REFUSAL = "Your role does not allow this."


def _expected(route: Route) -> int:
    return EXPECTED.get(str(route), 200 if route.method == "GET" else 400)


@pytest.mark.parametrize("route", [r for r in PROTECTED if r.min_role], ids=str)
def test_the_needed_role_gets_the_real_answer(matrix_app, role_clients, route):
    """With a real resource behind every id, the role a route needs gets that route's own answer:
    never a role refusal, a 404 for a missing fixture, or a server error."""
    path = _concrete(route.path, route.rule, matrix_app.matrix_resources)
    response = role_clients[route.min_role].open(path, method=route.method)
    assert response.status_code == _expected(route), (path, response.status_code, response.get_data()[:300])
    if response.status_code == 403:
        assert response.get_json()["error"]["message"] != ROLE_REFUSAL


@pytest.fixture(scope="module")
def revoked_token(matrix_app):
    name, _ = add_user(matrix_app, "admin")
    with matrix_app.app_context(), session_scope() as s:
        user = accounts.get_user_by_name(s, name)
        token = auth.create_token(s, user.id, "to revoke")
        assert accounts.revoke_tokens(s, user.id) == 1
    return token


@pytest.mark.parametrize("route", PROTECTED, ids=str)
def test_revoked_token_is_refused(matrix_app, revoked_token, route):
    response = _call(matrix_app.test_client(), route, headers={"Authorization": f"Bearer {revoked_token}"})
    assert response.status_code == 401
    assert response.get_json()["error"]["code"] == "unauthenticated"


def test_live_token_works_and_revoking_it_ends_access(matrix_app):
    name, _ = add_user(matrix_app, "viewer")
    with matrix_app.app_context(), session_scope() as s:
        user_id = accounts.get_user_by_name(s, name).id
        token = auth.create_token(s, user_id)
    headers = {"Authorization": f"Bearer {token}"}
    client = matrix_app.test_client()
    assert client.get("/api/v1/datasets", headers=headers).status_code == 200
    with matrix_app.app_context(), session_scope() as s:
        accounts.revoke_tokens(s, user_id)
    assert client.get("/api/v1/datasets", headers=headers).status_code == 401


def _token(app, role: str, **options) -> dict[str, str]:
    name, _ = add_user(app, role)
    with app.app_context(), session_scope() as s:
        token = auth.create_token(s, accounts.get_user_by_name(s, name).id, "matrix", **options)
    return {"Authorization": f"Bearer {token}"}


@pytest.fixture(scope="module")
def read_only_admin_token(matrix_app):
    return _token(matrix_app, "admin", scope="read-only")


WRITES = [r for r in PROTECTED if r.method not in ("GET", "HEAD")]


@pytest.mark.parametrize("route", WRITES, ids=str)
def test_a_read_only_token_is_refused_on_every_write(matrix_app, read_only_admin_token, route):
    """RFC 6750 section 3.1: a token without the scope the request needs is 403 (common practice: read-only
    means the safe methods of RFC 9110 section 9.2.1, GET and HEAD)."""
    response = _call(matrix_app.test_client(), route, headers=read_only_admin_token)
    assert response.status_code == 403
    assert response.get_json()["error"]["message"] == auth.READ_ONLY_REFUSED


def test_a_read_only_token_reads(matrix_app, read_only_admin_token):
    assert matrix_app.test_client().get("/api/v1/users", headers=read_only_admin_token).status_code == 200


@pytest.fixture(scope="module")
def expired_token(matrix_app):
    return _token(matrix_app, "admin", expires_at=utcnow() - timedelta(seconds=1))


@pytest.mark.parametrize("route", PROTECTED, ids=str)
def test_an_expired_token_is_refused(matrix_app, expired_token, route):
    response = _call(matrix_app.test_client(), route, headers=expired_token)
    assert response.status_code == 401
    assert "expired" in response.get_json()["error"]["message"]


@pytest.fixture(scope="module")
def password_due_client(matrix_app):
    """Signed in as an admin whose password was reset: nothing but choosing a new one."""
    name, password = add_user(matrix_app, "admin")
    with matrix_app.app_context(), session_scope() as s:
        accounts.get_user_by_name(s, name).must_change_password = True
    client = matrix_app.test_client()
    assert login(client, name, password).status_code == 302
    return client


@pytest.mark.parametrize("route", [r for r in PROTECTED if r.path not in auth.OPEN_WHILE_PASSWORD_DUE], ids=str)
def test_a_password_due_is_chosen_before_anything_else(password_due_client, route):
    response = _call(password_due_client, route)
    if route.json:
        assert response.status_code == 403
        assert response.get_json()["error"]["message"] == auth.PASSWORD_DUE
    else:
        assert response.status_code == 302
        assert urlsplit(response.headers["Location"]).path == auth.PASSWORD_PATH


def test_a_password_due_leaves_the_password_page_and_sign_out_open(password_due_client):
    assert password_due_client.get(auth.PASSWORD_PATH).status_code == 200
    assert password_due_client.get(auth.LOGOUT_PATH).status_code == 200
    assert password_due_client.post("/api/v1/me/password", json={}).status_code == 400  # reached the view


def test_token_of_a_disabled_user_is_refused(matrix_app):
    name, _ = add_user(matrix_app, "analyst")
    with matrix_app.app_context(), session_scope() as s:
        user = accounts.get_user_by_name(s, name)
        token = auth.create_token(s, user.id)
        accounts.set_active(s, user, False)
    response = matrix_app.test_client().get("/api/v1/datasets", headers={"Authorization": f"Bearer {token}"})
    assert response.status_code == 401


def test_made_up_token_is_refused(matrix_app):
    response = matrix_app.test_client().get(
        "/_dash-layout", headers={"Authorization": "Bearer ldt_" + "A" * 43}
    )
    assert response.status_code == 401


def test_cross_site_post_with_a_session_is_refused(role_clients):
    response = role_clients["analyst"].post(
        "/_dash-update-component", json={}, headers={"Origin": "https://evil.example"}
    )
    assert response.status_code == 403


# -- open redirect through ``next`` -------------------------------------------------

EVIL_NEXT = [
    "https://evil.example/",
    "//evil.example/",
    "///evil.example/",
    "/\\evil.example/",
    "\\\\evil.example",
    "/\t/evil.example",
    "javascript:alert(1)",
    "http:evil.example",
    " //evil.example",
    "evil.example",
]


@pytest.mark.parametrize("evil", EVIL_NEXT)
def test_open_redirect_through_next_is_refused(app, client, make_user, evil):
    form = client.get("/-/login", query_string={"next": evil}).get_data(as_text=True)
    assert "evil.example" not in form
    name, password = make_user("viewer")
    response = login(client, name, password, next_path=evil)
    assert response.status_code == 302
    assert response.headers["Location"] == "/"


def test_same_site_next_is_kept(client, make_user):
    name, password = make_user("viewer")
    response = login(client, name, password, next_path="/datasets/3?tab=scores")
    assert response.headers["Location"] == "/datasets/3?tab=scores"


# -- lockout ---------------------------------------------------------------------

def _later(monkeypatch, minutes: int):
    shifted = utcnow() + timedelta(minutes=minutes)
    monkeypatch.setattr(auth, "utcnow", lambda: shifted)


def test_account_lockout_works_and_ends(app_factory, monkeypatch):
    app = app_factory(LOCKOUT_ATTEMPTS=3, LOCKOUT_MINUTES=15)
    name, password = add_user(app, "analyst")
    client = app.test_client()
    for _ in range(3):
        assert login(client, name, "wrong-password").status_code == 401
    locked = login(client, name, password)
    assert locked.status_code == 401 and "Too many failed sign-ins" in locked.get_data(as_text=True)
    # A second worker (another app on the same database) sees the same lock.
    twin = app_factory(LOCKOUT_ATTEMPTS=3, LOCKOUT_MINUTES=15)
    assert login(twin.test_client(), name, password).status_code == 401
    _later(monkeypatch, 16)
    assert login(client, name, password).status_code == 302


def test_success_resets_the_failure_count(app_factory):
    app = app_factory(LOCKOUT_ATTEMPTS=3)
    name, password = add_user(app, "analyst")
    client = app.test_client()
    for _ in range(2):
        login(client, name, "wrong-password")
    assert login(client, name, password).status_code == 302
    other = app.test_client()
    for _ in range(2):
        login(other, name, "wrong-password")
    assert login(other, name, password).status_code == 302


def test_address_lockout_works_and_ends(app_factory, monkeypatch):
    app = app_factory(ADDRESS_LOCKOUT_ATTEMPTS=4, LOCKOUT_ATTEMPTS=100, LOCKOUT_MINUTES=15)
    name, password = add_user(app, "viewer")
    attacker = {"REMOTE_ADDR": "192.0.2.7"}
    client = app.test_client()
    for i in range(4):  # spread over names so no single account locks
        assert login(client, f"guess-{i}", "nope", **attacker).status_code == 401
    assert login(client, name, password, **attacker).status_code == 401
    assert login(app.test_client(), name, password, REMOTE_ADDR="192.0.2.8").status_code == 302
    _later(monkeypatch, 16)
    assert login(app.test_client(), name, password, **attacker).status_code == 302


def test_login_form_refuses_a_missing_csrf_token(client, make_user):
    name, password = make_user("viewer")
    client.get("/-/login")
    response = client.post("/-/login", data={"name": name, "password": password})
    assert response.status_code == 400
    assert client.get("/_dash-layout").status_code == 401


def test_logout_needs_post_and_a_token(client, auth):
    auth.login("viewer")
    page = client.get("/-/logout")  # a GET (e.g. an <img> on another site) must not sign out
    assert page.status_code == 200 and 'method="post"' in page.get_data(as_text=True)  # only a button
    assert client.get("/_dash-layout").status_code == 200
    assert client.post("/-/logout", data={"csrf_token": "forged"}).status_code == 400
    assert client.get("/_dash-layout").status_code == 200
    assert auth.logout().status_code == 302
    assert client.get("/_dash-layout").status_code == 401


def test_csrf_token_is_per_session(app, make_user):
    one, two = app.test_client(), app.test_client()
    assert csrf_from(one.get("/-/login").get_data(as_text=True)) != csrf_from(
        two.get("/-/login").get_data(as_text=True)
    )


ROLE_PAGES = [(page_route, role) for page_route, role in ROLE_GUARDED if page_route.rule.startswith("page:")]


def _router_request(client, path: str) -> dict:
    """Ask Dash's page router (a callback) for the content of ``path``."""
    deps = client.get("/_dash-dependencies").get_json()
    router = next(d for d in deps if "_pages_content.children" in d["output"])
    body = {
        "output": router["output"],
        "outputs": [{"id": "_pages_content", "property": "children"}, {"id": "_pages_store", "property": "data"}],
        "inputs": [{"id": "_pages_location", "property": "pathname", "value": path},
                   {"id": "_pages_location", "property": "search", "value": ""}],
        "changedPropIds": ["_pages_location.pathname"],
        "state": [],
    }
    response = client.post("/_dash-update-component", json=body)
    assert response.status_code == 200
    return response.get_json()


@pytest.mark.parametrize(("route", "role"), ROLE_PAGES, ids=lambda v: str(v))
def test_page_content_through_the_dash_router_respects_the_role(role_clients, route, role):
    content = _router_request(role_clients[role], route.path)
    assert "needs the" in str(content) and route.min_role in str(content)


def test_the_router_gives_the_page_to_the_needed_role(role_clients):
    pages = [r for r in ROUTES if r.rule.startswith("page:") and r.min_role]
    assert pages, "no Dash page declares min_role"
    route = pages[0]
    assert "needs the" not in str(_router_request(role_clients[route.min_role], route.path))


# --- projects: members and non-members ---------------------------------------------------

PROJECT_PARTS = ("dataset_id", "model_id", "reference_model_id", "batch_id", "proposal_id", "view_id", "project_id")
PROJECT_PAGES = tuple(f"page:webapp.web.pages.{name}"
                      for name in ("dataset", "monitoring_model", "monitoring_batch", "views_open"))
IN_PROJECT = [r for r in PROTECTED if (any(f":{part}>" in r.rule or f"<{part}>" in r.rule for part in PROJECT_PARTS)
                                       or r.rule in PROJECT_PAGES) and r.min_role != "admin"]


@pytest.fixture(scope="module")
def outsiders(matrix_app, role_clients):
    """One signed-in client per project role, each a member of a second project only."""
    from types import SimpleNamespace

    from webapp.services import projects

    name, _ = add_user(matrix_app, "admin")
    with matrix_app.app_context():
        with session_scope() as s:
            admin = accounts.get_user_by_name(s, name)
            acting = SimpleNamespace(id=admin.id, name=admin.name, display_name=admin.display_name, role="admin")
        other = projects.create_project("Other team", "", acting)  # the role clients stay in the first
    clients = {}
    for role in ("viewer", "analyst", "reviewer"):
        user_name, password = add_user(matrix_app, role)
        with matrix_app.app_context():
            with session_scope() as s:
                user_id = accounts.get_user_by_name(s, user_name).id
            projects.set_member(other["id"], user_id, role, acting)
        client = matrix_app.test_client()
        assert login(client, user_name, password).status_code == 302
        clients[role] = client
    return clients


def test_the_project_routes_are_found(outsiders):
    assert len(IN_PROJECT) > 30 and {r.rule for r in IN_PROJECT} >= set(PROJECT_PAGES)


@pytest.mark.parametrize("route", IN_PROJECT, ids=str)
def test_a_non_member_finds_nothing_of_the_project(matrix_app, outsiders, route):
    """OWASP Authorization Cheat Sheet: a resource of another project answers as one that does not
    exist (404), whatever the caller's role, never 403."""
    role = route.min_role or "viewer"
    path = _concrete(route.path, route.rule, matrix_app.matrix_resources)
    response = outsiders[role].open(path, method=route.method)
    assert response.status_code == 404, (path, response.status_code, response.get_data()[:200])


@pytest.mark.parametrize("route", [r for r in IN_PROJECT if r.min_role and r.method == "GET"], ids=str)
def test_a_member_gets_the_real_answer(matrix_app, role_clients, outsiders, route):
    """The same reads for a member of the project (after the second project exists)."""
    path = _concrete(route.path, route.rule, matrix_app.matrix_resources)
    response = role_clients[route.min_role].open(path, method=route.method)
    assert response.status_code == _expected(route), (path, response.status_code)
