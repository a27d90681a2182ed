"""End to end in headless Chromium: an analyst selects the demo's two out-of-model
batches on the dataset page and proposes excluding them, a reviewer signs in another
browser context, and the log page shows both actions with names and times.
Screenshots: see SCREENSHOTS in tests/e2e/conftest.py.

The planted anomalies are those of the invented demo data (docs/scenarios.md, step 3).
"""

from __future__ import annotations

import re

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, analyst_on_lab_demo, drag_box, sign_in
from webapp.cli.serve import DEMO_USERS
from webapp import url_state
from webapp.web.ui import ids

PLANTED = ["B26-042", "B26-070"]
PRINTED = {name: printed for name, _role, printed in DEMO_USERS}


def _box_select_high_spe(page, above: float) -> None:
    """Drag a selection box over the T2-SPE plot, from the top down to SPE = ``above``."""
    graph = "#graph-t2-spe .js-plotly-plot"
    page.wait_for_selector(f"{graph} .scatterlayer .point", timeout=90_000)
    box = page.evaluate(
        """([selector, above]) => {
            const gd = document.querySelector(selector);
            Plotly.relayout(gd, {dragmode: 'select'});
            const xa = gd._fullLayout.xaxis, ya = gd._fullLayout.yaxis, r = gd.getBoundingClientRect();
            return {x0: r.left + xa._offset + 2, x1: r.left + xa._offset + xa._length - 2,
                    y0: r.top + ya._offset + 2, y1: r.top + ya._offset + ya.l2p(above)};
        }""",
        [graph, above],
    )
    drag_box(page, box["x0"], box["y0"], box["x1"], box["y1"])


def test_analyst_proposes_reviewer_signs_log_shows_both(demo_server, new_page):
    analyst, dataset_id = analyst_on_lab_demo(new_page, demo_server)

    # On the dataset page: three components, the T2-SPE plot, a box around the two batches far
    # above the SPE limit (SPE about 22, limit about 6; docs/scenarios.md step 3).
    state = url_state.ViewState(components=3, tab="diagnostics")
    analyst.goto(demo_server.url + url_state.dataset_url(dataset_id, state))
    expect(analyst.locator(f"#{ids.FIT_SOURCE}")).to_contain_text("Showing 3 components", timeout=90_000)
    _box_select_high_spe(analyst, above=15)
    expect(analyst.locator(f"#{ids.SELECTION_PANEL}")).to_contain_text("2 samples selected")
    expect(analyst.locator(f"#{ids.SELECTION_PANEL}")).to_contain_text(", ".join(PLANTED))
    # The link is rebuilt by its own callback after the selection changes: wait for it.
    for sample in PLANTED:
        expect(analyst.locator("#review-propose-link")).to_have_attribute(
            "href", re.compile(rf"sample={re.escape(sample)}"))
    analyst.click("#review-propose-link")
    analyst.wait_for_url("**/review/propose?**")
    assert all(f"sample={s}" in analyst.url for s in PLANTED), analyst.url
    preview = analyst.locator("#propose-preview")
    expect(preview).to_contain_text("Principal angles", timeout=60_000)
    expect(preview).to_contain_text("Explained, PC1")
    # Submitting without a category or a reason: each problem in words, beside its own field.
    analyst.click("#propose-submit")
    category_message = analyst.locator("#propose-category-message")
    expect(category_message).to_contain_text("Choose a reason category")
    assert "reason_category" not in category_message.inner_text() and "None" not in category_message.inner_text()
    expect(analyst.locator("#propose-message")).to_be_empty()
    analyst.locator("#propose-category").click()
    analyst.get_by_text("measurement error", exact=True).click()
    analyst.click("#propose-submit")
    expect(analyst.locator("#propose-reason-message")).to_contain_text("The reason is required")
    expect(category_message).to_be_empty()
    analyst.fill("#propose-reason", "Both batches sit far above the SPE limit; lab records show a faulty "
                                    "assay run and a dissolution bath fault.")
    analyst.screenshot(path=str(SCREENSHOTS / "review-propose.png"), full_page=True)
    analyst.click("#propose-submit")
    message = analyst.locator("#propose-message")
    expect(message).to_contain_text("is waiting for a reviewer")
    proposal_id = int(re.search(r"Proposal (\d+)", message.inner_text()).group(1))

    reviewer = new_page()
    sign_in(reviewer, demo_server, "rowan", path="/review")
    reviewer.wait_for_url(demo_server.url + "/review")
    queue = reviewer.locator("#review-queue")
    expect(queue).to_contain_text("B26-042")
    expect(queue).to_contain_text(PRINTED["ana"])
    reviewer.goto(demo_server.url + url_state.proposal_url(proposal_id))
    expect(reviewer.locator("#review-detail")).to_contain_text("measurement error")
    reviewer.fill("#review-comment", "Checked the lab records; both runs were faulty.")
    reviewer.fill("#review-password", "not the password")
    reviewer.click("#review-approve")
    expect(reviewer.locator("#review-message")).to_contain_text("password is not correct")
    reviewer.fill("#review-password", demo_server.users["rowan"][1])
    reviewer.click("#review-approve")
    expect(reviewer.locator("#review-message")).to_contain_text(f"Signed as {PRINTED['rowan']}")
    expect(reviewer.locator("#review-detail")).to_contain_text(f"Printed name: {PRINTED['rowan']}")
    reviewer.screenshot(path=str(SCREENSHOTS / "review-sign.png"), full_page=True)

    # The analyst's own context: the log shows both people, their actions and UTC times.
    analyst.goto(demo_server.url + url_state.review_log_url(dataset_id))
    table = analyst.locator("#log-table")
    expect(table).to_contain_text(PRINTED["ana"])
    expect(table).to_contain_text(PRINTED["rowan"])
    expect(table).to_contain_text("propose")
    expect(table).to_contain_text("approve")
    expect(table).to_contain_text("sign_failed")
    rows = table.locator("tbody tr")
    # The demo's monitoring entries (reference model, weekly batches) and other browser tests share
    # the lab log, so only this test's three entries are certain.
    assert rows.count() >= 3
    for i in range(rows.count()):
        assert re.match(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d", rows.nth(i).locator("td").nth(1).inner_text())
    expect(analyst.locator("#log-verify")).to_contain_text("intact")
    analyst.screenshot(path=str(SCREENSHOTS / "review-log.png"), full_page=True)

    # The dataset's current model now leaves the approved batches out by default.
    analyst.goto(demo_server.url + url_state.dataset_url(dataset_id, url_state.ViewState(components=3)))
    expect(analyst.locator(f"#{ids.SETTINGS_EXCLUDED}")).to_contain_text(
        "(2): B26-042, B26-070", timeout=60_000)

    report = new_page()
    sign_in(report, demo_server, "vic", path=url_state.signoff_report_url(dataset_id, proposal_id))
    expect(report.locator("body")).to_contain_text(f"Printed name: {PRINTED['rowan']}")
    expect(report.locator("body")).to_contain_text("Meaning: approved")
    report.screenshot(path=str(SCREENSHOTS / "signoff-report.png"), full_page=True)


def test_saved_view_opens_for_another_user_with_the_same_model(demo_server, new_page):
    analyst, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    state = url_state.ViewState(components=3, colour="Line", tab="scores")
    analyst.goto(demo_server.url + url_state.save_view_url(dataset_id, state, ["B26-054"]))
    analyst.fill("#view-save-title", "Line B apart on the rheology component")
    analyst.fill("#view-save-note", "B26-054 is labelled Line A but sits with Line B.")
    analyst.click("#view-save-button")
    message = analyst.locator("#view-save-message")
    expect(message).to_contain_text("Saved. Link to share")
    link = message.locator("a").get_attribute("href")
    assert re.fullmatch(rf"{re.escape(demo_server.url)}/views/[A-Za-z0-9_-]{{16}}", link)

    viewer = new_page()
    sign_in(viewer, demo_server, "vic", path=link.removeprefix(demo_server.url))
    page = viewer.locator("#view-open")
    expect(page).to_contain_text("Line B apart on the rheology component", timeout=60_000)
    expect(page).to_contain_text("Same model as saved")
    expect(page).to_contain_text(f"Saved by {PRINTED['ana']}")
    expect(page).to_contain_text("Selected: B26-054")
    viewer.screenshot(path=str(SCREENSHOTS / "saved-view.png"), full_page=True)
    viewer.goto(demo_server.url + url_state.views_url(dataset_id))
    expect(viewer.locator("#views-list")).to_contain_text("Line B apart on the rheology component")
