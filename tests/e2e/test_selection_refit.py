"""A selection survives a trial refit, in headless Chromium.

The user guide promises it (docs/user-guide.md, "Select and leave out"): after
"Fit again without them" and "Put them back" the same samples stay selected,
so "Propose exclusion of the selection" is still offered.
"""

from __future__ import annotations

import re

from playwright.sync_api import expect

from tests.e2e.conftest import analyst_on_lab_demo, box_select_right_of_scores

FIT_WAIT = 60_000


def _selected_count(page) -> int:
    text = page.locator("#selection-panel .ld-strong").inner_text(timeout=FIT_WAIT)
    return int(re.match(r"(\d+) sample", text).group(1))


def test_selection_survives_leaving_out_and_putting_back(demo_server, new_page):
    page, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    page.goto(f"{demo_server.url}/datasets/{dataset_id}")
    box_select_right_of_scores(page, FIT_WAIT)
    expect(page.locator("#selection-panel .ld-strong")).to_contain_text("selected", timeout=FIT_WAIT)
    chosen = _selected_count(page)
    ids_before = page.locator("#selection-panel .ld-selection-ids").inner_text()
    propose = page.locator("#review-propose-link")
    expect(propose).to_be_visible()

    page.click("#selection-leave-out")
    expect(page.locator("#settings-include-all")).to_be_visible(timeout=FIT_WAIT)
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    page.wait_for_timeout(500)
    assert _selected_count(page) == chosen
    assert page.locator("#selection-panel .ld-selection-ids").inner_text() == ids_before
    expect(propose).to_be_visible()

    page.click("#settings-include-all")
    expect(page.locator("#settings-include-all")).to_be_hidden(timeout=FIT_WAIT)
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    page.wait_for_timeout(500)
    assert _selected_count(page) == chosen
    expect(propose).to_be_visible()
