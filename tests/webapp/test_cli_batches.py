"""``latentdesk batches check``: a batch posted to a real server on loopback with a token.

The server is the test app served by werkzeug's threaded server on a free port (like the
browser tests' ``demo_server``); the reference model, users and tokens come from the helpers of
``test_batches.py`` (wine recognition data, Aeberhard, Coomans & de Vel 1992, shipped with
scikit-learn). Every number the command prints or writes is compared with what the API itself
answers for the same batch, never with a value written here.
"""

from __future__ import annotations

import io
import json
import threading

import pandas as pd
import pytest
from review_helpers import actor
from test_batches import (
    UNITS,
    approved_reference_model,
    as_csv,
    held_out,
    stored_counts,
    training,
    upload_batch,
)
from werkzeug.serving import make_server

from webapp.cli import main


@pytest.fixture
def team(app):
    return {role: actor(app, role, f"{role.title()} Person") for role in ("viewer", "analyst", "reviewer")}


@pytest.fixture
def ref_id(client, team):
    return approved_reference_model(client, team["analyst"], team["reviewer"])


@pytest.fixture
def server_url(app):
    server = make_server("127.0.0.1", 0, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_port}"
    finally:
        server.shutdown()
        thread.join(timeout=10)


def token_of(who) -> str:
    return who.headers["Authorization"].removeprefix("Bearer ")


def run_check(capsys, monkeypatch, token, *args):
    """Exit code, stdout and stderr of ``latentdesk batches check ARGS`` with LATENTDESK_TOKEN=token."""
    if token is None:
        monkeypatch.delenv("LATENTDESK_TOKEN", raising=False)
    else:
        monkeypatch.setenv("LATENTDESK_TOKEN", token)
    for name in ("http_proxy", "HTTP_PROXY", "https_proxy", "HTTPS_PROXY", "all_proxy", "ALL_PROXY"):
        monkeypatch.delenv(name, raising=False)  # loopback goes straight to the test server
    capsys.readouterr()
    code = main(["batches", "check", *map(str, args)])
    out, err = capsys.readouterr()
    return code, out, err


def faulty_batch() -> pd.DataFrame:
    frame = held_out()
    frame.loc[0, "magnesium"] += 12 * training()["magnesium"].std(ddof=1)  # a planted single-variable fault
    return frame


def test_a_good_batch_is_stored_printed_and_written(app, client, team, ref_id, server_url, tmp_path,
                                                    capsys, monkeypatch):
    path = tmp_path / "week 49.csv"
    path.write_bytes(as_csv(faulty_batch(), UNITS))
    out_dir = tmp_path / "out"
    code, out, err = run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path,
                               "--server", server_url + "/", "--id-column", "sample", "--out", out_dir)
    assert code == 0, err
    assert "Traceback" not in err

    written = json.loads((out_dir / "batch.json").read_text(encoding="utf-8"))
    served = client.get(f"/api/v1/batches/{written['id']}", headers=team["viewer"].headers).get_json()["batch"]
    assert written == served  # the stored batch, number for number
    assert served["file_name"] == "week 49.csv" and served["retest"] is False
    assert served["uploaded_by_name"] == team["analyst"].display_name
    csv = client.get(f"/api/v1/batches/{written['id']}/samples.csv", headers=team["viewer"].headers)
    assert (out_dir / "samples.csv").read_bytes() == csv.data
    table = pd.read_csv(out_dir / "samples.csv", float_precision="round_trip")
    assert list(table["sample"]) == list(faulty_batch()["sample"])
    assert list(table["t2"]) == [s["t2"] for s in served["samples"]]
    assert list(table["spe"]) == [s["spe"] for s in served["samples"]]

    flagged = [s for s in served["samples"] if s["flagged"]]
    assert flagged and flagged[0]["sample"] == faulty_batch()["sample"][0]
    lines = out.splitlines()
    assert lines[0].startswith(f"batch {served['id']} checked against reference model {ref_id} ")
    assert f"{served['n_samples']} sample(s), {served['n_flagged']} flagged, state {served['state']}" in lines[0]
    for sample in flagged:
        [line] = [x for x in lines if x.startswith(f"  flagged {sample['sample']}:")]
        for key in ("t2", "t2_limit", "t2_warning_limit", "spe", "spe_limit", "spe_warning_limit"):
            assert f"{sample[key]:.4g}" in line, (key, line)
        for rule in sample["rules"]:
            assert f"{rule['chart']}: {rule['label']}" in line
    assert sum(x.startswith("  flagged ") for x in lines) == served["n_flagged"]
    assert any("never replace, QA judgement" in x for x in lines)


def test_a_retest_is_sent_and_recorded(app, client, team, ref_id, server_url, tmp_path, capsys, monkeypatch):
    path = tmp_path / "batch.csv"
    path.write_bytes(as_csv(held_out().head(3)))
    assert run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path, "--server", server_url)[0] == 0
    code, _, err = run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path, "--server", server_url)
    assert code == 2 and "batch" in err  # the same samples again: 409 naming the earlier batch
    code, out, err = run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path, "--server",
                               server_url, "--retest", "--below-limit", "missing")
    assert code == 0, err
    batch_id = int(out.split()[1])
    assert client.get(f"/api/v1/batches/{batch_id}", headers=team["viewer"].headers).get_json()["batch"]["retest"]


@pytest.mark.parametrize("frame, options", [
    (held_out().drop(columns=["proline"]), []),  # a variable of the model is missing
    (held_out(), ["--id-column", "lot"]),  # no such id column
])
def test_a_wrong_column_is_one_line_with_the_servers_message(app, client, team, ref_id, server_url, tmp_path,
                                                             capsys, monkeypatch, frame, options):
    path = tmp_path / "batch.csv"
    path.write_bytes(as_csv(frame))
    before = stored_counts(app)
    code, out, err = run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path, "--server",
                               server_url, "--out", tmp_path / "out", *options)
    assert code == 2 and out == ""
    form = {"id_column": options[1]} if options else {}
    answer = upload_batch(client, team["analyst"], ref_id, as_csv(frame), **form)
    assert answer.status_code == 400
    assert err == f"latentdesk: error: {answer.get_json()['error']['message']}\n"
    assert stored_counts(app) == before and not (tmp_path / "out").exists()


def test_a_missing_or_wrong_token_is_refused(app, team, ref_id, server_url, tmp_path, capsys, monkeypatch):
    path = tmp_path / "batch.csv"
    path.write_bytes(as_csv(held_out()))
    before = stored_counts(app)
    code, _, err = run_check(capsys, monkeypatch, None, ref_id, path, "--server", server_url)
    assert code == 2 and err.startswith("latentdesk: error: ") and "LATENTDESK_TOKEN" in err
    assert err.count("\n") == 1
    code, _, err = run_check(capsys, monkeypatch, "not-a-token", ref_id, path, "--server", server_url)
    assert code == 2 and err.startswith("latentdesk: error: ") and err.count("\n") == 1  # the server's 401
    code, _, err = run_check(capsys, monkeypatch, token_of(team["viewer"]), ref_id, path, "--server", server_url)
    assert code == 2 and err.count("\n") == 1  # a viewer may not upload: 403
    assert stored_counts(app) == before


def test_an_unreachable_server_is_exit_1_naming_the_url(tmp_path, capsys, monkeypatch):
    path = tmp_path / "batch.csv"
    path.write_bytes(as_csv(held_out()))
    server = make_server("127.0.0.1", 0, lambda environ, start: [])
    port = server.server_port
    server.server_close()  # the port was free a moment ago and nothing listens on it now
    code, out, err = run_check(capsys, monkeypatch, "some-token", 1, path, "--server", f"http://127.0.0.1:{port}")
    assert code == 1 and out == ""
    assert err.startswith("latentdesk: error: cannot reach the server at ") and f"127.0.0.1:{port}" in err
    assert "Traceback" not in err and err.count("\n") == 1


@pytest.mark.parametrize("url", ["ftp://127.0.0.1/", "file:///etc/passwd", "127.0.0.1:8050", "http://"])
def test_a_server_address_that_is_not_http_is_refused(tmp_path, capsys, monkeypatch, url):
    path = tmp_path / "batch.csv"
    path.write_bytes(b"sample,x\nA,1\n")
    code, _, err = run_check(capsys, monkeypatch, "some-token", 1, path, "--server", url)
    assert code == 2 and err == f"latentdesk: error: --server must be an http:// or https:// URL, got {url!r}\n"


def test_a_retired_reference_model_is_the_servers_409(app, client, team, ref_id, server_url, tmp_path,
                                                      capsys, monkeypatch):
    second = actor(app, "reviewer", "Second Reviewer")
    retired = client.post(f"/api/v1/reference-models/{ref_id}/retire",
                          json={"password": second.password, "comment": "line closed"}, headers=second.headers)
    assert retired.status_code == 200, retired.get_json()
    path = tmp_path / "batch.csv"
    path.write_bytes(as_csv(held_out(), UNITS))
    before = stored_counts(app)
    code, out, err = run_check(capsys, monkeypatch, token_of(team["analyst"]), ref_id, path, "--server", server_url)
    answer = upload_batch(client, team["analyst"], ref_id, as_csv(held_out(), UNITS))
    assert answer.status_code == 409 and "retired" in answer.get_json()["error"]["message"]
    assert code == 2 and out == ""
    assert err == f"latentdesk: error: {answer.get_json()['error']['message']}\n"
    assert stored_counts(app) == before


def test_the_multipart_body_carries_the_file_and_fields_unchanged():
    """The hand-built body parses back with werkzeug's form parser (RFC 7578; a quote in the file name
    is sent as %22, as the WHATWG HTML standard's multipart/form-data encoding does)."""
    from werkzeug.formparser import parse_form_data

    from webapp.cli.batches import multipart_body

    content = b"sample,x\r\nA,1\r\n--not-a-boundary\r\n\x00\xff"
    body, content_type = multipart_body({"id_column": "sample", "retest": "true"}, 'we"ek.csv', content)
    environ = {"REQUEST_METHOD": "POST", "CONTENT_TYPE": content_type, "CONTENT_LENGTH": str(len(body)),
               "wsgi.input": io.BytesIO(body)}
    _, form, files = parse_form_data(environ)
    assert dict(form) == {"id_column": "sample", "retest": "true"}
    assert files["file"].read() == content and files["file"].filename == 'we"ek.csv'
    assert multipart_body({}, "a.csv", b"")[1] != content_type  # a fresh random boundary each time
