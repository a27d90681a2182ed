"""The plot toolbars in headless Chromium: nothing leaves the site, pictures are named.

A self-hosted QA tool never offers to send a chart to an online service (plotly.js
reference, "Configuration Options": showSendToCloud, showEditInChartStudio); a saved
picture carries the dataset, the plot and its axes in its file name (common practice).
"""

from __future__ import annotations

from tests.e2e.conftest import analyst_on_lab_demo

FIT_WAIT = 60_000


def test_toolbars_offer_no_online_service_and_pictures_are_named(demo_server, new_page):
    page, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    page.goto(f"{demo_server.url}/datasets/{dataset_id}")
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    page.hover("#graph-scores .plot-container")
    buttons = page.locator("#graph-scores .modebar-btn")
    assert buttons.count() > 0  # the toolbar is there: zoom, pan, select
    titles = [buttons.nth(i).get_attribute("data-title") or "" for i in range(buttons.count())]
    assert not [t for t in titles if "cloud" in t.lower() or "chart studio" in t.lower()], titles

    with page.expect_download() as download:
        page.locator("#graph-scores").locator("xpath=..").get_by_role("button", name="PNG").click()
    assert download.value.suggested_filename == "demo_lab_batches-scores-PC1-PC2.png"
