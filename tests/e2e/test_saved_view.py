"""End to end in headless Chromium: an analyst box-selects samples on the score plot and
saves the view; a viewer opens the shared link in another browser context, goes on to the
dataset page and sees the same model (fingerprint) and the same selection listed.

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

    viewer = new_page()
    sign_in(viewer, demo_server, "vic", path=link)
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
