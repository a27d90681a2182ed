"""Accessibility in headless Chromium (WCAG 2.2 AA): axe-core on every page, and the
analyst's and the reviewer's whole job done with the keyboard alone.

axe-core (Deque Systems, https://github.com/dequelabs/axe-core) is fetched from the
npm registry with ``npm pack`` at a pinned version, checked against the sha512
integrity the registry publishes for that version, and kept in .cache/axe-core/
(ignored by git). Without npm or the registry the axe tests skip locally and fail
when CI=true. A page passes when axe reports no violation of impact "serious" or
"critical" (axe-core's impact scale, axe-core API documentation, "Results object").

Pages: every page Dash has registered (the test fails when a new page is not in
the list below), each tab of the dataset page with a sample explained and a
plot's numbers shown (the screening tab also on the demo survey, flagged rows listed), the Flask pages (sign-in, sign-off report, the 403 and 404
pages, choosing a new password after an administrator made the first one). Pages that need the
admin role are visited signed in as the demo's admin. Records the pages need (a decided and a waiting proposal, a saved view)
belong to an invented dataset of this module, so the demo's datasets stay as the
other browser tests expect them.

The keyboard walk uses keyboard.press and keyboard.type only, plus the browser's
file chooser, which Space opens on the focused file input. Tab order, arrow keys
in the tab list (WAI-ARIA Authoring Practices, "Tabs") and in the outlier table
("Grid"), Enter and Space on buttons and links: as a person without a mouse would.
"""

from __future__ import annotations

import base64
import hashlib
import io
import re
import shutil
import subprocess
import tarfile
from pathlib import Path
from urllib.parse import urlsplit

import numpy as np
import pytest
from playwright.sync_api import expect

from tests.e2e.conftest import IN_CI, SCREENSHOTS, sign_in
from webapp import url_state
from webapp.services.demo_data import SURVEY_FILENAME
from webapp.url_state import TABS, ViewState
from webapp.web.ui import ids

AXE_VERSION = "4.14.1"
# `npm view axe-core@4.14.1 dist.integrity` (the npm registry's Subresource Integrity string)
AXE_INTEGRITY = "sha512-FHfa+lmNjQZfJz1q8wKqIDwC6DExcHt/pkjNQb09a3NPjCKg2rhu5qb2S4r76ASyFNNtuFooJpZe37OgudVGtQ=="
AXE_CACHE = Path(__file__).resolve().parents[2] / ".cache" / "axe-core"
BLOCKING = ("serious", "critical")
FIT_WAIT = 90_000
TAB_GRAPH = {"variance": ids.GRAPH_VARIANCE, "scores": ids.GRAPH_SCORES, "loadings": ids.GRAPH_LOADINGS,
             "diagnostics": ids.GRAPH_T2_SPE}
TAB_READY = {**{tab: f"#{graph} .main-svg" for tab, graph in TAB_GRAPH.items()}, "outliers": f"#{ids.OUTLIER_GRID}",
             "screening": f"#{ids.SCREENING_STATUS} p"}


# ------------------------------------------------------------------ axe-core
def _npm_pack_axe() -> str:
    """The text of axe.min.js from the pinned, integrity-checked npm package."""
    tarball = AXE_CACHE / f"axe-core-{AXE_VERSION}.tgz"
    if not tarball.is_file():
        npm = shutil.which("npm")
        if npm is None:
            raise RuntimeError("npm is not installed (apt-get install npm); it fetches axe-core")
        AXE_CACHE.mkdir(parents=True, exist_ok=True)
        done = subprocess.run([npm, "pack", f"axe-core@{AXE_VERSION}", "--pack-destination", str(AXE_CACHE)],
                              capture_output=True, text=True, timeout=300)
        if done.returncode != 0 or not tarball.is_file():
            raise RuntimeError(f"npm pack axe-core@{AXE_VERSION} failed: {done.stderr.strip()[-800:]}")
    digest = "sha512-" + base64.b64encode(hashlib.sha512(tarball.read_bytes()).digest()).decode()
    if digest != AXE_INTEGRITY:
        tarball.unlink()
        raise RuntimeError(f"{tarball.name} does not match the registry's integrity {AXE_INTEGRITY}")
    with tarfile.open(tarball) as tar:
        return tar.extractfile("package/axe.min.js").read().decode("utf-8")


@pytest.fixture(scope="session")
def axe_script() -> str:
    try:
        return _npm_pack_axe()
    except (RuntimeError, OSError, subprocess.SubprocessError) as exc:
        message = f"axe-core is not available: {exc}"
        pytest.fail(message) if IN_CI else pytest.skip(message)


def blocking_violations(page, axe_script: str) -> list[dict]:
    """axe-core's violations of impact serious or critical on the page as it is now."""
    if not page.evaluate("() => typeof window.axe === 'object'"):
        # Evaluated, not added as an inline <script>: the app's Content-Security-Policy refuses those.
        page.evaluate(axe_script)
    violations = page.evaluate("async () => (await axe.run(document, {resultTypes: ['violations']})).violations")
    return [v for v in violations if v["impact"] in BLOCKING]


def describe(where: str, violations: list[dict]) -> str:
    lines = [f"{where}:"]
    for v in violations:
        lines.append(f"  [{v['impact']}] {v['id']}: {v['help']} ({v['helpUrl']})")
        for node in v["nodes"][:8]:
            summary = " | ".join(line.strip() for line in (node.get("failureSummary") or "").splitlines())
            lines.append(f"      {' '.join(map(str, node['target']))}: {summary[:400]}")
    return "\n".join(lines)


def check_pages(page, axe_script: str, visits) -> None:
    """Open each (label, url, ready selector, action) and collect axe's blocking violations;
    fail with all of them listed."""
    found = []
    for label, url, ready, action in visits:
        page.goto(url)
        page.wait_for_selector(ready, state="attached", timeout=FIT_WAIT)
        if action is not None:
            action(page)
        page.wait_for_load_state("networkidle")
        violations = blocking_violations(page, axe_script)
        if violations:
            found.append(describe(f"{label} ({url})", violations))
    assert not found, "axe-core found serious or critical violations:\n" + "\n".join(found)


# -------------------------------------------------------------- invented data
def invented_csv(prefix: str, n: int, seed: int) -> bytes:
    """Invented batches: four correlated measurements and a line, the last batch far off
    the correlation (so the outlier table has a row to pick). Made up for these tests."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 2))
    values = latent @ np.array([[1.0, 0.8, 0.2, -0.5], [0.1, -0.3, 1.0, 0.7]]) + 0.2 * rng.normal(size=(n, 4))
    values[-1] = [3.0, -3.0, 3.0, -3.0]
    out = io.StringIO()
    out.write("batch,line,assay (%),moisture (%),hardness (N),dissolution 30 min (%)\n")
    for i, row in enumerate(values):
        cells = ",".join(f"{v + base:.3f}" for v, base in zip(row, (98.0, 2.0, 80.0, 85.0)))
        out.write(f"{prefix}-{i + 1:02d},{'AB'[i % 2]},{cells}\n")
    return out.getvalue().encode()


def _user(name: str):
    from webapp.auth import CurrentUser
    from webapp.store import accounts, session_scope

    with session_scope() as s:
        row = accounts.get_user_by_name(s, name)
        return CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role)


@pytest.fixture(scope="module")
def records(demo_server):
    """This module's dataset (invented), a proposal rejected by a reviewer (for the sign-off
    report), a proposal waiting for one, a saved view, a reference model (approved) and a
    batch checked against it; made through the services."""
    from webapp.services import batches, ingest, modelling, reference_models, review, views

    with demo_server.app.app_context():
        analyst, reviewer = _user("ana"), _user("rowan")
        dataset = ingest.ingest_upload(invented_csv("AX", 30, seed=13), "a11y_pages.csv", analyst.id)
        samples = ingest.load_table(dataset["id"]).sample_ids
        decided = review.propose(dataset["id"], analyst, samples=[samples[-1]], reason_category="measurement error",
                                 reason="Invented record: the assay run was faulty.")
        review.sign(decided["id"], reviewer, decision="reject", password=demo_server.users["rowan"][1],
                    comment="Invented record: the run was fine.")
        waiting = review.propose(dataset["id"], analyst, samples=[samples[0]], reason_category="other",
                                 reason="Invented record: waiting for a reviewer.")
        view = views.save_view(analyst, dataset["id"], query="tab=scores", title="Invented view",
                               note="Saved for the accessibility test.", selection=[samples[0]])
        _, fitted = modelling.get_model(dataset["id"], ViewState().model_settings(dataset["variables"]))
        reference = reference_models.propose(fitted["id"], "Invented reference", user=analyst)
        reference_models.approve(reference["id"], demo_server.users["rowan"][1], user=reviewer)
        batch = batches.check_batch(reference["id"], invented_csv("NB", 6, seed=21), "a11y_batch.csv", analyst)
        survey = next(d["id"] for d in ingest.list_datasets() if d["name"] == SURVEY_FILENAME)  # the demo's
    return {"dataset": dataset["id"], "sample": samples[-1], "decided": decided["id"], "waiting": waiting["id"],
            "survey": survey,
            "view": view["id"], "reference": reference["id"], "batch": batch["id"]}


# ----------------------------------------------------------------- axe tests
def _fitted(graph_id: str | None):
    """Wait for the fit; then show the numbers of plot ``graph_id`` (the outlier table: its rows)."""
    def action(page):
        expect(page.locator(f"#{ids.FIT_SOURCE}")).to_contain_text("Showing", timeout=FIT_WAIT)
        if graph_id is None:
            expect(page.locator(f"#{ids.OUTLIER_GRID} .ag-row").first).to_be_visible(timeout=FIT_WAIT)
            return
        page.click(f"#{ids.plot_numbers_button(graph_id)}")
        expect(page.locator(f"#{ids.plot_numbers(graph_id)} table")).to_be_visible()
    return action


def _screened(declare: bool, choice: str | None = None):
    """On the screening tab: tick 'items on one scale' (``declare``), choose a filter, show the plot's numbers."""
    def action(page):
        if declare:
            page.get_by_label("Treat the variables as items on one scale").check()
            expect(page.locator(f"#{ids.SCREENING_STATUS}")).to_contain_text("Screened as declared", timeout=FIT_WAIT)
        if choice:
            page.get_by_label(choice).check()
            expect(page.locator(f"#{ids.SCREENING_NOTE}")).to_contain_text(choice, timeout=FIT_WAIT)
        expect(page.locator(f"#{ids.SCREENING_GRID} .ag-row").first).to_be_visible(timeout=FIT_WAIT)
        page.click(f"#{ids.plot_numbers_button(ids.SCREENING_PLOT)}")
        expect(page.locator(f"#{ids.plot_numbers(ids.SCREENING_PLOT)} table")).to_be_visible(timeout=FIT_WAIT)
    return action


def _page_visits(server, records: dict) -> dict[str, list]:
    """The visits of each registered page (by its path or path template)."""
    base, ds = server.url, records["dataset"]
    tabs = []
    for tab in TABS:
        state = ViewState(components=2, tab=tab, sample=records["sample"])
        action = _screened(declare=True) if tab == "screening" else _fitted(TAB_GRAPH.get(tab))
        tabs.append((f"dataset page, {tab} tab", base + url_state.dataset_url(ds, state), TAB_READY[tab], action))
    tabs.append(("dataset page, screening tab of the demo survey",
                 base + url_state.dataset_url(records["survey"], ViewState(tab="screening")), TAB_READY["screening"],
                 _screened(declare=False, choice="flagged by two or more indices")))
    tabs.append(("dataset page from a saved view", base + url_state.dataset_url(ds, ViewState(), records["view"]),
                 TAB_READY["scores"], _fitted(ids.GRAPH_SCORES)))
    tabs.append(("dataset page, no such dataset", base + "/datasets/999999", "h1", None))
    return {
        "/": [("datasets", base + url_state.home_url(), f"#{ids.HOME_DATASET_LIST} table", None)],
        url_state.upload_url(): [("upload", base + url_state.upload_url(), f"#{ids.UPLOAD_DROP}", None)],
        url_state.dataset_path_template(): tabs,
        "/review": [("review queue", base + url_state.review_url(), f"#{ids.REVIEW_QUEUE} table", None),
                    ("a decided proposal", base + url_state.proposal_url(records["decided"]),
                     f"#{ids.REVIEW_DETAIL}", None)],
        "/review/propose": [("propose", base + url_state.propose_url(ds, [records["sample"]]),
                             f"#{ids.PROPOSE_PREVIEW} table", None)],
        "/review/log": [("review log", base + url_state.review_log_url(ds), f"#{ids.LOG_TABLE} table", None)],
        "/views": [("saved views", base + url_state.views_url(ds), f"#{ids.VIEWS_LIST} table", None),
                   ("save a view", base + url_state.save_view_url(ds, ViewState(tab="scores")),
                    f"#{ids.VIEW_SAVE_TITLE}", None)],
        "/views/<view_id>": [("a saved view", base + url_state.view_url(records["view"]), f"#{ids.VIEW_OPEN} h1",
                              None)],
        "/monitoring": [("monitoring", base + url_state.monitoring_url(), f"#{ids.MON_LIST}", None)],
        url_state.reference_model_path_template(): [
            ("a reference model", base + url_state.reference_model_url(records["reference"]), f"#{ids.MON_FACTS}",
             None)],
        url_state.batch_path_template(): [
            ("a checked batch", base + url_state.batch_url(records["batch"]), f"#{ids.MON_SAMPLES}", None)],
        "/admin": [("accounts and the admin log", base + "/admin", f"#{ids.ADMIN_USERS} table", None)],
        "/admin/projects": [("projects and their members", base + "/admin/projects", f"#{ids.PROJECTS_TABLE} table",
                             None)],
        "/account": [("my account", base + "/account", f"#{ids.ACCOUNT_SESSIONS} table", None)],
    }


def test_every_page_of_the_app_passes_axe(demo_server, new_page, axe_script, records):
    import dash

    page = new_page()
    sign_in(page, demo_server, "ana")
    page.wait_for_url(demo_server.url + "/")
    visits = _page_visits(demo_server, records)
    registered = {p.get("path_template") or p["path"] for p in dash.page_registry.values()}
    assert registered <= set(visits), f"pages without an accessibility check: {sorted(registered - set(visits))}"
    admin_only = {p.get("path_template") or p["path"] for p in dash.page_registry.values()
                  if p.get("min_role") == "admin"}
    check_pages(page, axe_script, [visit for path in sorted(registered - admin_only) for visit in visits[path]])
    admin = new_page()  # the pages only an administrator opens, signed in as the demo's admin
    sign_in(admin, demo_server, "admin")
    admin.wait_for_url(demo_server.url + "/")
    check_pages(admin, axe_script, [visit for path in sorted(admin_only) for visit in visits[path]])


def test_reviewer_and_plain_pages_pass_axe(demo_server, new_page, axe_script, records):
    base = demo_server.url
    anonymous = new_page()
    anonymous.goto(base + "/")
    anonymous.wait_for_url("**/-/login**")
    anonymous.fill("#name", "nobody")
    anonymous.fill("#password", "not a password")
    anonymous.keyboard.press("Enter")
    expect(anonymous.locator(".ld-alert")).to_be_visible()
    refused = blocking_violations(anonymous, axe_script)
    assert not refused, describe("sign-in with a refusal", refused)
    check_pages(anonymous, axe_script, [("sign-in", base + "/-/login", "#name", None)])

    reviewer = new_page()
    sign_in(reviewer, demo_server, "rowan")
    reviewer.wait_for_url(base + "/")
    check_pages(reviewer, axe_script, [
        ("a proposal to sign", base + url_state.proposal_url(records["waiting"]), f"#{ids.REVIEW_APPROVE}", None),
        ("sign-off report", base + url_state.signoff_report_url(records["dataset"], records["decided"]), "h1", None),
        ("404 page", base + "/no-such-page", "h1", None),
    ])
    assert reviewer.title().startswith("Not found")

    viewer = new_page()
    sign_in(viewer, demo_server, "vic")
    viewer.wait_for_url(base + "/")
    check_pages(viewer, axe_script, [("403 page", base + url_state.upload_url(), "h1", None)])
    expect(viewer.locator("h1")).to_have_text("Not allowed")

    # a user whose first password an administrator made is sent to choose their own
    from webapp.services import admin_log, user_admin

    with demo_server.app.app_context():
        made = user_admin.add(admin_log.actor_of(_user("admin")), "a11y-newcomer", "viewer", "Invented Newcomer")
    newcomer = new_page()
    newcomer.goto(base + "/")
    newcomer.wait_for_url("**/-/login**")
    newcomer.fill("#name", "a11y-newcomer")
    newcomer.fill("#password", made["password"])
    newcomer.click("button[type=submit]")
    newcomer.wait_for_url("**/-/password**")
    check_pages(newcomer, axe_script, [("choose a new password", base + "/-/password", "#new_password", None)])


# ------------------------------------------------------------- keyboard walk
def focused(page) -> str:
    """A short description of the element with focus (for messages)."""
    return page.evaluate("""() => { const e = document.activeElement; if (!e) return 'nothing';
        return e.tagName.toLowerCase() + (e.id ? '#' + e.id : '') + (e.getAttribute('role') ? '[' +
               e.getAttribute('role') + ']' : '') + ' "' + (e.textContent || '').trim().slice(0, 30) + '"'; }""")


def tab_to(page, selector: str, *, backwards: bool = False, limit: int = 150) -> None:
    """Press Tab (Shift+Tab) until the element with focus matches ``selector``."""
    trail = []
    for _ in range(limit):
        page.keyboard.press("Shift+Tab" if backwards else "Tab")
        if page.evaluate("s => !!document.activeElement && document.activeElement.matches(s)", selector):
            return
        trail.append(focused(page))
    raise AssertionError(f"{selector} not reached with {'Shift+' if backwards else ''}Tab; focus went: "
                         + " -> ".join(trail[-40:]))


def keyboard_sign_in(page, server, name: str, path: str = "/") -> None:
    page.goto(server.url + path)
    page.wait_for_url("**/-/login**")
    if not page.evaluate("() => document.activeElement && document.activeElement.id === 'name'"):
        tab_to(page, "#name")
    page.keyboard.type(name)
    page.keyboard.press("Tab")
    page.keyboard.type(server.users[name][1])
    page.keyboard.press("Enter")


def focus_ring_width(page) -> float:
    """Width in px of the outline drawn around the element with focus."""
    return page.evaluate("() => { const s = getComputedStyle(document.activeElement);"
                         " return s.outlineStyle === 'none' ? 0 : parseFloat(s.outlineWidth); }")


def test_keyboard_only_upload_explore_propose_and_sign(demo_server, new_page, tmp_path):
    base = demo_server.url
    analyst = new_page(1280, 860)
    keyboard_sign_in(analyst, demo_server, "ana")
    analyst.wait_for_url(base + "/")

    # upload: the Upload link, the file input (Space opens the file chooser), store
    tab_to(analyst, f'a.ld-nav-link[href="{url_state.upload_url()}"]')
    analyst.keyboard.press("Enter")
    analyst.wait_for_url(base + url_state.upload_url())
    upload = tmp_path / "keyboard_walk.csv"
    upload.write_bytes(invented_csv("KW", 24, seed=7))
    analyst.on("filechooser", lambda _chooser: None)  # turns on the interception before the key press
    tab_to(analyst, f"#{ids.UPLOAD_DROP} input[type=file]")
    with analyst.expect_file_chooser() as chooser:
        analyst.keyboard.press("Space")
    chooser.value.set_files(str(upload))
    expect(analyst.locator(f"#{ids.UPLOAD_REPORT}")).to_contain_text("What the file holds")
    expect(analyst.locator(f"#{ids.UPLOAD_CONFIRM}")).to_be_enabled()
    tab_to(analyst, f"#{ids.UPLOAD_CONFIRM}")
    analyst.keyboard.press("Enter")
    analyst.wait_for_url(re.compile(r"/datasets/\d+"), timeout=FIT_WAIT)
    expect(analyst.locator(f"#{ids.FIT_SOURCE}")).to_contain_text("Showing", timeout=FIT_WAIT)

    # the tabs: Tab reaches the open one; Home, End and the arrows move, Enter opens
    tab_to(analyst, '[role="tab"][aria-selected="true"]')
    assert focus_ring_width(analyst) >= 2, "the focused tab shows no focus ring"
    analyst.screenshot(path=str(SCREENSHOTS / "a11y-focus-tab.png"))
    analyst.keyboard.press("Home")
    for i, tab in enumerate(TABS):
        if i:
            analyst.keyboard.press("ArrowRight")
        here = analyst.locator(f"#{ids.view_tab(tab)}")
        expect(here).to_be_focused()
        analyst.keyboard.press("Enter")
        expect(here).to_have_attribute("aria-selected", "true")
        expect(here).to_have_attribute("tabindex", "0")
        expect(analyst.locator(f"#{ids.VIEW_TABPANEL}")).to_have_attribute("aria-labelledby", ids.view_tab(tab))
        analyst.wait_for_selector(TAB_READY[tab], state="attached", timeout=FIT_WAIT)
        assert url_state.parse_query(urlsplit(analyst.url).query)[0].tab == tab, analyst.url
    analyst.keyboard.press("ArrowRight")  # wraps round to the first tab, without opening it
    expect(analyst.locator(f"#{ids.view_tab(TABS[0])}")).to_be_focused()
    expect(analyst.locator(f"#{ids.view_tab(TABS[0])}")).to_have_attribute("aria-selected", "false")
    analyst.keyboard.press("End")
    expect(analyst.locator(f"#{ids.view_tab('outliers')}")).to_be_focused()

    # the outlier table: one Tab stop, arrows to a row, Space selects it and explains it
    grid = analyst.locator(f"#{ids.OUTLIER_GRID}")
    expect(grid.locator(".ag-row").first).to_be_visible(timeout=FIT_WAIT)
    tab_to(analyst, f"#{ids.OUTLIER_GRID} [role=columnheader], #{ids.OUTLIER_GRID} [role=gridcell]")
    analyst.keyboard.press("ArrowDown")
    in_row = analyst.wait_for_function("() => document.activeElement.closest('[row-id]')")
    sample = in_row.evaluate("row => row.getAttribute('row-id')")
    analyst.keyboard.press("Space")
    expect(analyst.locator(f"#{ids.EXPLAIN_PANEL} .ld-sample-id")).to_have_text(sample)
    analyst.screenshot(path=str(SCREENSHOTS / "a11y-focus-outlier-row.png"))
    tab_to(analyst, f"#{ids.EXPLAIN_SELECT}", limit=12)  # Tab leaves the table at once
    analyst.keyboard.press("Enter")
    expect(analyst.locator(f"#{ids.SELECTION_PANEL}")).to_contain_text("1 sample selected")
    expect(analyst.locator(f"#{ids.SELECTION_PANEL}")).to_contain_text(sample)

    # a plot's numbers, by keyboard: the explained sample's SPE contributions as a table
    tab_to(analyst, f"#{ids.plot_numbers_button(ids.GRAPH_SPE_CONTRIB)}")
    analyst.keyboard.press("Enter")
    numbers = analyst.locator(f"#{ids.plot_numbers(ids.GRAPH_SPE_CONTRIB)} table")
    expect(numbers).to_contain_text("squared residual × its sign")
    expect(analyst.locator(f"#{ids.plot_numbers_button(ids.GRAPH_SPE_CONTRIB)}")).to_have_attribute(
        "aria-expanded", "true")

    # propose the exclusion of the selection
    expect(analyst.locator(f"#{ids.REVIEW_PROPOSE_LINK}")).to_have_attribute("href", re.compile(re.escape(sample)))
    tab_to(analyst, f"#{ids.REVIEW_PROPOSE_LINK}", backwards=True)
    analyst.keyboard.press("Enter")
    analyst.wait_for_url("**/review/propose?**")
    expect(analyst.locator(f"#{ids.PROPOSE_PREVIEW}")).to_contain_text("Principal angles", timeout=FIT_WAIT)
    tab_to(analyst, f"#{ids.PROPOSE_CATEGORY}")
    analyst.keyboard.press("Enter")  # opens the list with the focus in its search box
    analyst.wait_for_function("() => document.activeElement.matches('.dash-dropdown-search')")
    analyst.keyboard.type("measurement")
    expect(analyst.locator(".dash-dropdown-content .dash-options-list-option")).to_have_count(1)
    analyst.keyboard.press("Enter")  # takes the one match and closes the list
    expect(analyst.locator(".dash-dropdown-content")).to_have_count(0)
    expect(analyst.locator(f"#{ids.PROPOSE_CATEGORY}")).to_contain_text("measurement error")
    tab_to(analyst, f"#{ids.PROPOSE_REASON}")
    analyst.keyboard.type("Invented record: the run of this batch was faulty.")
    tab_to(analyst, f"#{ids.PROPOSE_SUBMIT}")
    analyst.screenshot(path=str(SCREENSHOTS / "a11y-focus-submit.png"), full_page=True)
    analyst.keyboard.press("Enter")
    message = analyst.locator(f"#{ids.PROPOSE_MESSAGE}")
    expect(message).to_contain_text("is waiting for a reviewer")
    proposal_id = int(re.search(r"Proposal (\d+)", message.inner_text()).group(1))

    # the reviewer signs, by keyboard too
    reviewer = new_page(1280, 860)
    keyboard_sign_in(reviewer, demo_server, "rowan", url_state.review_url())
    reviewer.wait_for_url(base + url_state.review_url())
    tab_to(reviewer, f'#{ids.REVIEW_QUEUE} a[href="{url_state.proposal_url(proposal_id)}"]')
    reviewer.keyboard.press("Enter")
    expect(reviewer.locator(f"#{ids.REVIEW_DETAIL}")).to_contain_text("measurement error")
    tab_to(reviewer, f"#{ids.REVIEW_COMMENT}")
    reviewer.keyboard.type("Invented record: checked, the run was faulty.")
    tab_to(reviewer, f"#{ids.REVIEW_PASSWORD}")
    reviewer.keyboard.type(demo_server.users["rowan"][1])
    tab_to(reviewer, f"#{ids.REVIEW_APPROVE}")
    reviewer.keyboard.press("Enter")
    expect(reviewer.locator(f"#{ids.REVIEW_MESSAGE}")).to_contain_text("Signed as")
