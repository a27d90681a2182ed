"""End to end in headless Chromium: the weekly monitoring cycle as three people do it.

The analyst makes the lab demo's fitted model a reference model from the dataset page, a
reviewer approves it with the re-entered password, the analyst checks a new batch with a
planted fault (ten invented lab rows, one assay result shifted 8 points low, written here from
``demo_data.lab_scenario``), sees the flag on the continuing chart and opens the batch; the
reviewer records the outcome and the batch shows *reviewed*.
Screenshots: see SCREENSHOTS in tests/e2e/conftest.py.
"""

from __future__ import annotations

import io
import re

import pandas as pd
from playwright.sync_api import expect

from tests.e2e.conftest import SCREENSHOTS, analyst_on_lab_demo, sign_in
from webapp import url_state
from webapp.cli.serve import DEMO_USERS
from webapp.services.demo_data import lab_scenario
from webapp.web.ui import ids

PRINTED = {name: printed for name, _role, printed in DEMO_USERS}
PLANTED = "E2E-05"
NAME = "Granulate assays, browser check"


def _batch_csv() -> bytes:
    """Ten rows of the lab data as new samples E2E-01..E2E-10; E2E-05's assay 8 points low."""
    _, raw = lab_scenario()
    frame = pd.read_csv(io.BytesIO(raw), dtype=str, keep_default_na=False).iloc[20:30].reset_index(drop=True)
    frame["Batch"] = [f"E2E-{i:02d}" for i in range(1, 11)]
    planted = frame.index[frame["Batch"] == PLANTED][0]
    frame.loc[planted, "Assay (%)"] = f"{float(frame.loc[planted, 'Assay (%)']) - 8:.1f}"
    return frame.to_csv(index=False).encode("utf-8")


def test_reference_model_batch_flag_and_outcome(demo_server, new_page):
    analyst, dataset_id = analyst_on_lab_demo(new_page, demo_server)
    analyst.goto(demo_server.url + url_state.dataset_url(dataset_id, url_state.ViewState(components=3)))
    link = analyst.locator(f"#{ids.MON_REFERENCE_LINK}")
    expect(link).to_have_attribute("href", re.compile(r"/monitoring\?model=\d+"), timeout=90_000)
    link.click()
    analyst.wait_for_url("**/monitoring?model=*")
    expect(analyst.locator(f"#{ids.MON_PROPOSE_MODEL}")).not_to_have_value("")
    analyst.fill(f"#{ids.MON_PROPOSE_NAME}", NAME)
    analyst.fill(f"#{ids.MON_PROPOSE_NOTE}", "Three components; checked in the browser test.")
    analyst.click(f"#{ids.MON_PROPOSE_SUBMIT}")
    message = analyst.locator(f"#{ids.MON_PROPOSE_MESSAGE}")
    expect(message).to_contain_text("waits for a reviewer")
    model_href = message.locator("a").get_attribute("href")
    reference_model_id = int(re.search(r"/monitoring/(\d+)", model_href).group(1))
    expect(analyst.locator(f"#{ids.MON_LIST}")).to_contain_text(NAME)

    reviewer = new_page()
    sign_in(reviewer, demo_server, "rowan", path=url_state.reference_model_url(reference_model_id))
    facts = reviewer.locator(f"#{ids.MON_FACTS}")
    expect(facts).to_contain_text("State: proposed")
    expect(facts).to_contain_text("Assay (%)")
    reviewer.fill(f"#{ids.MON_SIGN_COMMENT}", "Limits and variables checked.")
    reviewer.fill(f"#{ids.MON_SIGN_PASSWORD}", "not the password")
    reviewer.click(f"#{ids.MON_APPROVE}")
    expect(reviewer.locator(f"#{ids.MON_SIGN_MESSAGE}")).to_contain_text("password")
    reviewer.fill(f"#{ids.MON_SIGN_PASSWORD}", demo_server.users["rowan"][1])
    reviewer.click(f"#{ids.MON_APPROVE}")
    expect(reviewer.locator(f"#{ids.MON_SIGN_MESSAGE}")).to_contain_text(f"Signed as {PRINTED['rowan']}")
    expect(facts).to_contain_text("State: approved")

    analyst.goto(demo_server.url + url_state.reference_model_url(reference_model_id))
    analyst.locator(f"#{ids.MON_UPLOAD} input[type=file]").set_input_files(
        files=[{"name": "week-e2e.csv", "mimeType": "text/csv", "buffer": _batch_csv()}])
    upload_message = analyst.locator(f"#{ids.MON_UPLOAD_MESSAGE}")
    expect(upload_message).to_contain_text("checked: 10 samples", timeout=60_000)
    expect(analyst.locator(f"#{ids.MON_VIOLATIONS}")).to_contain_text(PLANTED)
    chart = analyst.locator(f"#{ids.MON_CHART}")
    expect(chart).to_contain_text("Flagged (action limit or run rule)", timeout=30_000)
    analyst.locator(f"#{ids.MON_CHART_STATISTIC}").get_by_label("SPE", exact=True).check()
    expect(chart).to_contain_text("SPE (Q residual)")
    analyst.screenshot(path=str(SCREENSHOTS / "monitoring-chart.png"), full_page=True)
    upload_message.get_by_role("link", name="Open the batch").click()
    analyst.wait_for_url("**/monitoring/batches/*")
    batch_id = int(re.search(r"/monitoring/batches/(\d+)", analyst.url).group(1))
    expect(analyst.locator(f"#{ids.MON_SAMPLES}")).to_contain_text("FLAGGED: SPE beyond the action limit")
    expect(analyst.locator(f"#{ids.MON_BATCH_STATE}")).to_contain_text("State: open")
    expect(analyst.locator(f"#{ids.MON_CONTRIBUTIONS}")).to_contain_text("Assay (%)", timeout=30_000)
    analyst.screenshot(path=str(SCREENSHOTS / "monitoring-batch.png"), full_page=True)

    signer = new_page()
    sign_in(signer, demo_server, "sage", path=url_state.batch_url(batch_id))
    expect(signer.locator(f"#{ids.MON_BATCH_STATE}")).to_contain_text("State: open")
    state_text = signer.locator(f"#{ids.MON_BATCH_STATE}").inner_text()
    waiting = re.search(r"need an outcome: (.*)\)", state_text).group(1).split(", ")
    assert PLANTED in waiting
    expect(signer.locator(f"#{ids.MON_CONTRIBUTIONS}")).to_contain_text("Assay (%)", timeout=30_000)
    for sample in waiting:
        signer.locator(f"#{ids.MON_OUTCOME_SAMPLES}").get_by_label(sample, exact=True).check()
    signer.get_by_label("Assignable cause found (name the cause)").check()
    signer.fill(f"#{ids.MON_OUTCOME_REASON}", "Re-preparation of the sample gave a normal assay.")
    signer.fill(f"#{ids.MON_OUTCOME_CAUSE}", "Sample preparation error (dilution).")
    signer.fill(f"#{ids.MON_OUTCOME_PASSWORD}", demo_server.users["sage"][1])
    signer.click(f"#{ids.MON_OUTCOME_SUBMIT}")
    expect(signer.locator(f"#{ids.MON_OUTCOME_MESSAGE}")).to_contain_text(f"Outcome signed as {PRINTED['sage']}")
    expect(signer.locator(f"#{ids.MON_BATCH_STATE}")).to_contain_text("State: reviewed")
    expect(signer.locator(f"#{ids.MON_SAMPLES}")).to_contain_text("assignable cause found")
    signer.screenshot(path=str(SCREENSHOTS / "monitoring-outcome.png"), full_page=True)

    analyst.goto(demo_server.url + url_state.reference_model_url(reference_model_id))
    expect(analyst.locator(f"#{ids.MON_BATCHES}")).to_contain_text("reviewed")
