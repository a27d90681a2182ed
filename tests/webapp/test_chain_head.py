"""The review log's chain head outside the database: ``latentdesk log head`` and the reports.

The head printed on paper is the hash of the last entry of a hash chain, where each record carries
the digest of its predecessor (Haber & Stornetta 1991, "How to time-stamp a digital document",
Journal of Cryptology 3(2), 99-111): a copy kept elsewhere shows a later truncation that the chain
alone cannot (docs/design.md, section 6).  Each expected head is read from the stored log itself
(the entry with the highest number, its stored hash and UTC time), never from the report's data;
``verify_chain`` saying intact ties that stored hash to the entries' content.  What a signature shows
follows US FDA 21 CFR Part 11, section 11.50; PDF text is read back with pypdf.
"""

from __future__ import annotations

import io
import json
import re

import pytest
from pypdf import PdfReader
from review_helpers import actor, propose, sign
from test_audit_chain import _as_superuser
from test_batches import UNITS, _ok, approved_reference_model, as_csv, held_out, upload_batch
from wine_data import wine_csv, wine_frame

from webapp.cli import main
from webapp.services import audit
from webapp.store import review as store
from webapp.store import session_scope

HASH = r"[0-9a-f]{64}"
UTC = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z"
HTML_HEAD = re.compile(
    rf"chain head at printing: entry (\d+), <span class=.mono.>({HASH})</span>, written ({UTC}) \(UTC\)"
)
PDF_HEAD = re.compile(rf"chainheadatprinting:entry(\d+),({HASH}),written({UTC})\(UTC\)")


def last_entry(app) -> tuple[int, str, str]:
    """(seq, hash, UTC time) of the stored entry with the highest number; the chain must verify."""
    with app.app_context(), session_scope() as s:
        intact, _, reason = audit.verify_chain(s)
        assert intact, reason
        rows = list(store.iter_log(s))
        return rows[-1].seq, rows[-1].hash, audit.utc_iso(rows[-1].at)


def append_note(app) -> None:
    with app.app_context(), session_scope() as s:
        audit.append(s, actor_id=None, actor_name="System Test", action="note", payload={"why": "head test"})


def html_head(page: str) -> tuple[int, str, str]:
    (found,) = HTML_HEAD.findall(page)
    return int(found[0]), found[1], found[2]


def pdf_head(data: bytes) -> tuple[int, str, str]:
    assert data.startswith(b"%PDF-")  # ISO 32000-1:2008, section 7.5.2
    text = re.sub(r"\s+", "", "".join(page.extract_text() for page in PdfReader(io.BytesIO(data)).pages))
    (found,) = PDF_HEAD.findall(text)
    return int(found[0]), found[1], found[2]


def _get(client, who, url) -> bytes:
    response = client.get(url, headers=who.headers)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.data


# --- latentdesk log head ------------------------------------------------------------------


@pytest.fixture
def cli_app(app, monkeypatch):
    """The app's database as the command line's configured database, with three log entries."""
    for _ in range(3):
        append_note(app)
    monkeypatch.setenv("LATENTDESK_HOME", app.instance_path)
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    return app


def test_log_head_prints_count_last_entry_hash_and_time(cli_app, capsys):
    seq, digest, at = last_entry(cli_app)
    assert main(["log", "head"]) == 0
    assert capsys.readouterr().out.strip() == (
        f"review log: 3 entries; chain head entry {seq}, hash {digest}, written {at} (UTC)"
    )
    assert seq == 3


def test_log_head_json_is_the_last_stored_entry(cli_app, capsys):
    assert main(["log", "head", "--json"]) == 0
    seq, digest, at = last_entry(cli_app)
    assert json.loads(capsys.readouterr().out) == {"entries": 3, "seq": seq, "hash": digest, "at": at}


def test_log_head_moves_when_an_entry_is_appended(cli_app, capsys):
    assert main(["log", "head", "--json"]) == 0
    before = json.loads(capsys.readouterr().out)
    append_note(cli_app)
    assert main(["log", "head", "--json"]) == 0
    after = json.loads(capsys.readouterr().out)
    seq, digest, at = last_entry(cli_app)
    assert (after["entries"], after["seq"], after["hash"], after["at"]) == (4, seq, digest, at)
    assert after["seq"] == before["seq"] + 1 and after["hash"] != before["hash"]
    # the kept head is still entry 3 of the longer log
    assert main(["log", "head", "--entry", str(before["seq"]), "--json"]) == 0
    kept = json.loads(capsys.readouterr().out)
    assert (kept["seq"], kept["hash"], kept["at"]) == (before["seq"], before["hash"], before["at"])


def test_a_kept_head_catches_a_truncation_the_chain_cannot(cli_app, capsys):
    """Cut the last entry off and move the head row back with it: verify says intact, the kept head does not."""
    assert main(["log", "head", "--json"]) == 0
    kept = json.loads(capsys.readouterr().out)
    previous = last_entry(cli_app)
    with cli_app.app_context(), session_scope() as s:
        second = store.log_entry_at(s, 2).hash
    _as_superuser(cli_app, "DELETE FROM review_log WHERE seq = 3")
    _as_superuser(cli_app, f"UPDATE review_log_head SET seq = 2, hash = '{second}'")
    assert main(["log", "verify"]) == 0  # the chain alone looks intact
    capsys.readouterr()
    assert main(["log", "head", "--entry", str(kept["seq"])]) == 1
    assert capsys.readouterr().out.strip() == (
        "review log: 2 entries; entry 3 is not in the log (run `latentdesk log verify`)"
    )
    assert main(["log", "head", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["seq"] == previous[0] - 1


@pytest.mark.parametrize("value", ["0", "-1", "three"])
def test_log_head_refuses_a_bad_entry_number(cli_app, capsys, value):
    with pytest.raises(SystemExit) as done:
        main(["log", "head", "--entry", value])
    assert done.value.code == 2
    assert f"an entry number is a whole number from 1, got {value!r}" in capsys.readouterr().err


def test_log_head_without_a_database_is_bad_input(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path / "nothing-here"))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    assert main(["log", "head"]) == 2
    assert "no database" in capsys.readouterr().err


# --- the head on the sign-off report --------------------------------------------------------


@pytest.fixture
def signed(app, client):
    """A dataset of the wine recognition data (Aeberhard, Coomans & de Vel 1992, as shipped by
    scikit-learn) with one approved proposal, and a viewer to print the report."""
    team = {"analyst": actor(app, "analyst", "Ana Analyst"), "reviewer": actor(app, "reviewer", "Rita Reviewer"),
            "viewer": actor(app, "viewer", "Vic Viewer")}
    upload = client.post(
        "/api/v1/datasets", data={"file": (io.BytesIO(wine_csv(wine_frame().head(30))), "wine30.csv"),
                                  "id_column": "sample"},
        headers=team["analyst"].headers, content_type="multipart/form-data",
    )
    dataset_id = _ok(upload, 201)["dataset"]["id"]
    proposal_id = _ok(propose(client, team["analyst"], dataset_id), 201)["proposal"]["id"]
    _ok(sign(client, team["reviewer"], proposal_id))
    return dataset_id, team["viewer"]


def test_signoff_report_prints_the_last_entry_and_follows_an_append(app, client, signed):
    dataset_id, viewer = signed
    url = f"/-/review/datasets/{dataset_id}/report"
    head = last_entry(app)
    assert html_head(_get(client, viewer, url).decode("utf-8")) == head
    assert pdf_head(_get(client, viewer, url + ".pdf")) == head
    append_note(app)
    moved = last_entry(app)
    assert moved[0] == head[0] + 1 and moved[1] != head[1]
    assert html_head(_get(client, viewer, url).decode("utf-8")) == moved
    assert pdf_head(_get(client, viewer, url + ".pdf")) == moved


# --- the head on the batch report -----------------------------------------------------------


def test_batch_report_prints_the_last_entry_and_follows_an_append(app, client):
    analyst, reviewer = actor(app, "analyst", "Ana Analyst"), actor(app, "reviewer", "Rita Reviewer")
    ref_id = approved_reference_model(client, analyst, reviewer)
    batch = _ok(upload_batch(client, analyst, ref_id, as_csv(held_out(), UNITS)), 201)["batch"]
    url = f"/-/monitoring/batches/{batch['id']}/report"
    head = last_entry(app)
    assert html_head(_get(client, analyst, url).decode("utf-8")) == head
    assert pdf_head(_get(client, analyst, url + ".pdf")) == head
    append_note(app)
    moved = last_entry(app)
    assert moved[0] == head[0] + 1 and moved[1] != head[1]
    assert html_head(_get(client, analyst, url).decode("utf-8")) == moved
    assert pdf_head(_get(client, analyst, url + ".pdf")) == moved
