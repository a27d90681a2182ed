"""End to end in headless Chromium: from the lab demo to "these batches are out, because of these variables".

Sign in, open the lab demo dataset, fit, colour by a group, click an outlier and read
its explanation, box-select, download CSV, reload and go back (the URL holds the view),
and check the upload page's intake report. Screenshots at 1280x800 and at a narrow
width are saved for the user guide (docs/images/ with LATENTDESK_DOC_IMAGES=1).
"""

from __future__ import annotations

import csv
import io
import re
from urllib.parse import parse_qs, urlsplit

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, box_select_right_of_scores, sign_in
from webapp.services.demo_data import LAB_FILENAME, lab_scenario

FIT_WAIT = 60_000


def _query(page) -> dict:
    return parse_qs(urlsplit(page.url).query)


def _tab(page, name: str):
    page.locator(".ld-tab", has_text=name).click()


def _open_lab(page, server):
    sign_in(page, server, "ana")
    page.wait_for_url(server.url + "/")
    page.locator("#home-dataset-list a", has_text=LAB_FILENAME).click()
    page.wait_for_url(re.compile(r"/datasets/\d+"))
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)


def _choose(page, dropdown_id: str, option: str):
    page.locator(f"#{dropdown_id}").click()
    # Dash 4 dropdowns open their list in a popover outside the component; each option is a
    # labelled radio button (assets/a11y.js gives the list radiogroup semantics)
    page.locator(".dash-dropdown-content .dash-options-list-option").filter(
        has_text=re.compile(rf"^\s*{re.escape(option)}\s*$")).click()
    page.keyboard.press("Escape")


def _centre(locator):
    box = locator.bounding_box()
    return box["x"] + box["width"] / 2, box["y"] + box["height"] / 2


def test_lab_demo_from_fit_to_explained_outliers(demo_server, new_page, tmp_path):
    page = new_page(1280, 800)
    _open_lab(page, demo_server)
    expect(page.locator("#fit-source")).to_contain_text("Showing")
    expect(page.locator("#settings-recommendation")).to_contain_text("Recommended:")

    # fit with an explicit number of components (the recommendation here is 3: ask for 4)
    _choose(page, "settings-components", "4")
    page.click("#settings-fit")
    page.wait_for_url(re.compile(r"[?&]a=4(&|$)"))
    expect(page.locator("#fit-source")).to_contain_text("Showing 4 components", timeout=FIT_WAIT)
    expect(page.locator("#fit-source")).to_contain_text("fitted in")

    # colour by a group: one legend entry per line, Okabe-Ito colours
    _choose(page, "view-colour", "Line")
    expect(page.locator("#graph-scores .legend")).to_contain_text("Line A")
    expect(page.locator("#graph-scores .legend")).to_contain_text("Line C")
    assert _query(page).get("colour") == ["Line"]
    page.wait_for_timeout(500)
    page.screenshot(path=str(SCREENSHOTS / "explore-scores.png"))

    # click the sample beyond both limits in the diagnostics plot and read why
    _tab(page, "Diagnostics")
    page.wait_for_selector("#graph-t2-spe .scatterlayer .point", timeout=FIT_WAIT)
    both = page.locator("#graph-t2-spe .scatterlayer .trace").filter(
        has=page.locator(".point")).last.locator(".point").first
    expect(page.locator("#graph-t2-spe .legend")).to_contain_text("high T² and SPE")
    page.mouse.click(*_centre(both))
    sentence = page.locator("#explain-panel .ld-sentence")
    expect(sentence).to_contain_text("mainly because of")
    expect(page.locator("#explain-panel .ld-stats")).to_contain_text("beyond both limits")
    picked = page.locator("#explain-panel .ld-sample-id").inner_text()
    assert _query(page).get("sample") == [picked]
    expect(page.locator("#graph-spe-contributions .bars path").first).to_be_visible()
    page.wait_for_timeout(400)
    page.screenshot(path=str(SCREENSHOTS / "explore-diagnostics.png"), full_page=True)

    # the outlier table lists it with its top variables; clicking a row explains that row
    _tab(page, "Outliers")
    grid = page.locator("#outlier-grid")
    expect(grid.locator(".ag-row").first).to_be_visible(timeout=FIT_WAIT)
    expect(grid).to_contain_text(picked)
    expect(page.locator("#outlier-note")).to_contain_text("samples are beyond the 95%")
    pinned = grid.locator(".ag-pinned-left-cols-container .ag-row")
    listed = [pinned.nth(i).inner_text().strip() for i in range(min(3, pinned.count()))]
    other = next(i for i, sid in enumerate(listed) if sid != picked)
    grid.locator(f".ag-center-cols-container .ag-row[row-index='{other}'] .ag-cell").first.click()
    expect(page.locator("#explain-panel .ld-sample-id")).to_have_text(listed[other])
    page.wait_for_timeout(400)
    page.screenshot(path=str(SCREENSHOTS / "explore-outliers.png"))

    # box-select on the score plot fills the selection panel
    _tab(page, "Scores")
    box_select_right_of_scores(page, FIT_WAIT)
    expect(page.locator("#selection-panel")).to_contain_text("selected")
    count = int(re.search(r"(\d+) samples? selected", page.locator("#selection-panel").inner_text()).group(1))
    assert 0 < count < 150

    # download the sample diagnostics as CSV: one row per batch, numbers stay numbers
    with page.expect_download() as info:
        page.click("#download-csv")
    path = tmp_path / "samples.csv"
    info.value.save_as(path)
    rows = list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))
    _, raw = lab_scenario()
    assert len(rows) == raw.decode("utf-8").count("\n") - 1
    assert {"sample_id", "T2", "SPE", "flags", "PC1"} <= set(rows[0])
    float(rows[0]["T2"])

    # reload: the URL holds the state; back: the previous tab returns
    state = _query(page)
    page.reload()
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    assert _query(page) == state
    expect(page.locator("#graph-scores .legend")).to_contain_text("Line A")
    page.go_back()
    expect(page.locator(".ld-tab-selected")).to_have_text("Outliers", timeout=FIT_WAIT)


def test_narrow_window_and_the_other_views(demo_server, new_page):
    page = new_page(1280, 800)
    _open_lab(page, demo_server)
    _tab(page, "Variance")
    page.wait_for_selector("#graph-variance .bars path", state="attached", timeout=FIT_WAIT)
    expect(page.locator("#rank-table")).to_contain_text("Recommended:")
    page.wait_for_timeout(400)
    page.screenshot(path=str(SCREENSHOTS / "explore-variance.png"), full_page=True)

    _tab(page, "Loadings")
    page.locator("#view-loadings label", has_text="biplot").click()
    expect(page.locator("#graph-loadings .gtitle")).to_contain_text("Biplot")
    page.wait_for_timeout(400)
    page.screenshot(path=str(SCREENSHOTS / "explore-biplot.png"))

    narrow = page
    narrow.set_viewport_size({"width": 420, "height": 860})
    narrow.goto(page.url.replace("tab=loadings", "tab=scores"))
    narrow.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    # nothing wider than the window: no horizontal scrolling on a phone-sized screen
    overflow = narrow.evaluate("document.documentElement.scrollWidth - window.innerWidth")
    assert overflow <= 1
    narrow.wait_for_timeout(400)
    narrow.screenshot(path=str(SCREENSHOTS / "explore-narrow.png"), full_page=True)


def test_upload_page_shows_the_intake_report_before_storing(demo_server, new_page, tmp_path):
    page = new_page(1280, 800)
    sign_in(page, demo_server, "ana", "/upload")
    page.wait_for_url(demo_server.url + "/upload")
    # invented measurements with ';' delimiter and ',' decimals, a below-limit value and a unit
    text = ("Sample;Site;Ca (mg/L);Mg (mg/L);Fe (mg/L)\n"
            "W-01;east;12,1;3,4;<0,05\nW-02;east;11,8;3,1;0,12\nW-03;west;13,0;3,9;0,09\n"
            "W-04;west;12,4;;0,11\nW-05;east;12,9;3,6;0,10\n")
    upload = tmp_path / "wells_e2e.csv"
    upload.write_text(text, encoding="utf-8")
    page.locator("#upload-drop input[type=file]").set_input_files(str(upload))
    report = page.locator("#upload-report")
    expect(report).to_contain_text("semicolon")
    expect(report).to_contain_text("Decimal mark")
    expect(report).to_contain_text("below a detection limit")
    expect(page.locator("#upload-roles")).to_contain_text("Fe (mg/L)")
    expect(page.locator("#upload-confirm")).to_be_enabled()
    page.screenshot(path=str(SCREENSHOTS / "upload-report.png"), full_page=True)

    bad = tmp_path / "bad_e2e.csv"
    bad.write_text("id,a,b\nx1,1,2\nx2,oops,3\nx3,2,2\n", encoding="utf-8")
    page.locator("#upload-drop input[type=file]").set_input_files(str(bad))
    expect(report.locator(".ld-alert")).to_contain_text("row")
    expect(report.locator(".ld-alert")).to_contain_text("'oops'")
    expect(page.locator("#upload-confirm")).to_be_disabled()

    page.locator("#upload-drop input[type=file]").set_input_files(str(upload))
    expect(page.locator("#upload-confirm")).to_be_enabled()
    page.click("#upload-confirm")
    page.wait_for_url(re.compile(r"/datasets/\d+"), timeout=FIT_WAIT)
    expect(page.locator(".ld-dataset-title")).to_have_text("wells_e2e.csv")
