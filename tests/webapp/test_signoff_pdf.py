"""The sign-off report as a PDF file: content read back with pypdf, the route and its refusals.

What a signature must show follows US FDA 21 CFR Part 11 section 11.50 (printed name, date and
time, meaning). The file header and the document information entries (Title, Author, Subject)
follow ISO 32000-1:2008 (PDF 1.7), sections 7.5.2 and 14.3.3; the download header follows
RFC 6266 (Content-Disposition in HTTP, 2011), section 4.
"""

from __future__ import annotations

import io
import re

import pytest
from pypdf import PdfReader
from pypdf.generic import ContentStream
from review_helpers import actor, propose, sign
from wine_data import wine_csv, wine_frame

from webapp.services import signoff_pdf
from webapp import url_state

REASON = "<b>balance</b> drift of 0.5 µg at 21 °C, 2 × 10² counts"
COMMENT = "checked the raw record & the <i>bench log</i>"
TEAL = (0.122, 0.435, 0.471)  # #1f6f78, the "after" bars


@pytest.fixture
def team(app):
    return {
        "analyst": actor(app, "analyst", "Zoë Ångström"),
        "reviewer": actor(app, "reviewer", "Renée Müller"),
        "viewer": actor(app, "viewer", "Viewer Person"),
    }


def _upload(client, who, rows: int, name: str) -> int:
    # Wine recognition data (Aeberhard, Coomans & de Vel 1992) as shipped by scikit-learn;
    # few samples keep the fits quick.
    response = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(wine_csv(wine_frame().head(rows))), name),
                                  "id_column": "sample"},
        headers=who.headers, content_type="multipart/form-data",
    )
    assert response.status_code == 201, response.get_json()
    return response.get_json()["dataset"]["id"]


@pytest.fixture
def signed(client, team):
    """A dataset with one approved proposal: its id, the proposal as the API shows it, the dataset."""
    dataset_id = _upload(client, team["analyst"], 30, "wine30.csv")
    made = propose(client, team["analyst"], dataset_id, reason=REASON)
    assert made.status_code == 201, made.get_json()
    proposal_id = made.get_json()["proposal"]["id"]
    assert sign(client, team["reviewer"], proposal_id, comment=COMMENT).status_code == 200
    headers = team["viewer"].headers
    proposal = client.get(f"/api/v1/datasets/{dataset_id}/exclusions", headers=headers).get_json()["proposals"][0]
    dataset = client.get(f"/api/v1/datasets/{dataset_id}", headers=headers).get_json()["dataset"]
    return dataset_id, proposal, dataset


def _pdf(client, who, dataset_id, query=""):
    response = client.get(f"/-/review/datasets/{dataset_id}/report.pdf{query}", headers=who.headers)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response


def _text(reader: PdfReader) -> str:
    return "\n".join(page.extract_text() for page in reader.pages)


def _flat(text: str) -> str:
    """Text without whitespace: long hashes wrap inside their table cells."""
    return re.sub(r"\s+", "", text)


def _teal_rectangles(reader: PdfReader) -> int:
    """Rectangles painted in the "after" colour: the chart's bars and its legend swatch."""
    count = 0
    for page in reader.pages:
        fill = None
        for operands, operator in ContentStream(page.get_contents(), reader).operations:
            if operator == b"rg":
                fill = tuple(round(float(x), 3) for x in operands)
            elif operator == b"re" and fill == TEAL:
                count += 1
    return count


def test_pdf_carries_the_signed_record(client, team, signed):
    dataset_id, proposal, dataset = signed
    response = _pdf(client, team["viewer"], dataset_id)
    assert response.data.startswith(b"%PDF-")  # ISO 32000-1, 7.5.2: the file header
    reader = PdfReader(io.BytesIO(response.data))
    assert len(reader.pages) >= 1
    text = _text(reader)
    flat = _flat(text)
    comparison = proposal["comparison"]
    assert dataset["sha256"] in flat
    assert comparison["before"]["fingerprint"] in flat and comparison["after"]["fingerprint"] in flat
    assert comparison["before"]["fingerprint"] != comparison["after"]["fingerprint"]
    # 21 CFR 11.50: printed name, date and time, meaning; the proposer's name beside the reason.
    assert "Proposed by Zoë Ångström" in text
    signature = proposal["sign_off"]
    assert f"Printed name: {team['reviewer'].display_name}" in text
    assert f"Date and time (UTC): {signature['signed_at']}" in text
    assert "Meaning: approved" in text and "Signed: APPROVED" in text
    # User text is printed as typed: markup shown literally, units and symbols beyond ASCII kept.
    assert _flat(f"Reason: {REASON}") in flat
    assert _flat(f"Comment: {COMMENT}") in flat
    assert "Viewer Person" in text  # printed by
    assert "page 1" in text and "wine30.csv" in text  # the footer


def test_pdf_draws_the_before_after_chart(client, team, signed):
    dataset_id, proposal, _ = signed
    reader = PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id).data))
    explained = proposal["comparison"]["compare"]["explained"]
    # one "after" bar per component plus the legend's swatch
    assert _teal_rectangles(reader) == len(explained) + 1
    text = _text(reader)
    assert all(f"PC{row['component']}" in text for row in explained)
    assert re.search(r"before\s+after", text)  # the legend


def test_pdf_metadata_names_the_report(client, team, signed):
    dataset_id, _, dataset = signed
    reader = PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id).data))
    meta = reader.metadata  # ISO 32000-1, 14.3.3: the document information dictionary
    assert meta.author == "LatentDesk"
    assert "Sign-off report" in meta.title and "wine30.csv" in meta.title
    assert dataset["sha256"] in meta.subject


def test_pdf_prints_with_the_fonts_inside_reportlab_alone(client, team, signed, monkeypatch):
    """A server without system fonts: the Vera faces bundled with reportlab still print µ, ², °, × and accents."""
    monkeypatch.setattr(signoff_pdf, "FONT_FAMILIES", signoff_pdf.FONT_FAMILIES[-1:])
    dataset_id, _, _ = signed
    reader = PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id).data))
    fonts = {str(f.get_object()["/BaseFont"]) for page in reader.pages
             for f in page["/Resources"]["/Font"].values()}
    assert any("Vera" in name for name in fonts) and not any("DejaVu" in name for name in fonts)
    flat = _flat(_text(reader))
    assert _flat(f"Reason: {REASON}") in flat and "RenéeMüller" in flat and "ZoëÅngström" in flat


def test_missing_fonts_are_a_clear_error(monkeypatch):
    monkeypatch.setattr(signoff_pdf, "FONT_FAMILIES", (("LD-None", "no-such-font.ttf", "a.ttf", "b.ttf", "c.ttf"),))
    with pytest.raises(RuntimeError, match="no TrueType font"):
        signoff_pdf.fonts()


def test_one_proposal_only_and_an_unsigned_one(client, team, signed):
    dataset_id, first, _ = signed
    second = propose(client, team["analyst"], dataset_id, samples=("W-010",)).get_json()["proposal"]["id"]
    whole = _text(PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id).data)))
    assert f"Proposal {first['id']}: exclude W-003" in whole
    assert f"Proposal {second}:" not in whole  # still open: not a decided proposal
    one = _text(PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id, f"?proposal={second}").data)))
    assert f"Proposal {second}: exclude W-010" in one and f"Proposal {first['id']}:" not in one
    assert "Not signed. State: proposed" in one


def test_route_sends_an_attachment_to_any_role(client, team, signed):
    dataset_id, proposal, _ = signed
    response = _pdf(client, team["viewer"], dataset_id, f"?proposal={proposal['id']}")
    assert response.mimetype == "application/pdf"
    # RFC 6266, 4: attachment with a file name
    assert response.headers["Content-Disposition"] == f'attachment; filename="signoff-report-dataset-{dataset_id}.pdf"'
    assert response.headers["Cache-Control"] == "no-store"


def test_route_refuses_like_the_page(client, team, signed):
    dataset_id, proposal, _ = signed
    viewer = team["viewer"].headers
    base = f"/-/review/datasets/{dataset_id}"
    signed_out_page, signed_out_pdf = client.get(f"{base}/report"), client.get(f"{base}/report.pdf")
    assert signed_out_pdf.status_code == signed_out_page.status_code and signed_out_pdf.status_code in (302, 401)
    assert signed_out_pdf.headers.get("Location", "").split("?")[0] == \
        signed_out_page.headers.get("Location", "").split("?")[0]
    assert client.get("/-/review/datasets/9999/report.pdf", headers=viewer).status_code == 404
    bad = client.get(f"{base}/report.pdf?proposal=abc", headers=viewer)
    assert bad.status_code == 400 and "whole number" in bad.get_data(as_text=True)
    other = _upload(client, team["analyst"], 25, "wine25.csv")
    assert client.get(f"/-/review/datasets/{other}/report.pdf?proposal={proposal['id']}",
                      headers=viewer).status_code == 404
    assert client.get(f"{base}/report.pdf?proposal=9999", headers=viewer).status_code == 404


def test_url_builder_points_at_the_route():
    assert url_state.signoff_report_pdf_url(3) == "/-/review/datasets/3/report.pdf"
    assert url_state.signoff_report_pdf_url(3, 7) == "/-/review/datasets/3/report.pdf?proposal=7"


def test_report_data_is_what_both_formats_print(app, client, team, signed):
    from webapp.services.signoff_report import report_data

    dataset_id, proposal, dataset = signed
    with app.app_context():
        data = report_data(dataset_id, printed_by="Viewer Person")
    assert data["dataset"]["sha256"] == dataset["sha256"] and data["printed_by"] == "Viewer Person"
    assert data["approved_exclusions"] == ["W-003"]
    assert data["chain"]["intact"] is True
    (only,) = data["proposals"]
    assert only["proposed_by_name"] == "Zoë Ångström" and only["reason"] == REASON
    assert only["sign_off"]["printed_name"] == "Renée Müller" and only["sign_off"]["meaning"] == "approved"
    assert [e["action"] for e in only["entries"]] == ["propose", "approve"]
    assert only["comparison"]["before"]["fingerprint"] == proposal["comparison"]["before"]["fingerprint"]
    assert only["comparison"]["after"]["excluded"] == ["W-003"]
    head = client.get("/api/v1/review-log/verify", headers=team["viewer"].headers).get_json()["head"]
    assert (data["chain"]["head_seq"], data["chain"]["head_hash"]) == (head["seq"], head["hash"])


@pytest.mark.parametrize("query", ["", "?proposal={pid}"])
def test_html_report_links_to_its_pdf_twin(client, team, signed, query):
    from urllib.parse import urljoin

    dataset_id, proposal, _ = signed
    page_url = f"/-/review/datasets/{dataset_id}/report" + query.format(pid=proposal["id"])
    page = client.get(page_url, headers=team["viewer"].headers)
    href = re.search(r"<a href='([^']+)'>download the report as PDF</a>", page.get_data(as_text=True)).group(1)
    target = urljoin(page_url, href)  # RFC 3986, 5.2: how the browser resolves the relative link
    assert target == url_state.signoff_report_pdf_url(dataset_id, proposal["id"] if query else None)
    response = client.get(target, headers=team["viewer"].headers)
    assert response.status_code == 200 and response.get_data().startswith(b"%PDF")


def test_both_formats_say_which_method_flags_each_excluded_sample(app, client, team, signed):
    # The proposal's stored method support (classical T2/SPE and robust ROBPCA distances, Hubert,
    # Rousseeuw & Vanden Branden 2005) goes on paper, so the signed record shows what backed it.
    from webapp.services.signoff_report import report_data

    dataset_id, proposal, _ = signed
    stored = proposal["comparison"]["methods"]
    with app.app_context():
        (only,) = report_data(dataset_id)["proposals"]
    shown = only["comparison"]["methods"]
    assert [r["sample"] for r in shown["rows"]] == [r["sample"] for r in stored["samples"]] == ["W-003"]
    assert shown["rows"][0]["supported_by"] == stored["samples"][0]["supported_by"]
    assert "limits at 95%" in shown["note"]
    html_text = client.get(f"/-/review/datasets/{dataset_id}/report", headers=team["viewer"].headers).get_data(
        as_text=True)
    assert "Which method flags each sample" in html_text and stored["samples"][0]["supported_by"] in html_text
    text = _text(PdfReader(io.BytesIO(_pdf(client, team["viewer"], dataset_id).data)))
    assert "Which method flags each sample" in text
    assert _flat(stored["samples"][0]["supported_by"]) in _flat(text)
