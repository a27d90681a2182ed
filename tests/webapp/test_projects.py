"""Projects: a user reaches only the projects they belong to, with their role there.

Sources: OWASP Authorization Cheat Sheet (deny by default; enforce on every request; avoid
revealing that a resource exists to someone not allowed to see it: a 404, not a 403); OWASP
Top 10 (2021) A01 Broken Access Control (insecure direct object references). The data are the
wine recognition data shipped with scikit-learn (Aeberhard, Coomans & de Vel 1992).
"""

from __future__ import annotations

import io

import pytest
from alembic import command
from alembic.config import Config
from review_helpers import actor
from sqlalchemy import text
from wine_data import wine_frame

from webapp.services import admin_log
from webapp.store import make_engine, migrate
from webapp.store.engine import MIGRATIONS


def _csv(rows: slice) -> bytes:
    return wine_frame().iloc[rows].to_csv(index=False).encode()


def _upload(client, who, rows=slice(0, 40), **form):
    data = {"file": (io.BytesIO(_csv(rows)), "wine.csv"), "id_column": "sample", **form}
    return client.post("/api/v1/datasets", data=data, headers=who.headers, content_type="multipart/form-data")


def _ok(response, status=200):
    assert response.status_code == status, response.get_json()
    return response.get_json()


@pytest.fixture
def site(app, client):
    """Two projects: "Cellar A" (the first, with an analyst's dataset) and "Cellar B"."""
    admin, ana, bea = actor(app, "admin"), actor(app, "analyst"), actor(app, "analyst")
    first = _ok(_upload(client, ana), 201)["dataset"]
    second = _ok(client.post("/api/v1/projects", json={"name": "Cellar B"}, headers=admin.headers), 201)["project"]
    # creating the second project made ana and bea members of the first (nobody lost access); move bea
    _ok(client.put(f"/api/v1/projects/{first['project_id']}/members/{bea.id}", json={"role": None},
                   headers=admin.headers))
    _ok(client.put(f"/api/v1/projects/{second['id']}/members/{bea.id}", json={"role": "analyst"},
                   headers=admin.headers))
    other = _ok(_upload(client, bea, slice(40, 80), project_id=str(second["id"])), 201)["dataset"]
    return {"admin": admin, "ana": ana, "bea": bea, "a": first, "b": other, "project_b": second}


def test_a_first_dataset_makes_the_first_project_and_single_project_sites_work_as_before(app, client):
    ana, rita = actor(app, "analyst"), actor(app, "reviewer")
    dataset = _ok(_upload(client, ana), 201)["dataset"]
    projects = _ok(client.get("/api/v1/projects", headers=rita.headers))["projects"]
    assert [p["name"] for p in projects] == ["First project"] and dataset["project_id"] == projects[0]["id"]
    assert _ok(client.get(f"/api/v1/datasets/{dataset['id']}", headers=rita.headers))["dataset"]["id"] == dataset["id"]


def test_lists_show_only_the_users_projects(client, site):
    mine = {d["id"] for d in _ok(client.get("/api/v1/datasets", headers=site["ana"].headers))["datasets"]}
    theirs = {d["id"] for d in _ok(client.get("/api/v1/datasets", headers=site["bea"].headers))["datasets"]}
    everything = {d["id"] for d in _ok(client.get("/api/v1/datasets", headers=site["admin"].headers))["datasets"]}
    assert mine == {site["a"]["id"]} and theirs == {site["b"]["id"]} and everything == mine | theirs
    names = [p["name"] for p in _ok(client.get("/api/v1/projects", headers=site["bea"].headers))["projects"]]
    assert names == ["Cellar B"]


def test_another_projects_things_are_404_as_if_they_did_not_exist(client, site):
    ana, b = site["ana"], site["b"]["id"]
    model = _ok(client.post(f"/api/v1/datasets/{b}/models", json={"components": 2}, headers=site["bea"].headers))
    model_id = model["model"]["id"]
    for path in (f"/api/v1/datasets/{b}", f"/api/v1/models/{model_id}", f"/api/v1/models/{model_id}/samples",
                 f"/api/v1/datasets/{b}/review-log", f"/api/v1/projects/{site['project_b']['id']}"):
        answer = client.get(path, headers=ana.headers)
        assert answer.status_code == 404, (path, answer.get_json())
    unknown = client.get("/api/v1/datasets/999999", headers=ana.headers)
    assert unknown.status_code == 404
    # writes too: a model, a proposal, a reference model from another project's ids
    assert client.post(f"/api/v1/datasets/{b}/models", json={"components": 2}, headers=ana.headers).status_code == 404
    assert client.post("/api/v1/reference-models", json={"model_id": model_id, "name": "x"},
                       headers=ana.headers).status_code == 404
    assert client.get(f"/datasets/{b}", headers=ana.headers).status_code == 404  # the page too


def test_a_saved_view_link_opened_by_a_non_member_is_404(client, site):
    bea = site["bea"]
    view = _ok(client.post("/api/v1/views", json={"dataset_id": site["b"]["id"], "query": "tab=scores",
                                                  "title": "B scores"}, headers=bea.headers), 201)["view"]
    assert client.get(f"/views/{view['id']}", headers=bea.headers).status_code == 200
    assert client.get(f"/views/{view['id']}", headers=site["ana"].headers).status_code == 404


def test_the_role_is_the_role_in_the_project(app, client, site):
    """Bea is an analyst in Cellar B; made a viewer there, she can no longer fit in it."""
    admin, bea, b = site["admin"], site["bea"], site["b"]["id"]
    _ok(client.put(f"/api/v1/projects/{site['project_b']['id']}/members/{bea.id}", json={"role": "viewer"},
                   headers=admin.headers))
    answer = client.post(f"/api/v1/datasets/{b}/models", json={"components": 2}, headers=bea.headers)
    assert answer.status_code == 403
    assert client.get(f"/api/v1/datasets/{b}", headers=bea.headers).status_code == 200


@pytest.mark.parametrize("project_id, status", [("999999", 404), ("abc", 400), ("-1", 400)])
def test_an_upload_into_a_project_must_name_one_the_uploader_belongs_to(client, site, project_id, status):
    answer = _upload(client, site["ana"], project_id=project_id)
    assert answer.status_code == status and answer.get_json()["error"]["field"] == "project_id"


def test_an_upload_into_another_project_is_404(client, site):
    answer = _upload(client, site["ana"], project_id=str(site["project_b"]["id"]))
    assert answer.status_code == 404


def test_only_site_admins_manage_projects_and_every_change_is_in_the_admin_log(app, client, site):
    ana, admin = site["ana"], site["admin"]
    assert client.post("/api/v1/projects", json={"name": "Cellar C"}, headers=ana.headers).status_code == 403
    again = client.post("/api/v1/projects", json={"name": "Cellar B"}, headers=admin.headers)
    assert again.status_code == 409
    bad = client.put(f"/api/v1/projects/{site['project_b']['id']}/members/{ana.id}", json={"role": "owner"},
                     headers=admin.headers)
    assert bad.status_code == 400 and bad.get_json()["error"]["field"] == "role"
    with app.app_context():
        entries = admin_log.page(1, 100)["entries"]
        chain = admin_log.verify()
    actions = [(e["action"], (e["payload"].get("project") or {}).get("name")) for e in reversed(entries)]
    assert [a for a in actions if a[0].startswith("project")] == [
        ("project_member_set", "First project"), ("project_member_set", "First project"),  # ana, bea kept access
        ("project_created", "Cellar B"), ("project_member_set", "First project"),  # bea leaves the first
        ("project_member_set", "Cellar B")]
    assert chain["intact"], chain


def test_the_migration_puts_existing_data_in_a_first_project(database_url):
    """Data from before projects: one project, every dataset in it, every non-admin a member."""
    engine = make_engine(database_url)
    try:
        with engine.begin() as connection:
            config = Config()
            config.set_main_option("script_location", str(MIGRATIONS))
            config.attributes["connection"] = connection
            command.upgrade(config, "0010_account_admin")
            connection.execute(text(
                "INSERT INTO users (name, display_name, role, password_hash, active, created_at, failed_logins, "
                "must_change_password) VALUES ('ana', 'Ana', 'analyst', 'x', true, '2026-01-01', 0, false), "
                "('root', 'Root', 'admin', 'x', true, '2026-01-01', 0, false)"))
            connection.execute(text(
                "INSERT INTO datasets (sha256, name, stored_path, size_bytes, intake_options, n_samples, "
                "n_variables, variables, metadata_columns, warnings, report, uploaded_by, created_at) VALUES "
                f"('{'a' * 64}', 'old.csv', 'files/aa/{'a' * 64}', 3, '{{}}', 2, 2, '[]', '[]', '[]', '{{}}', 1, "
                "'2026-01-01')"))
        migrate(engine)
        with engine.connect() as connection:
            projects = connection.execute(text("SELECT id, name FROM projects")).all()
            assert [name for _, name in projects] == ["First project"]
            assert connection.execute(text("SELECT project_id FROM datasets")).scalar_one() == projects[0][0]
            members = connection.execute(text(
                "SELECT u.name, m.role FROM project_members m JOIN users u ON u.id = m.user_id")).all()
            assert [tuple(m) for m in members] == [("ana", "analyst")]
    finally:
        engine.dispose()


def test_a_page_callback_about_another_projects_dataset_is_404(client, site):
    """Dash callbacks carry the page's context in their stores; the door reads them too."""
    from webapp.web.ui import ids

    payload = {"output": f"{ids.GRAPH_SCORES}.figure", "outputs": {"id": ids.GRAPH_SCORES, "property": "figure"},
               "inputs": [{"id": ids.DATASET_ID, "property": "data", "value": site["b"]["id"]}],
               "changedPropIds": [f"{ids.DATASET_ID}.data"], "state": []}
    answer = client.post("/_dash-update-component", json=payload, headers=site["ana"].headers)
    assert answer.status_code == 404
    own = {**payload, "inputs": [{"id": ids.DATASET_ID, "property": "data", "value": site["a"]["id"]}]}
    with pytest.raises(KeyError, match="Callback function not found"):  # past the door, Dash has no such callback
        client.post("/_dash-update-component", json=own, headers=site["ana"].headers)
