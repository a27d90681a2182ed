"""End to end in headless Chromium: an analyst box-selects samples on the score plot and
saves the view; a viewer opens the shared link in another browser context, goes on to the
dataset page and sees the same model (fingerprint) and the same selection listed.
After an exclusion is approved, the shared link still shows the saved numbers on the
dataset page itself, and the current state is one click away, labelled as different.

Data: the invented lab demo (docs/scenarios.md). Which samples the box catches does not
matter; the check is that the viewer sees exactly the analyst's.
"""

from __future__ import annotations

import re

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, analyst_on_lab_demo, box_select_right_of_scores, sign_in
from webapp import url_state
from webapp.web.ui import ids

FIT_WAIT = 90_000
# how many points the score plot draws as selected, and how many of its SVG points are dimmed
SELECTED_POINTS = (f"() => document.querySelector('#{ids.GRAPH_SCORES} .js-plotly-plot')._fullData"
                   ".reduce((n, t) => n + (Array.isArray(t.selectedpoints) ? t.selectedpoints.length : 0), 0)")
DIMMED = "points => points.filter(p => parseFloat(getComputedStyle(p).opacity) < 0.5).length"


def _fingerprint_shown(page) -> str:
    """The 10-character model fingerprint the fit line names ("..., model 0123abcdef, ...")."""
    source = page.locator(f"#{ids.FIT_SOURCE}")
    expect(source).to_contain_text("Showing 3 components", timeout=FIT_WAIT)
    return re.search(r"model ([0-9a-f]{10})", source.inner_text()).group(1)


def test_saved_view_restores_the_selection_for_another_user(demo_server, new_page):
    analyst, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    state = url_state.ViewState(components=3, colour="Line", tab="scores")
    analyst.goto(demo_server.url + url_state.dataset_url(dataset_id, state))
    fingerprint = _fingerprint_shown(analyst)

    box_select_right_of_scores(analyst, FIT_WAIT)
    panel = analyst.locator(f"#{ids.SELECTION_PANEL}")
    expect(panel).to_contain_text("selected")
    count = int(re.search(r"(\d+) samples? selected", panel.inner_text()).group(1))
    assert 0 < count < 150
    selected_text = panel.locator(".ld-selection-ids").inner_text()
    first_id = selected_text.split(",")[0].strip()
    save_link = analyst.locator(f"#{ids.VIEW_SAVE_LINK}")
    expect(save_link).to_have_attribute("href", re.compile(rf"sel={re.escape(first_id)}"))
    save_link.click()
    analyst.wait_for_url("**/views?**")
    analyst.fill(f"#{ids.VIEW_SAVE_TITLE}", "Right-hand cluster on PC1")
    analyst.fill(f"#{ids.VIEW_SAVE_NOTE}", "Batches picked with a box on the score plot.")
    analyst.click(f"#{ids.VIEW_SAVE_BUTTON}")
    message = analyst.locator(f"#{ids.VIEW_SAVE_MESSAGE}")
    expect(message).to_contain_text("Saved. Link to share")
    link = message.locator("a").get_attribute("href")
    assert link.startswith(demo_server.url + "/views/")  # the full address, ready to paste

    viewer = new_page()
    sign_in(viewer, demo_server, "vic", path=link.removeprefix(demo_server.url))
    opened = viewer.locator(f"#{ids.VIEW_OPEN}")
    expect(opened).to_contain_text("Same model as saved", timeout=FIT_WAIT)
    expect(opened).to_contain_text(f"fingerprint {fingerprint}")
    expect(opened).to_contain_text(f"Selected: {first_id}")
    viewer.get_by_role("link", name="Open on the dataset page").click()
    viewer.wait_for_url(re.compile(rf".*/datasets/{dataset_id}\?.*view="))
    assert _fingerprint_shown(viewer) == fingerprint
    viewer_panel = viewer.locator(f"#{ids.SELECTION_PANEL}")
    expect(viewer_panel).to_contain_text(f"{count} sample{'s' if count != 1 else ''} selected")
    expect(viewer_panel.locator(".ld-selection-ids")).to_have_text(selected_text)
    # the score plot draws the same samples as selected (plotly's selectedpoints), the rest dimmed
    viewer.wait_for_function(SELECTED_POINTS + f" === {count}", timeout=FIT_WAIT)
    assert viewer.locator(f"#{ids.GRAPH_SCORES} .scatterlayer .point").evaluate_all(DIMMED) > 0
    viewer.screenshot(path=str(SCREENSHOTS / "saved-view-dataset.png"), full_page=True)
    viewer_panel.get_by_role("button", name="Clear").click()
    viewer.wait_for_function(SELECTED_POINTS + " === 0")
    viewer.wait_for_function(f"() => !document.querySelector('#{ids.GRAPH_SCORES} .js-plotly-plot')"
                             "._fullData.some(t => Array.isArray(t.selectedpoints))")

    # A reviewer given the dataset-page address: the address still names the view, so the
    # same selection is listed and the proposal link carries it.
    reviewer = new_page()
    sign_in(reviewer, demo_server, "rowan", path=viewer.url.removeprefix(demo_server.url))
    expect(reviewer.locator(f"#{ids.SELECTION_PANEL} .ld-selection-ids")).to_have_text(selected_text,
                                                                                       timeout=FIT_WAIT)
    expect(reviewer.locator(f"#{ids.REVIEW_PROPOSE_LINK}")).to_have_attribute(
        "href", re.compile(rf"sample={re.escape(first_id)}"))


# ------------------------------- the shared link keeps its word after an approval
def _samples_csv(page, tmp_path, name: str) -> bytes:
    """The page's "Samples: T², SPE, flags" table, downloaded as CSV (full precision)."""
    with page.expect_download() as info:
        page.click(f"#{ids.DOWNLOAD_CSV}")
    path = tmp_path / name
    info.value.save_as(path)
    return path.read_bytes()


def _outlier_ids(page) -> list[str]:
    grid = page.locator(f"#{ids.OUTLIER_GRID}")
    expect(grid.locator(".ag-row").first).to_be_visible(timeout=FIT_WAIT)
    pinned = grid.locator(".ag-pinned-left-cols-container .ag-row")
    return [pinned.nth(i).inner_text().strip() for i in range(pinned.count())]


def _explained_stats(page, sample_id: str) -> str:
    """The explanation panel's "T² ... (limit ...) · SPE ..." line for ``sample_id``."""
    expect(page.locator(f"#{ids.EXPLAIN_PANEL} .ld-sample-id")).to_have_text(sample_id, timeout=FIT_WAIT)
    stats = page.locator(f"#{ids.EXPLAIN_PANEL} .ld-stats")
    expect(stats).to_contain_text("T² ")
    return stats.inner_text()


def _api_post(page, server, path: str, body: dict) -> dict:
    """A JSON API call with the page's own sign-in (its cookies)."""
    response = page.request.post(server.url + path, data=body)
    assert response.ok, response.text()
    return response.json()


def _approve(author, signer, server, dataset_id: int, sample_id: str, action: str) -> None:
    """``author`` proposes excluding (or reinstating) a sample; ``signer``, signed in as the
    demo reviewer ``rowan``, approves it with that password."""
    proposal = _api_post(author, server, f"/api/v1/datasets/{dataset_id}/exclusions", {
        "samples": [sample_id], "action": action, "reason_category": "measurement error",
        "reason": "invented test case: the bench log notes a balance fault"})["proposal"]
    _api_post(signer, server, f"/api/v1/exclusions/{proposal['id']}/approve",
              {"password": server.users["rowan"][1], "comment": "checked the raw record"})


def test_shared_link_shows_the_saved_numbers_on_the_dataset_page_after_an_approval(demo_server, new_page, tmp_path):
    analyst, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    state = url_state.ViewState(components=3, tab="outliers")
    analyst.goto(demo_server.url + url_state.dataset_url(dataset_id, state))
    fingerprint = _fingerprint_shown(analyst)
    flagged = _outlier_ids(analyst)
    assert len(flagged) >= 2
    left_out_later, explained = flagged[0], flagged[1]
    # open the explanation of the second most extreme sample: it is part of the saved view
    analyst.locator(f"#{ids.OUTLIER_GRID} .ag-center-cols-container .ag-row[row-index='1'] .ag-cell").first.click()
    stats_at_save = _explained_stats(analyst, explained)
    analyst.wait_for_url(re.compile(rf".*sample={re.escape(explained)}"))
    csv_at_save = _samples_csv(analyst, tmp_path, "at-save.csv")

    analyst.click(f"#{ids.VIEW_SAVE_LINK}")
    analyst.wait_for_url("**/views?**")
    title = f"Outliers before excluding {left_out_later}"
    analyst.fill(f"#{ids.VIEW_SAVE_TITLE}", title)
    analyst.click(f"#{ids.VIEW_SAVE_BUTTON}")
    message = analyst.locator(f"#{ids.VIEW_SAVE_MESSAGE}")
    expect(message).to_contain_text("Saved. Link to share")
    link = analyst.locator(f"#{ids.VIEW_SAVE_URL}")
    address = link.inner_text()
    assert re.fullmatch(rf"{re.escape(demo_server.url)}/views/[A-Za-z0-9_-]{{16}}", address)
    assert link.get_attribute("href") == address
    # the list below the form shows the new view at once, no reload
    expect(analyst.locator(f"#{ids.VIEWS_LIST}")).to_contain_text(title)
    # the copy button puts the full address on the clipboard; a real button, so the keyboard works it
    analyst.context.grant_permissions(["clipboard-read", "clipboard-write"], origin=demo_server.url)
    copy = message.get_by_role("button", name="Copy link")
    expect(copy).to_have_attribute("id", ids.VIEW_SAVE_COPY)
    copy.focus()
    analyst.keyboard.press("Enter")
    expect(analyst.locator(f"#{ids.VIEW_SAVE_COPY}")).to_have_text("Copied")
    analyst.wait_for_function("address => navigator.clipboard.readText().then(t => t === address)", arg=address)

    reviewer = new_page()
    sign_in(reviewer, demo_server, "rowan")
    reviewer.wait_for_url(demo_server.url + "/")
    _approve(analyst, reviewer, demo_server, dataset_id, left_out_later, "exclude")
    try:
        viewer = new_page()
        sign_in(viewer, demo_server, "vic", path=address.removeprefix(demo_server.url))
        opened = viewer.locator(f"#{ids.VIEW_OPEN}")
        expect(opened).to_contain_text("Same model as saved", timeout=FIT_WAIT)
        expect(opened).to_contain_text("Approved exclusions changed since this view was saved: "
                                       f"1 more sample excluded ({left_out_later}).")
        viewer.get_by_role("link", name="Open on the dataset page").click()
        viewer.wait_for_url(re.compile(rf".*/datasets/{dataset_id}\?.*view="))

        # the full dataset page, with the saved numbers: same fingerprint, same table to the digit
        assert _fingerprint_shown(viewer) == fingerprint
        banner = viewer.locator(f"#{ids.VIEW_BANNER}")
        expect(banner).to_contain_text(f"“{title}”")
        expect(banner).to_contain_text("the model as saved (same fingerprint, so the same numbers)")
        expect(banner).to_contain_text("Approved exclusions changed since this view was saved: "
                                       f"1 more sample excluded ({left_out_later}).")
        assert _outlier_ids(viewer) == flagged
        assert _explained_stats(viewer, explained) == stats_at_save
        assert _samples_csv(viewer, tmp_path, "as-saved.csv") == csv_at_save
        viewer.screenshot(path=str(SCREENSHOTS / "saved-view-as-saved.png"), full_page=True)

        # the current state is one click away, and says how it differs
        banner.get_by_role("link", name="Open the current state (a different model)").click()
        source = viewer.locator(f"#{ids.FIT_SOURCE}")
        expect(source).not_to_contain_text(f"model {fingerprint}", timeout=FIT_WAIT)
        assert _fingerprint_shown(viewer) != fingerprint
        expect(banner).to_contain_text("not the model saved in it", timeout=FIT_WAIT)
        expect(banner).to_contain_text(f"Approved exclusions changed since this view was saved: "
                                       f"1 more sample excluded ({left_out_later}).")
        expect(viewer.locator(f"#{ids.SETTINGS_EXCLUDED}")).to_contain_text(left_out_later)
        expect(viewer.locator(f"#{ids.OUTLIER_GRID} .ag-pinned-left-cols-container")).not_to_contain_text(
            left_out_later)
        assert _samples_csv(viewer, tmp_path, "current.csv") != csv_at_save
        expect(banner.get_by_role("link", name="Back to the view as saved")).to_be_visible()
    finally:
        # leave the shared demo as it was for the other browser tests
        _approve(analyst, reviewer, demo_server, dataset_id, left_out_later, "reinstate")
