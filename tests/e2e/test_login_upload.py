"""End to end in headless Chromium: sign in through the form, see the demo
datasets, upload a file, see a bad file refused with the intake's message,
sign out. Screenshots: see SCREENSHOTS in conftest."""

from __future__ import annotations

import re

from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, sign_in
from webapp.services.demo_data import LAB_FILENAME, SURVEY_FILENAME

# Invented measurements for the upload (made up for this test).
SMALL_CSV = (
    "sample,alpha,beta,gamma\n"
    "T-01,1.0,2.0,3.1\nT-02,1.2,2.1,2.9\nT-03,0.9,1.8,3.3\n"
    "T-04,1.1,2.2,3.0\nT-05,1.3,1.9,2.8\nT-06,0.8,2.0,3.2\n"
).encode()


def test_sign_in_see_demo_datasets_upload_and_sign_out(demo_server, new_page, tmp_path):
    page = new_page()
    sign_in(page, demo_server, "ana")
    page.wait_for_url(demo_server.url + "/")
    table = page.locator("#home-dataset-list")
    expect(table).to_contain_text(LAB_FILENAME)
    expect(table).to_contain_text(SURVEY_FILENAME)
    expect(page.locator(".ld-topbar")).to_contain_text("analyst")

    upload = tmp_path / "e2e_small.csv"
    upload.write_bytes(SMALL_CSV)
    page.locator("#home-upload input[type=file]").set_input_files(str(upload))
    expect(page.locator("#home-upload-message .ld-success")).to_contain_text("e2e_small.csv")
    expect(table).to_contain_text("e2e_small.csv")
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / "home.png"), full_page=True)

    empty = tmp_path / "empty.csv"
    empty.write_bytes(b"")
    page.locator("#home-upload input[type=file]").set_input_files(str(empty))
    expect(page.locator("#home-upload-message .ld-alert")).to_contain_text("empty.csv")
    expect(table).not_to_contain_text("empty.csv")

    page.click("text=Sign out")
    page.wait_for_url("**/-/login**")
    page.goto(demo_server.url + "/")
    expect(page).to_have_url(re.compile(r"/-/login\?next=/$"))


def test_sign_in_form_shows_a_refusal_and_keeps_next(demo_server, new_page):
    page = new_page()
    page.goto(demo_server.url + "/datasets/1")
    page.wait_for_url("**/-/login?next=/datasets/1")
    page.fill("#name", "vic")
    page.fill("#password", "not the password")
    page.click("button[type=submit]")
    expect(page.locator(".ld-alert")).to_contain_text("Unknown user name or wrong password")
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / "sign-in.png"))
    page.fill("#password", demo_server.users["vic"][1])
    page.click("button[type=submit]")
    page.wait_for_url(demo_server.url + "/datasets/1")


def test_viewer_sees_no_upload(demo_server, new_page):
    page = new_page()
    sign_in(page, demo_server, "vic")
    page.wait_for_url(demo_server.url + "/")
    expect(page.locator("#home-dataset-list")).to_contain_text(LAB_FILENAME)
    expect(page.locator("#home-upload")).to_have_count(0)


def test_user_text_is_shown_as_text_never_as_html(demo_server, new_page):
    """A file name and column names carrying markup appear literally (OWASP XSS
    Prevention Cheat Sheet: output encoding; common practice)."""
    page = new_page()
    dialogs = []
    page.on("dialog", lambda dialog: (dialogs.append(dialog.message), dialog.dismiss()))
    sign_in(page, demo_server, "ana")
    page.wait_for_url(demo_server.url + "/")
    payload = '<img src=x onerror="alert(1)">'
    page.locator("#home-upload input[type=file]").set_input_files(
        files=[{"name": f"{payload}.csv", "mimeType": "text/csv",
                "buffer": SMALL_CSV.replace(b"gamma", b"<i>gamma</i>")}]
    )
    expect(page.locator("#home-upload-message .ld-success")).to_contain_text(payload)
    expect(page.locator("#home-dataset-list")).to_contain_text(payload)
    assert page.locator("img[src=x]").count() == 0
    assert dialogs == []
