"""HTTP and CLI conventions: 405 with Allow, 404 for unknown API paths whatever the method,
revalidation of fingerprinted model answers, ``latentdesk --version`` and one-line errors.

Sources: RFC 9110 (HTTP Semantics, 2022) section 15.5.6 (a 405 response MUST carry Allow),
section 8.8.3 (ETag), section 13.1.2 (If-None-Match) and 15.4.5 (304 Not Modified); RFC 9111
section 5.2.2.4 (no-cache: store, but revalidate before use); the CLI's own contract in
docs/cli.md (one line on stderr starting ``latentdesk: error:``, exit code 2).
"""

from __future__ import annotations

import importlib.metadata
import io
import subprocess
import sys

import pytest
from review_helpers import actor
from wine_data import wine_frame

import analysis


@pytest.fixture
def analyst(app):
    return actor(app, "analyst", "Ana Lyst")


@pytest.mark.parametrize("method", ["post", "put", "patch", "delete", "get"])
def test_an_unknown_api_path_is_404_for_every_method(client, analyst, method):
    answer = getattr(client, method)("/api/v1/no-such-thing", headers=analyst.headers)
    assert answer.status_code == 404 and answer.get_json()["error"]["code"] == "not_found"


@pytest.mark.parametrize("method, path, allowed", [
    ("delete", "/api/v1/datasets", "GET, HEAD, POST"),
    ("put", "/api/v1/datasets/1", "GET, HEAD"),
    ("post", "/api/v1/reference-models/1", "GET, HEAD"),
])
def test_a_wrong_method_on_an_api_route_is_405_with_allow(client, analyst, method, path, allowed):
    answer = getattr(client, method)(path, headers=analyst.headers)
    assert answer.status_code == 405 and answer.headers["Allow"] == allowed
    assert answer.get_json()["error"]["code"] == "method_not_allowed"


def test_a_fitted_model_answers_with_an_etag_and_revalidates(client, analyst):
    upload = client.post("/api/v1/datasets", data={"file": (io.BytesIO(wine_frame().head(40).to_csv(index=False)
                                                                        .encode()), "wine.csv"),
                                                   "id_column": "sample"},
                         headers=analyst.headers, content_type="multipart/form-data")
    dataset_id = upload.get_json()["dataset"]["id"]
    model_id = client.post(f"/api/v1/datasets/{dataset_id}/models", json={"components": 2},
                           headers=analyst.headers).get_json()["model"]["id"]
    first = client.get(f"/api/v1/models/{model_id}/samples", headers=analyst.headers)
    etag = first.headers["ETag"]
    assert first.status_code == 200 and first.headers["Cache-Control"] == "private, no-cache"
    again = client.get(f"/api/v1/models/{model_id}/samples", headers={**analyst.headers, "If-None-Match": etag})
    assert again.status_code == 304 and again.get_data() == b""
    other = client.get(f"/api/v1/models/{model_id}/samples?confidence=0.9",
                       headers={**analyst.headers, "If-None-Match": etag})
    assert other.status_code == 200 and other.headers["ETag"] != etag


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "webapp.cli", *args], capture_output=True, text=True, timeout=120)


def test_version_names_the_one_version_of_the_package():
    done = _cli("--version")
    assert done.returncode == 0 and done.stdout == f"latentdesk {analysis.__version__}\n"
    assert importlib.metadata.version("latentdesk") == analysis.__version__


@pytest.mark.parametrize("args, line", [
    ((), "latentdesk: error: the following arguments are required: COMMAND\n"),
    (("fit", "x.csv"), "latentdesk: error: fit: the following arguments are required: --out\n"),
])
def test_argument_errors_are_one_line_naming_the_program_once(args, line):
    done = _cli(*args)
    assert done.returncode == 2 and done.stderr == line
