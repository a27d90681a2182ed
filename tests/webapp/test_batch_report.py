"""The printable batch report (HTML and PDF): content, escaping, refusals.

Outside sources beside the checks:
- Data: the wine recognition data (Aeberhard, Coomans & de Vel 1992) shipped with scikit-learn, split
  as in test_batches (45 training samples of cultivar 1, the other 14 new); one new sample carries a
  planted single-variable fault.
- T² and SPE of the new samples: scikit-learn ``PCA`` on the autoscaled training data and numpy
  (Jackson 1991, A User's Guide to Principal Components, section 1.7).
- New-observation T² limit: NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3, and
  Tracy, Young & Mason (1992), F quantile from scipy.
- What a signature shows: US FDA 21 CFR Part 11, section 11.50 (printed name, date and time, meaning).
- HTML escaping: the HTML Living Standard, section 13.1.2 ("<" starts a tag); a hostile sample id must
  arrive as the text ``&lt;script&gt;``, never as a tag.
- PDF file header: ISO 32000-1:2008, section 7.5.2.
"""

from __future__ import annotations

import io
import re

import numpy as np
import pytest
from pypdf import PdfReader
from scipy import stats
from sklearn.decomposition import PCA
from test_batches import (
    COMPONENTS,
    N_TRAIN,
    UNITS,
    _ok,
    approved_reference_model,
    as_csv,
    held_out,
    training,
    upload_batch,
    variables,
)

from webapp.services import audit
from webapp.store import session_scope

HOSTILE = "<script>alert('id')</script>"
REASON = "<b>pipette</b> & <i>balance</i> checked: 2 × 10² µL"
CAUSE = "wrong dilution <img src=x onerror=alert(1)>"
CAUTION = ("Flags support, and never replace, QA judgement and site procedures; regulated use needs the "
           "site's own validation.")


@pytest.fixture
def team(app):
    from review_helpers import actor

    return {"viewer": actor(app, "viewer", "Vera Viewer"), "analyst": actor(app, "analyst", "Zoë Ångström"),
            "reviewer": actor(app, "reviewer", "Renée Müller")}


def faulty_batch():
    """The 14 new samples; the first renamed to a hostile id and given a large magnesium fault."""
    frame = held_out()
    frame.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)
    frame.loc[0, "sample"] = HOSTILE
    return frame


def expected_statistics(frame):
    """(T², SPE) of ``frame`` by scikit-learn and numpy on the autoscaled training data."""
    train = training()[variables()].to_numpy(float)
    mean, sd = train.mean(axis=0), train.std(axis=0, ddof=1)
    pca = PCA(n_components=COMPONENTS).fit((train - mean) / sd)
    z = (frame[variables()].to_numpy(float) - mean) / sd
    scores = pca.transform(z)
    return np.sum(scores**2 / pca.explained_variance_, axis=1), np.sum((z - scores @ pca.components_) ** 2, axis=1)


@pytest.fixture
def reviewed(client, team):
    """A reference model, a batch with the flagged hostile sample, an outcome signed and then corrected."""
    ref_id = approved_reference_model(client, team["analyst"], team["reviewer"])
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(faulty_batch(), UNITS), "week 7 <b>.csv"),
                201)["batch"]
    flagged = [s["sample"] for s in batch["samples"] if s["flagged"]]
    assert HOSTILE in flagged
    url = f"/api/v1/batches/{batch['id']}/outcomes"
    who = team["reviewer"]
    _ok(client.post(url, json={"samples": flagged, "outcome": "assignable_cause", "cause": CAUSE,
                               "reason": REASON, "password": who.password}, headers=who.headers))
    done = _ok(client.post(url, json={"samples": [HOSTILE], "outcome": "rejected", "reason": "re-test failed too",
                                      "password": who.password}, headers=who.headers))["batch"]
    reference = _ok(client.get(f"/api/v1/reference-models/{ref_id}", headers=team["viewer"].headers))
    return done, reference["reference_model"]


def _html(client, who, batch_id):
    response = client.get(f"/-/monitoring/batches/{batch_id}/report", headers=who.headers)
    assert response.status_code == 200, response.get_data(as_text=True)
    assert response.mimetype == "text/html" and response.headers["Cache-Control"] == "no-store"
    return response.get_data(as_text=True)


def _flat(text: str) -> str:
    return re.sub(r"\s+", "", text)


def test_html_report_carries_the_batch_record(app, client, team, reviewed):
    batch, model = reviewed
    page = _html(client, team["viewer"], batch["id"])
    for value in (model["name"], model["fingerprint"], model["document_sha256"], batch["file_sha256"]):
        assert value in page
    assert f"version {model['version']}" in page and "<td>approved</td>" in page
    assert "Zoë Ångström" in page and batch["created_at"] in page  # uploader and time
    assert "<strong>reviewed</strong>" in page
    # NIST/SEMATECH 6.5.4.3 new-observation T² limit at both levels, printed with four significant digits.
    n, a = N_TRAIN, COMPONENTS
    for level in (0.95, 0.99):
        limit = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(level, a, n - a)
        assert f"{limit:.4g}" in page
    t2, spe = expected_statistics(faulty_batch())
    for k in range(len(t2)):
        assert f"{t2[k]:.4g}" in page and f"{spe[k]:.4g}" in page
    assert "SPE beyond action" in page
    # 21 CFR 11.50: every outcome with printed name and UTC time; the correction keeps the first on record.
    hostile = next(s for s in batch["samples"] if s["sample"] == HOSTILE)
    assert [o["outcome_words"] for o in hostile["outcomes"]] == ["assignable cause found", "rejected"]
    for outcome in hostile["outcomes"]:
        assert f"Date and time (UTC): {outcome['signed_at']}" in page
    assert "Printed name: Renée Müller" in page and "superseded by a later outcome" in page
    with app.app_context(), session_scope() as s:
        head = audit.chain_head_summary(s)
    assert head["hash"] in page and f"entry {head['seq']}" in page
    assert CAUTION.replace("'", "&#39;") in page
    assert "Vera Viewer" in page  # printed by


def test_html_report_escapes_user_text(client, team, reviewed):
    batch, _ = reviewed
    page = _html(client, team["viewer"], batch["id"])
    assert "<script>" not in page and "<img" not in page and "<b>pipette" not in page
    assert "&lt;script&gt;alert(&#39;id&#39;)&lt;/script&gt;" in page
    assert "&lt;b&gt;pipette&lt;/b&gt; &amp; &lt;i&gt;balance&lt;/i&gt;" in page
    assert "&lt;img src=x onerror=alert(1)&gt;" in page
    assert "week 7 &lt;b&gt;.csv" in page


def test_pdf_report_parses_and_carries_the_numbers(client, team, reviewed):
    batch, model = reviewed
    response = client.get(f"/-/monitoring/batches/{batch['id']}/report.pdf", headers=team["viewer"].headers)
    assert response.status_code == 200 and response.mimetype == "application/pdf"
    assert f'filename="batch-report-{batch["id"]}.pdf"' in response.headers["Content-Disposition"]
    assert response.data.startswith(b"%PDF-")  # ISO 32000-1, 7.5.2
    reader = PdfReader(io.BytesIO(response.data))
    text = "\n".join(page.extract_text() for page in reader.pages)
    flat = _flat(text)
    for value in (model["fingerprint"], model["document_sha256"], batch["file_sha256"]):
        assert value in flat
    t2, spe = expected_statistics(faulty_batch())
    for k in range(len(t2)):
        assert f"{t2[k]:.4g}" in flat and f"{spe[k]:.4g}" in flat
    n, a = N_TRAIN, COMPONENTS
    limit = a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(0.99, a, n - a)
    assert f"{limit:.4g}" in flat
    # User text printed as typed (markup shown literally), names and UTC times of the signatures.
    assert _flat(HOSTILE) in flat and _flat(f"Reason: {REASON}") in flat and _flat(f"Cause: {CAUSE}") in flat
    assert "Printed name: Renée Müller" in text
    hostile = next(s for s in batch["samples"] if s["sample"] == HOSTILE)
    for outcome in hostile["outcomes"]:
        assert _flat(f"Date and time (UTC): {outcome['signed_at']}") in flat
    assert _flat(CAUTION) in flat and "reviewed" in text
    assert "Batch report" in reader.metadata.title


def test_an_open_batch_says_which_flags_wait_for_an_outcome(client, team):
    ref_id = approved_reference_model(client, team["analyst"], team["reviewer"])
    batch = _ok(upload_batch(client, team["analyst"], ref_id, as_csv(faulty_batch(), UNITS)), 201)["batch"]
    page = _html(client, team["viewer"], batch["id"])
    assert "<strong>open</strong>" in page and "no outcome yet" in page
    assert "No outcome has been signed for this batch." in page


@pytest.mark.parametrize("suffix", ["report", "report.pdf"])
@pytest.mark.parametrize("batch_id", ["999", str(2**64 + 1), str(2**31)])
def test_unknown_batches_are_404(client, team, suffix, batch_id):
    response = client.get(f"/-/monitoring/batches/{batch_id}/{suffix}", headers=team["viewer"].headers)
    assert response.status_code == 404


def test_the_report_needs_a_signed_in_user(client):
    response = client.get("/-/monitoring/batches/1/report")
    assert response.status_code in (302, 401)
