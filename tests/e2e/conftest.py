"""Browser tests: a real server on a free loopback port and Debian's Chromium.

- ``demo_server``: the demo prepared exactly as ``latentdesk demo`` does
  (``webapp.cli.serve.prepare_demo``) and served by werkzeug's threaded server;
  gives ``.url``, ``.users`` (name -> (role, password)) and ``.app`` (the served
  Flask app, for tests that prepare records through the services).
- ``browser``: headless Chromium through the Playwright sync API. A missing
  browser skips locally and fails when ``CI=true``.
- ``new_page``: a fresh browser context (own cookies) per call.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
import threading
from dataclasses import dataclass
from pathlib import Path

import pytest
from werkzeug.serving import make_server

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
IN_CI = os.environ.get("CI", "").lower() == "true"
# Screenshots land in test-results/screenshots/; set LATENTDESK_DOC_IMAGES=1 to refresh the
# pictures of the user guide in docs/images/ instead (look at them before committing).
_ROOT = Path(__file__).resolve().parents[2]
SCREENSHOTS = (_ROOT / "docs" / "images" if os.environ.get("LATENTDESK_DOC_IMAGES") == "1"
               else _ROOT / "test-results" / "screenshots")
SCREENSHOTS.mkdir(parents=True, exist_ok=True)


def pytest_collection_modifyitems(items):
    for item in items:
        if "tests/e2e/" in str(item.fspath).replace(os.sep, "/"):
            item.add_marker(pytest.mark.e2e)


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@dataclass
class LiveServer:
    url: str
    users: dict[str, tuple[str, str]]
    home: Path
    app: object = None


@pytest.fixture(scope="session")
def demo_server(tmp_path_factory):
    from webapp.app import create_app
    from webapp.cli.serve import prepare_demo

    home = tmp_path_factory.mktemp("demo-home")
    overrides = {"HOME": str(home), "DEMO": True}
    users = {name: (role, password) for name, role, password in prepare_demo(overrides)}
    app = create_app(overrides)
    port = _free_port()
    server = make_server("127.0.0.1", port, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield LiveServer(f"http://127.0.0.1:{port}", users, home, app)
    finally:
        server.shutdown()
        thread.join(timeout=10)
        app.extensions["latentdesk.engine"].dispose()


@pytest.fixture(scope="session")
def browser():
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        message = "playwright is not installed"
        pytest.fail(message) if IN_CI else pytest.skip(message)
    if not (os.path.exists(CHROMIUM) or shutil.which("chromium")):
        message = f"no Chromium at {CHROMIUM} (apt-get install chromium)"
        pytest.fail(message) if IN_CI else pytest.skip(message)
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        yield browser
        browser.close()


@pytest.fixture
def new_page(browser):
    contexts = []

    def make(width: int = 1280, height: int = 860):
        context = browser.new_context(viewport={"width": width, "height": height})
        context.set_default_timeout(30_000)
        contexts.append(context)
        return context.new_page()

    yield make
    for context in contexts:
        context.close()


def sign_in(page, server: LiveServer, name: str, path: str = "/"):
    """Open ``path``, get sent to the sign-in form, sign in as ``name``."""
    page.goto(server.url + path)
    page.wait_for_url("**/-/login**")
    page.fill("#name", name)
    page.fill("#password", server.users[name][1])
    page.click("button[type=submit]")


def analyst_on_lab_demo(new_page, server: LiveServer):
    """A new page signed in as the analyst ``ana``, and the id of the demo's lab dataset."""
    page = new_page()
    sign_in(page, server, "ana")
    page.wait_for_url(server.url + "/")
    return page, lab_dataset_id(page, server)


def lab_dataset_id(page, server: LiveServer) -> int:
    """The id of the demo's lab dataset, read from its link on the start page."""
    from webapp.services.demo_data import LAB_FILENAME

    page.goto(server.url + "/")
    href = page.get_by_role("link", name=LAB_FILENAME).get_attribute("href")
    return int(re.search(r"/datasets/(\d+)", href).group(1))


def drag_box(page, x0: float, y0: float, x1: float, y1: float, steps: int = 5) -> None:
    """Drag the mouse from (x0, y0) to (x1, y1) through the middle, as a box selection."""
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move((x0 + x1) / 2, (y0 + y1) / 2, steps=steps)
    page.mouse.move(x1, y1, steps=steps)
    page.mouse.up()


def box_select_right_of_scores(page, timeout: float) -> None:
    """Drag a box over the right part of the score plot (its drag mode is select)."""
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=timeout)
    box = page.locator("#graph-scores .nsewdrag").first.bounding_box()
    drag_box(page, box["x"] + box["width"] * 0.55, box["y"] + 5,
             box["x"] + box["width"] - 5, box["y"] + box["height"] - 5, steps=8)
