"""End to end in headless Chromium: choose the robust fit on the dataset page, then read the
outlier map and the lists of samples only one method flags.

Data: the invented lab demo (docs/scenarios.md); its 15 samples with a missing value are left out
of the robust fit. Which samples each fit flags is checked by the service tests
(tests/webapp/test_robust_fit.py, a planted masked group); here the check is that the choice
reaches the fit, the address, the outlier map and the side-by-side panel. (Not named
test_robust_fit.py: pytest imports tests/webapp and tests/e2e by basename, and two files of one
name collide.)
"""

from __future__ import annotations

import re

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, analyst_on_lab_demo
from webapp import url_state
from webapp.web.ui import ids

FIT_WAIT = 90_000


def _choose(page, dropdown_id: str, option: str):
    page.locator(f"#{dropdown_id}").click()
    # Dash 4 dropdowns open their list in a popover outside the component (as in test_explore)
    page.locator(".dash-dropdown-content .dash-options-list-option").filter(
        has_text=re.compile(rf"^\s*{re.escape(option)}\s*$")).click()
    page.keyboard.press("Escape")


def test_choose_robust_and_see_the_outlier_map_and_the_side_by_side_list(demo_server, new_page):
    page, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    page.goto(demo_server.url + url_state.dataset_url(dataset_id, url_state.ViewState(components=3)))
    source = page.locator(f"#{ids.FIT_SOURCE}")
    expect(source).to_contain_text("Showing 3 components", timeout=FIT_WAIT)
    classical = re.search(r"model ([0-9a-f]{10})", source.inner_text()).group(1)

    _choose(page, ids.SETTINGS_METHOD, "Robust PCA (ROBPCA)")
    page.click(f"#{ids.SETTINGS_FIT}")
    page.wait_for_url(re.compile(r"[?&]method=robust(&|$)"))
    expect(source).not_to_contain_text(classical, timeout=FIT_WAIT)  # another model: the method is in its fingerprint
    expect(source).to_contain_text("Showing 3 components", timeout=FIT_WAIT)

    page.locator(".ld-tab", has_text="Outliers").click()
    page.wait_for_selector(f"#{ids.GRAPH_OUTLIER_MAP} .scatterlayer .point", timeout=FIT_WAIT)
    expect(page.locator(f"#{ids.GRAPH_OUTLIER_MAP} .gtitle")).to_have_text("Outlier map of the robust fit (ROBPCA)")
    expect(page.locator(f"#{ids.GRAPH_OUTLIER_MAP}")).to_contain_text("score distance cut-off 95%")
    panel = page.locator(f"#{ids.METHOD_SIDE_BY_SIDE}")
    expect(panel).to_contain_text("Flagged by the robust fit only", timeout=FIT_WAIT)
    expect(panel).to_contain_text("Flagged by the classical fit only")
    expect(panel).to_contain_text("h = ")
    expect(page.locator(f"#{ids.OUTLIER_NOTE}")).to_contain_text("Robust fit:")

    # "Show the numbers" lists the map's points and both cut-off lines as text
    figure = page.locator("[role=figure][aria-label^='Outlier map']")
    figure.get_by_role("button", name="Show the numbers").click()
    numbers = page.locator(f"#{ids.plot_numbers(ids.GRAPH_OUTLIER_MAP)}")
    expect(numbers).to_contain_text("orthogonal distance cut-off 95%")
    page.wait_for_timeout(400)
    page.screenshot(path=str(SCREENSHOTS / "robust-outliers.png"), full_page=True)

    # the robust-only samples go into the selection in one click, ready for a proposal citing both fits
    heading = panel.locator("h3", has_text="Flagged by the robust fit only").inner_text()
    count = int(re.search(r"\((\d+)\)", heading).group(1))
    select = panel.locator(f"#{ids.METHOD_SELECT_ROBUST_ONLY}")
    if count == 0:
        expect(select).to_be_disabled()
    else:
        select.click()
        expect(page.locator(f"#{ids.SELECTION_PANEL}")).to_contain_text(
            f"{count} sample{'s' if count != 1 else ''} selected")
