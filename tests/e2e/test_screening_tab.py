"""Respondent screening in the browser: the demo survey's straight-liners on the screening tab,
the flagged-only filter, and the proposal form opened with them and "careless response".

Demo design checks: the respondents expected are the ones planted in the invented survey
(``demo_data.planted_anomalies("survey")``); the cut-offs are those of analysis.screening
(long string: Curran 2016; IRV: Dunn et al. 2018; robust distance: Meade & Craig 2012).
Nothing is submitted, so the demo's records stay as the other browser tests expect them.
"""

from __future__ import annotations

import re
from urllib.parse import parse_qs, urlsplit

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, sign_in
from webapp import url_state
from webapp.services.demo_data import SURVEY_FILENAME, planted_anomalies
from webapp.url_state import ViewState
from webapp.web.ui import ids

WAIT = 60_000
STRAIGHT_LINERS = sorted(planted_anomalies("survey")["straight_liners"]["samples"])


def _survey_id(page, server) -> int:
    page.goto(server.url + url_state.home_url())
    href = page.get_by_role("link", name=SURVEY_FILENAME).get_attribute("href")
    return int(re.search(r"/datasets/(\d+)", href).group(1))


def test_screening_tab_finds_the_straight_liners_and_opens_the_proposal(demo_server, new_page):
    page = new_page()
    sign_in(page, demo_server, "ana")
    page.wait_for_url(demo_server.url + "/")
    dataset_id = _survey_id(page, demo_server)

    # open the dataset, then the tab by its button (the WAI-ARIA tab pattern of the page)
    page.goto(demo_server.url + url_state.dataset_url(dataset_id, ViewState(components=4)))
    tab = page.get_by_role("tab", name="Respondent screening")
    tab.click()
    expect(tab).to_have_attribute("aria-selected", "true")
    assert parse_qs(urlsplit(page.url).query)["tab"] == ["screening"]
    status = page.locator(f"#{ids.SCREENING_STATUS}")
    expect(status).to_contain_text("look like items on one scale", timeout=WAIT)
    expect(status).to_contain_text("of 320 respondents flagged")
    expect(page.locator(".ld-caution").first).to_contain_text("never replace, QA judgement and local procedures")
    expect(page.locator(f"#{ids.SCREENING_PLOT} .main-svg").first).to_be_attached(timeout=WAIT)

    # no filter: every respondent listed, no proposal offered
    note = page.locator(f"#{ids.SCREENING_NOTE}")
    expect(note).to_contain_text("320 respondent(s): all respondents")
    expect(page.locator(f"#{ids.SCREENING_PROPOSE}")).to_be_hidden()

    # flagged only: fewer rows, most flags first, the planted four on top
    page.get_by_label("flagged by at least one index").check()
    expect(note).to_contain_text("flagged by at least one index")
    flagged = int(re.match(r"(\d+) respondent", note.inner_text()).group(1))
    assert len(STRAIGHT_LINERS) <= flagged < 320
    grid = page.locator(f"#{ids.SCREENING_GRID}")
    expect(grid.locator(".ag-center-cols-container .ag-row").first).to_be_visible(timeout=WAIT)
    top = sorted(grid.locator(f".ag-pinned-left-cols-container .ag-row[row-index='{i}']").inner_text().strip()
                 for i in range(len(STRAIGHT_LINERS)))
    assert top == STRAIGHT_LINERS, top

    # two or more indices: exactly the straight-liners, and the link to propose them
    page.get_by_label("flagged by two or more indices").check()
    expect(note).to_contain_text(f"{len(STRAIGHT_LINERS)} respondent(s): flagged by two or more indices")
    expect(grid.locator(".ag-pinned-left-cols-container .ag-row")).to_have_count(len(STRAIGHT_LINERS), timeout=WAIT)
    link = page.locator(f"#{ids.SCREENING_PROPOSE}")
    expect(link).to_be_visible()
    expect(link).to_contain_text(f"{len(STRAIGHT_LINERS)} respondent(s) shown as careless response")
    page.screenshot(path=str(SCREENSHOTS / "screening-tab.png"), full_page=True)

    # the numbers behind the plot, one click away
    page.click(f"#{ids.plot_numbers_button(ids.SCREENING_PLOT)}")
    numbers = page.locator(f"#{ids.plot_numbers(ids.SCREENING_PLOT)} table")
    expect(numbers).to_contain_text("Longest run of identical answers", timeout=WAIT)
    expect(numbers).to_contain_text(STRAIGHT_LINERS[0])

    link.click()
    page.wait_for_url("**/review/propose?**")
    query = parse_qs(urlsplit(page.url).query)
    assert sorted(query["sample"]) == STRAIGHT_LINERS and query["category"] == ["careless response"]
    expect(page.locator("h1")).to_contain_text(f"Exclude {len(STRAIGHT_LINERS)} sample(s)")
    expect(page.locator(".ld-sample-list")).to_have_text(", ".join(query["sample"]))
    expect(page.locator(f"#{ids.PROPOSE_CATEGORY}")).to_contain_text("careless response")
    expect(page.locator(f"#{ids.PROPOSE_PREVIEW}")).to_contain_text("Principal angles", timeout=WAIT)
