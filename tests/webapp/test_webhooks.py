"""The outgoing webhook: a flagged batch is POSTed, signed, retried, and never holds up the caller.

Each delivery goes to a real HTTP server on 127.0.0.1 (``http.server`` in a
thread).  Sources:

- HMAC: RFC 2104 (Krawczyk, Bellare & Canetti 1997, "HMAC: Keyed-Hashing for
  Message Authentication"), section 2, computed here with the standard
  library's ``hmac`` and SHA-256 (FIPS 180-4), independently of the sender.
- Status classes: RFC 9110 (Fielding, Nottingham & Reschke 2022, "HTTP
  Semantics"): 5xx is a server error (section 15.6), 4xx a client error
  that repeating will not mend (section 15.5), 3xx a redirect (15.4);
  ``Retry-After`` as delay-seconds or an HTTP date with the section 10.2.3
  examples; 429 Too Many Requests: RFC 6585 (Nottingham & Fielding 2012), section 4.
- Retrying with exponential back-off, jitter and a cap: common practice.

No test asserts on elapsed time: waits are bounded guards against a hang, and
"does not block" is shown by order (the call returns before the server has
answered).
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import math
import socket
import threading
from email.utils import parsedate_to_datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest
from flask import Flask

from webapp.config import ConfigError, load_config
from webapp.services import webhooks
from webapp.services.webhook_delivery import retry_after_seconds

GUARD = 30  # seconds; only a guard against a hang
SECRET = "team-shared-secret"
HANG = "hang"
ACTION_RULE = {"chart": "spe", "rule": "beyond-action", "label": "1 point beyond the action limit",
               "source": "Western Electric (1956) rule 1; Nelson (1984) test 1", "side": "above"}


# -- a receiving server --------------------------------------------------------------------


class Receiver:
    """Answers each request with the next scripted answer (the last one repeats).

    An answer is a status, a ``(status, headers)`` pair, or ``HANG``: hold the
    request until ``release`` is set, then answer 200.
    """

    def __init__(self, answers):
        self.answers = list(answers)
        self.requests: list[dict] = []
        self.arrived = threading.Event()
        self.release = threading.Event()
        self.lock = threading.Lock()
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):
                body = self.rfile.read(int(self.headers["Content-Length"]))
                with receiver.lock:
                    receiver.requests.append({"path": self.path, "headers": self.headers, "body": body})
                    index = min(len(receiver.requests), len(receiver.answers)) - 1
                receiver.arrived.set()
                answer = receiver.answers[index]
                if answer == HANG:
                    receiver.release.wait(GUARD)
                    answer = 200
                status, headers = answer if isinstance(answer, tuple) else (answer, {})
                self.send_response(status)
                for name, value in headers.items():
                    self.send_header(name, value)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                pass

        class Server(ThreadingHTTPServer):
            daemon_threads = True

            def handle_error(self, request, client_address):
                pass  # a client that timed out leaves a broken pipe behind

        self.server = Server(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hooks/qa-team"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def bodies(self) -> list[dict]:
        with self.lock:
            return [json.loads(r["body"]) for r in self.requests]


@pytest.fixture
def receive():
    made = []

    def start(*answers):
        receiver = Receiver(answers)
        receiver.thread.start()
        made.append(receiver)
        return receiver

    yield start
    for receiver in made:
        receiver.release.set()
        receiver.server.shutdown()
        receiver.server.server_close()


class Outcomes(logging.Handler):
    """Collects the final-outcome records of ``latentdesk.webhooks``."""

    def __init__(self):
        super().__init__(level=logging.INFO)
        self.records: list[logging.LogRecord] = []
        self.changed = threading.Condition()

    def emit(self, record):
        if getattr(record, "webhook_outcome", None):
            with self.changed:
                self.records.append(record)
                self.changed.notify_all()

    def wait_for(self, count: int) -> list[logging.LogRecord]:
        with self.changed:
            assert self.changed.wait_for(lambda: len(self.records) >= count, GUARD), "no outcome logged"
            return list(self.records)


@pytest.fixture
def outcomes():
    logger = logging.getLogger("latentdesk.webhooks")
    handler, level = Outcomes(), logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.INFO)
    yield handler
    logger.removeHandler(handler)
    logger.setLevel(level)


@pytest.fixture
def sleeps():
    """The waits the sender asked for, instead of waiting them."""
    return []


def webhook_app(tmp_path, sleeps, **settings) -> Flask:
    config = load_config({"HOME": str(tmp_path), "SECRET_KEY": "s", **settings}, environ={})
    app = Flask("webhook-test")
    app.config.update(config)
    webhooks.init_app(app, sleep=sleeps.append)
    return app


def batch(batch_id=7, flagged=(1, 3), n_samples=4) -> dict:
    """A checked batch in the shape ``services.batches`` returns (invented values)."""
    samples = [
        {"sample": f"LOT-{i:03d}", "run_index": 40 + i, "t2": 2.5 + i, "spe": 1.25 * (i + 1),
         "flagged": i in flagged, "rules": [dict(ACTION_RULE, samples=[f"LOT-{i:03d}"])] if i in flagged else []}
        for i in range(n_samples)
    ]
    return {"id": batch_id, "reference_model_id": 3,
            "reference_model": {"name": "Granule blend", "version": 2, "state": "approved",
                                "document_sha256": "ab" * 32},
            "file_name": "week-12.csv", "file_sha256": "cd" * 32, "n_samples": n_samples,
            "n_flagged": len(flagged), "state": "open" if flagged else "reviewed", "samples": samples}


def check(app, checked: dict) -> None:
    with app.app_context():
        assert webhooks.batch_checked(checked) is None


# -- delivery --------------------------------------------------------------------------------


def test_server_errors_are_retried_and_the_delivery_arrives_signed(tmp_path, receive, outcomes, sleeps):
    receiver = receive(503, (429, {"Retry-After": "3"}), 200)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url, WEBHOOK_SECRET=SECRET)
    checked = batch()
    check(app, checked)

    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts, outcome.batch_id) == ("delivered", 3, 7)
    assert len(receiver.requests) == 3
    # 503: exponential back-off from 1 s with equal jitter, so within [0.5, 1]; 429: its Retry-After.
    assert len(sleeps) == 2 and 0.5 <= sleeps[0] <= 1.0 and sleeps[1] == 3

    for request in receiver.requests:
        headers, body = request["headers"], request["body"]
        timestamp = headers["X-LatentDesk-Timestamp"]
        expected = hmac.new(SECRET.encode(), timestamp.encode() + b"." + body, hashlib.sha256).hexdigest()
        scheme, _, given = headers["X-LatentDesk-Signature"].partition("=")
        assert scheme == "sha256" and hmac.compare_digest(given, expected)
        assert headers["Content-Type"].startswith("application/json")
        assert headers["X-LatentDesk-Event"] == "batch_flagged"
    assert request["path"] == "/hooks/qa-team"

    bodies = receiver.bodies()
    assert bodies[0] == bodies[2]  # the same delivery each time, with one delivery id
    sent = bodies[-1]
    assert sent["delivery_id"] == receiver.requests[0]["headers"]["X-LatentDesk-Delivery"]
    assert sent["event"] == "batch_flagged" and sent["batch_id"] == 7
    assert sent["reference_model"] == {"id": 3, "name": "Granule blend", "version": 2}
    assert (sent["file_name"], sent["file_sha256"]) == ("week-12.csv", "cd" * 32)
    assert (sent["n_samples"], sent["n_flagged"], sent["more_flagged"]) == (4, 2, 0)
    assert sent["link"] == "/monitoring/batches/7"
    assert sent["flagged_samples"] == [
        {"sample": s["sample"], "t2": s["t2"], "spe": s["spe"],
         "rules": [{"chart": "spe", "label": "1 point beyond the action limit"}]}
        for s in checked["samples"] if s["flagged"]
    ]
    assert "never replace" in sent["caution"] and "QA judgement and local procedures" in sent["caution"]
    assert sent["time_utc"].endswith("Z")


def test_waits_grow_exponentially_up_to_the_cap(tmp_path, receive, outcomes, sleeps):
    receiver = receive(502, 502, 502, 502, 200)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url, WEBHOOK_BACKOFF_SECONDS=1,
                      WEBHOOK_BACKOFF_MAX_SECONDS=4)
    check(app, batch())
    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts) == ("delivered", 5)
    # 1, 2, 4, then capped at 4; each drawn from [d/2, d].
    assert len(sleeps) == 4
    for wait, full in zip(sleeps, (1, 2, 4, 4)):
        assert full / 2 <= wait <= full
    assert "X-LatentDesk-Signature" not in receiver.requests[0]["headers"]  # no secret, no signature


def test_retry_after_is_kept_within_the_cap(tmp_path, receive, outcomes, sleeps):
    receiver = receive((503, {"Retry-After": "600"}), 200)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url, WEBHOOK_BACKOFF_MAX_SECONDS=10)
    check(app, batch())
    assert outcomes.wait_for(1)[0].webhook_outcome == "delivered"
    assert sleeps == [10]


@pytest.mark.parametrize("answer, reason", [
    (400, "answered 400"),
    ((302, {"Location": "/elsewhere"}), "redirects are not followed"),
])
def test_a_client_error_or_redirect_is_not_retried(tmp_path, receive, outcomes, sleeps, answer, reason):
    receiver = receive(answer, 200)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url)
    check(app, batch())
    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts) == ("gave_up", 1)
    assert reason in outcome.getMessage()
    assert [r["path"] for r in receiver.requests] == ["/hooks/qa-team"] and sleeps == []


def test_the_caller_returns_before_the_server_has_answered(tmp_path, receive, outcomes, sleeps):
    receiver = receive(HANG)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url, WEBHOOK_TIMEOUT_SECONDS=GUARD)
    check(app, batch())
    # The server holds the request until released, so no outcome can exist yet.
    assert outcomes.records == []
    assert receiver.arrived.wait(GUARD)
    receiver.release.set()
    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts) == ("delivered", 1)


def test_a_server_that_never_answers_times_out_and_is_retried(tmp_path, receive, outcomes, sleeps):
    receiver = receive(HANG)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url, WEBHOOK_TIMEOUT_SECONDS=1,
                      WEBHOOK_ATTEMPTS=2)
    check(app, batch())
    assert outcomes.records == []
    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts) == ("gave_up", 2)
    assert "no answer within 1 s" in outcome.getMessage()
    assert len(receiver.requests) == 2 and len(sleeps) == 1


def test_a_refused_connection_is_retried(tmp_path, outcomes, sleeps):
    with socket.socket() as sock:  # a port nobody listens on once closed
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=f"http://127.0.0.1:{port}/hook", WEBHOOK_ATTEMPTS=3)
    check(app, batch())
    [outcome] = outcomes.wait_for(1)
    assert (outcome.webhook_outcome, outcome.webhook_attempts) == ("gave_up", 3)
    assert "connection failed" in outcome.getMessage() and len(sleeps) == 2
    assert f":{port}" in outcome.getMessage() and "/hook" not in outcome.getMessage()  # no path in the log


# -- when nothing is sent ----------------------------------------------------------------------


def test_webhook_off_sends_nothing_and_starts_no_thread(tmp_path, receive, sleeps):
    receiver = receive(200)
    threads = set(threading.enumerate())
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL="  ")
    check(app, batch())
    assert webhooks.KEY not in app.extensions
    assert set(threading.enumerate()) <= threads and receiver.requests == []


def test_a_batch_without_flags_sends_nothing(tmp_path, receive, outcomes, sleeps):
    receiver = receive(200)
    app = webhook_app(tmp_path, sleeps, WEBHOOK_URL=receiver.url)
    check(app, batch(batch_id=7, flagged=()))
    check(app, batch(batch_id=8))
    # Deliveries leave in order, so had the first batch been queued it would have arrived first.
    [outcome] = outcomes.wait_for(1)
    assert outcome.batch_id == 8
    assert [b["batch_id"] for b in receiver.bodies()] == [8]


def test_the_factory_turns_the_webhook_on_only_when_a_url_is_set(app_factory, monkeypatch):
    for name in ("LATENTDESK_WEBHOOK_URL", "LATENTDESK_WEBHOOK_SECRET"):
        monkeypatch.delenv(name, raising=False)
    assert webhooks.KEY not in app_factory().extensions
    sender = app_factory(WEBHOOK_URL="https://alerts.example/hooks/qa").extensions[webhooks.KEY]
    assert sender.settings.url == "https://alerts.example/hooks/qa"
    assert (sender.settings.attempts, sender.settings.timeout_seconds) == (5, 5)


# -- the body --------------------------------------------------------------------------------


def test_at_most_fifty_flagged_samples_are_listed():
    many = batch(flagged=range(60), n_samples=70)
    many["samples"][0]["spe"] = math.nan  # not JSON: sent as null
    body = webhooks.batch_payload(many, delivery_id="d-1", at=parsedate_to_datetime("Mon, 07 Dec 2026 08:30:00 GMT"))
    listed = [s["sample"] for s in body["flagged_samples"]]
    assert listed == [f"LOT-{i:03d}" for i in range(50)]
    assert (body["n_flagged"], body["more_flagged"]) == (60, 10)
    assert body["flagged_samples"][0]["spe"] is None
    assert body["time_utc"] == "2026-12-07T08:30:00.000000Z"
    json.dumps(body, allow_nan=False)


def test_retry_after_accepts_seconds_or_an_http_date():
    # RFC 9110, section 10.2.3 examples.
    date = "Fri, 31 Dec 1999 23:59:59 GMT"
    moment = parsedate_to_datetime(date).timestamp()
    assert retry_after_seconds("120", now=0) == 120
    assert retry_after_seconds(date, now=moment - 120) == 120
    assert retry_after_seconds(date, now=moment + 5) == 0
    assert retry_after_seconds("soon", now=0) is None and retry_after_seconds(None, now=0) is None


# -- configuration ------------------------------------------------------------------------------


@pytest.mark.parametrize("settings, message", [
    ({"WEBHOOK_URL": "ftp://alerts.example/secret-token"}, "http:// or https://"),
    ({"WEBHOOK_URL": "alerts.example/secret-token"}, "http:// or https://"),
    ({"WEBHOOK_URL": "https://"}, "no host name"),
    ({"WEBHOOK_URL": "http://:8080/secret-token"}, "no host name"),
    ({"WEBHOOK_URL": "https://alerts.example:99999/secret-token"}, "port"),
    ({"WEBHOOK_URL": "https://alerts.example/h", "WEBHOOK_ATTEMPTS": 0}, "WEBHOOK_ATTEMPTS must be at least 1"),
    ({"WEBHOOK_URL": "https://alerts.example/h", "WEBHOOK_TIMEOUT_SECONDS": "0"}, "WEBHOOK_TIMEOUT_SECONDS"),
    ({"WEBHOOK_URL": "https://alerts.example/h", "WEBHOOK_ATTEMPTS": "five"}, "WEBHOOK_ATTEMPTS must be a whole"),
])
def test_an_unusable_webhook_setting_is_refused_with_its_name(tmp_path, settings, message):
    with pytest.raises(ConfigError) as refused:
        load_config({"HOME": str(tmp_path), "SECRET_KEY": "s", **settings}, environ={})
    assert message in str(refused.value)
    assert "secret-token" not in str(refused.value)  # the address's path may hold a token


def test_a_bad_url_in_the_environment_stops_the_start(app_factory, monkeypatch):
    monkeypatch.setenv("LATENTDESK_WEBHOOK_URL", "ftp://alerts.example/hook")
    with pytest.raises(ConfigError, match="LATENTDESK_WEBHOOK_URL must be an http:// or https:// address"):
        app_factory()
