"""End to end in headless Chromium: a user who is not a member of a project cannot find its
datasets, neither in the lists nor by typing the address (a 404 page, as for something that
does not exist). OWASP Authorization Cheat Sheet: deny by default, do not reveal resources.
"""

from __future__ import annotations

import threading
from types import SimpleNamespace

import pytest
from playwright.sync_api import expect
from werkzeug.serving import make_server

from tests.e2e.conftest import LiveServer, _free_port, lab_dataset_id, sign_in
from webapp.services.demo_data import LAB_FILENAME

# Invented measurements for the second project's dataset (made up for this test).
OTHER_CSV = ("sample,alpha,beta,gamma\n" + "".join(f"Q-{i:02d},{1 + i % 3}.{i % 7},{2 + i % 5}.1,{3 + i % 4}.2\n"
                                                   for i in range(12))).encode()
BO_PASSWORD = "a long invented passphrase for Bo"


@pytest.fixture(scope="module")
def two_projects(tmp_path_factory):
    """The lab demo plus a second project, "Line 7", whose only member is Bo (an analyst)."""
    from webapp import auth
    from webapp.app import create_app
    from webapp.cli.serve import prepare_demo
    from webapp.services import ingest, projects
    from webapp.store import accounts, session_scope
    from webapp.store import projects as projects_store

    home = tmp_path_factory.mktemp("projects-home")
    overrides = {"HOME": str(home), "DEMO": True}
    users = {name: (role, password) for name, role, password in prepare_demo(overrides)}
    app = create_app(overrides)
    with app.app_context():
        with session_scope() as s:
            admin = accounts.get_user_by_name(s, next(n for n, (r, _) in users.items() if r == "admin"))
            acting = SimpleNamespace(id=admin.id, name=admin.name, display_name=admin.display_name, role="admin")
            bo = accounts.add_user(s, "bo", "analyst", auth.hash_password(BO_PASSWORD), "Bo Invented")
            bo_id = bo.id
        line7 = projects.create_project("Line 7", "an invented second line", acting)
        projects.set_member(line7["id"], bo_id, "analyst", acting)
        with session_scope() as s:  # Bo belongs to Line 7 only
            first = next(p for p in projects_store.list_projects(s) if p.name != "Line 7")
            projects_store.set_member(s, first.id, bo_id, None)
        other = ingest.ingest_upload(OTHER_CSV, "line7.csv", bo_id, project_id=line7["id"])
    users["bo"] = ("analyst", BO_PASSWORD)
    port = _free_port()
    server = make_server("127.0.0.1", port, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield LiveServer(f"http://127.0.0.1:{port}", users, home, app), other["id"]
    finally:
        server.shutdown()
        thread.join(timeout=10)
        app.extensions["latentdesk.engine"].dispose()


def test_a_non_member_cannot_find_a_projects_dataset(two_projects, new_page):
    server, other_id = two_projects
    ana = new_page()
    sign_in(ana, server, "ana")
    ana.wait_for_url(server.url + "/")
    lab_id = lab_dataset_id(ana, server)
    expect(ana.locator("#home-dataset-list")).not_to_contain_text("line7.csv")
    answer = ana.goto(f"{server.url}/datasets/{other_id}")
    assert answer.status == 404
    expect(ana.locator("body")).to_contain_text("no such item")

    bo = new_page()
    sign_in(bo, server, "bo")
    bo.wait_for_url(server.url + "/")
    expect(bo.locator("#home-dataset-list")).to_contain_text("line7.csv")
    expect(bo.locator("#home-dataset-list")).not_to_contain_text(LAB_FILENAME)
    answer = bo.goto(f"{server.url}/datasets/{lab_id}")
    assert answer.status == 404
    answer = bo.goto(f"{server.url}/datasets/{other_id}")
    assert answer.status == 200
