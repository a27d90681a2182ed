"""The ``latentdesk batches check`` command: post a file of new samples to a running server.

The online twin of the offline ``latentdesk apply``: the file goes to
``POST /api/v1/reference-models/<id>/batches`` (docs/api.md, "Monitoring"), the
server checks and stores it, and the answer is printed. Standard library only
(``urllib.request``, a hand-built ``multipart/form-data`` body, RFC 7578).

The API token is read from the environment variable ``LATENTDESK_TOKEN``, never
from the command line, so it does not show in the process list. Exit codes:
0 stored (also with flagged samples), 2 the server refused the request (4xx) or
the arguments are unusable, 1 the server failed (5xx) or could not be reached.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import secrets
import sys
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

from analysis.errors import InputError

EXIT_OK, EXIT_SERVER = 0, 1
TOKEN_VARIABLE = "LATENTDESK_TOKEN"
TIMEOUT_SECONDS = 300
LOOPBACK = {"localhost", "127.0.0.1", "::1"}
CAUTION = ("Flags support, and never replace, QA judgement and local procedures; each flagged sample "
           "needs a signed outcome on the server.")


class ServerError(Exception):
    """The server failed (5xx), gave an unreadable answer, or could not be reached."""


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """Refuse redirects, so the token is never sent on to another address."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


def _base_url(text: str) -> str:
    parts = urllib.parse.urlsplit(text.strip())
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise InputError(f"--server must be an http:// or https:// URL, got {text!r}", field="server")
    if parts.query or parts.fragment:
        raise InputError(f"--server must not carry a query or fragment, got {text!r}", field="server")
    if parts.scheme == "http" and parts.hostname not in LOOPBACK:
        print(f"latentdesk: warning: {text} is plain http: the token and the data travel unencrypted; "
              "use https beyond this computer", file=sys.stderr)
    return urllib.parse.urlunsplit((parts.scheme, parts.netloc, parts.path.rstrip("/"), "", ""))


def _token() -> str:
    token = os.environ.get(TOKEN_VARIABLE, "").strip()
    if not token:
        raise InputError(f"no API token: set the environment variable {TOKEN_VARIABLE} "
                         "(make one with 'latentdesk tokens create NAME')")
    if not token.isprintable() or any(c.isspace() for c in token):
        raise InputError(f"{TOKEN_VARIABLE} holds spaces or control characters; it is not a LatentDesk token")
    return token


def _read_file(path: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: no such file", field="file") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read it ({exc.strerror})", field="file") from None


def _header_value(text: str) -> str:
    """A file name safe inside a quoted Content-Disposition parameter (RFC 7578 4.2; WHATWG HTML: ``"`` as %22)."""
    return "".join("%22" if c == '"' else "_" if c in "\r\n\\" else c for c in text)


def multipart_body(fields: dict[str, str], file_name: str, content: bytes) -> tuple[bytes, str]:
    """``(body, content_type)`` of a multipart/form-data request with ``fields`` and one ``file``."""
    boundary = "latentdesk-" + secrets.token_hex(16)
    while boundary.encode("ascii") in content:  # practically never; a new random boundary fixes it
        boundary = "latentdesk-" + secrets.token_hex(16)
    parts = []
    for name, value in fields.items():
        parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n'
                     f"{value}\r\n".encode("utf-8"))
    parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="file"; '
                 f'filename="{_header_value(file_name)}"\r\n'
                 "Content-Type: application/octet-stream\r\n\r\n".encode("utf-8"))
    parts.append(content)
    parts.append(f"\r\n--{boundary}--\r\n".encode("ascii"))
    return b"".join(parts), f"multipart/form-data; boundary={boundary}"


def _error_message(raw: bytes) -> str | None:
    try:
        message = json.loads(raw.decode("utf-8"))["error"]["message"]
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        return None
    return str(message) if message else None


def _request(url: str, token: str, body: bytes | None = None, content_type: str | None = None) -> bytes:
    """The answer's bytes for a 2xx; InputError for 3xx/4xx, ServerError for 5xx or no connection."""
    request = urllib.request.Request(url, data=body, method="POST" if body is not None else "GET")
    request.add_header("Authorization", f"Bearer {token}")
    request.add_header("Accept", "application/json, text/csv")
    if content_type:
        request.add_header("Content-Type", content_type)
    opener = urllib.request.build_opener(_NoRedirect)
    try:
        with opener.open(request, timeout=TIMEOUT_SECONDS) as answer:
            return answer.read()
    except urllib.error.HTTPError as exc:
        raw = exc.read()
        message = _error_message(raw)
        if 300 <= exc.code < 400:
            raise InputError(f"the server at {url} redirects to {exc.headers.get('Location', '?')}; "
                             "give that address as --server (the token is not sent on)") from None
        if exc.code < 500:
            raise InputError(message or f"the server at {url} answered HTTP {exc.code} {exc.reason}") from None
        raise ServerError(f"the server at {url} failed: HTTP {exc.code} {exc.reason}"
                          + (f": {message}" if message else "")) from None
    except (urllib.error.URLError, OSError, http.client.HTTPException) as exc:
        reason = getattr(exc, "reason", exc)
        raise ServerError(f"cannot reach the server at {url}: {reason}") from None


def _json_batch(raw: bytes, url: str) -> dict:
    try:
        answer = json.loads(raw.decode("utf-8"))
        if answer.get("ok") is True and isinstance(answer.get("batch"), dict):
            return answer["batch"]
    except (ValueError, AttributeError, UnicodeDecodeError):
        pass
    raise ServerError(f"the server at {url} gave an answer that is not a LatentDesk batch")


def _number(value) -> str:
    return "-" if value is None else f"{value:.4g}"


def _rules(sample: dict) -> str:
    return "; ".join(f"{rule['chart']}: {rule['label']}" for rule in sample.get("rules") or []) or "-"


def summary_lines(batch: dict) -> list[str]:
    """The printed summary: the batch, then one line per flagged sample."""
    reference = batch.get("reference_model") or {}
    lines = [
        f"batch {batch['id']} checked against reference model {batch['reference_model_id']} "
        f"({reference.get('name', '?')}, version {reference.get('version', '?')}): "
        f"{batch['n_samples']} sample(s), {batch['n_flagged']} flagged, state {batch['state']}"
    ]
    for sample in batch["samples"]:
        if sample.get("flagged"):
            lines.append(
                f"  flagged {sample['sample']}: T2 {_number(sample['t2'])} (action limit "
                f"{_number(sample['t2_limit'])}, warning {_number(sample.get('t2_warning_limit'))}), "
                f"SPE {_number(sample['spe'])} (action limit {_number(sample['spe_limit'])}, warning "
                f"{_number(sample.get('spe_warning_limit'))}), rules: {_rules(sample)}"
            )
    if batch["n_flagged"]:
        lines.append(CAUTION)
    return lines


def _write_out(folder: str, batch: dict, samples_csv: bytes) -> None:
    out = Path(folder)
    try:
        out.mkdir(parents=True, exist_ok=True)
        (out / "samples.csv").write_bytes(samples_csv)
        (out / "batch.json").write_text(json.dumps(batch, indent=2, ensure_ascii=False) + "\n",
                                        encoding="utf-8")
    except OSError as exc:
        raise InputError(f"--out {folder}: cannot write there ({exc.strerror}); batch {batch['id']} "
                         "is stored on the server") from None


def _cmd_batches_check(args: argparse.Namespace) -> int:
    base = _base_url(args.server)
    token = _token()
    content = _read_file(args.file)
    fields = {name: value for name, value in (
        ("id_column", args.id_column), ("sheet", args.sheet), ("below_limit", args.below_limit),
        ("bad_cells", args.bad_cells), ("retest", "true" if args.retest else None)) if value}
    body, content_type = multipart_body(fields, Path(args.file).name, content)
    url = f"{base}/api/v1/reference-models/{args.reference_model_id}/batches"
    try:
        batch = _json_batch(_request(url, token, body, content_type), url)
        samples_csv = (_request(f"{base}/api/v1/batches/{batch['id']}/samples.csv", token)
                       if args.out else None)
    except ServerError as exc:
        print(f"latentdesk: error: {exc}", file=sys.stderr)
        return EXIT_SERVER
    for warning in batch.get("warnings") or []:
        print(f"latentdesk: warning: {warning}", file=sys.stderr)
    if args.out:
        _write_out(args.out, batch, samples_csv)
    print("\n".join(summary_lines(batch)))
    if args.out:
        print(f"wrote {Path(args.out) / 'samples.csv'} and {Path(args.out) / 'batch.json'}")
    return EXIT_OK


def add_batch_commands(commands) -> None:
    """Add ``batches check`` to the ``latentdesk`` sub-parsers."""
    batches = commands.add_parser("batches", help="new batches on a running server").add_subparsers(
        dest="batches_command", required=True, metavar="ACTION"
    )
    check = batches.add_parser(
        "check", help=f"post a file of new samples to a server (token from ${TOKEN_VARIABLE})"
    )
    check.add_argument("reference_model_id", type=int, metavar="REFERENCE_MODEL_ID",
                       help="id of an approved reference model on the server")
    check.add_argument("file", metavar="FILE", help="CSV, TSV or XLSX file with the new samples")
    check.add_argument("--server", required=True, metavar="URL", help="the server's address, e.g. https://latentdesk.example")
    check.add_argument("--id-column", help="column holding the sample ids (default: the reference model's)")
    check.add_argument("--sheet", help="XLSX sheet name (default: the first sheet)")
    check.add_argument("--below-limit", choices=["half", "sqrt2", "missing"],
                       help="'<LOD' values: LOD/2 (half), LOD/sqrt(2) or missing (default: the server's)")
    check.add_argument("--bad-cells", choices=["error", "missing"],
                       help="text in a numeric column: refuse the file or read it as missing")
    check.add_argument("--retest", action="store_true",
                       help="check again samples or a file checked before (recorded as a re-test)")
    check.add_argument("--out", metavar="DIR", help="folder for samples.csv and batch.json")
    check.set_defaults(handler=_cmd_batches_check)
