"""Delivering one JSON body to the configured webhook URL, off the caller's thread.

A ``WebhookSender`` belongs to one Flask app (``app.extensions``); it keeps a
small bounded queue and one daemon worker thread, started on the first
delivery (so a process forked by the server after ``create_app`` starts its
own).  Each delivery is POSTed with ``urllib`` and retried on connection
errors, timeouts, 5xx and 429 answers, waiting an exponentially growing,
jittered and capped time between attempts, or the answer's ``Retry-After``
(RFC 9110, section 10.2.3) within the same cap; any other answer outside
2xx ends it.  Redirects are not followed.  Every final outcome is logged on
the ``latentdesk.webhooks`` logger with ``webhook_outcome`` (``delivered``,
``gave_up``, ``dropped``), ``webhook_attempts`` and ``batch_id`` attached.

When a secret is set, each attempt carries ``X-LatentDesk-Timestamp`` (Unix
seconds) and ``X-LatentDesk-Signature: sha256=<hex>``, the HMAC-SHA256
(RFC 2104; SHA-256 from FIPS 180-4) of ``<timestamp>.`` followed by the exact
body bytes, so a receiver can check both the body and its freshness.
"""

from __future__ import annotations

import hashlib
import hmac
import http.client
import logging
import queue
import random
import threading
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from email.utils import parsedate_to_datetime
from typing import Any, Callable, Mapping
from urllib.parse import urlsplit

LOGGER = logging.getLogger("latentdesk.webhooks")
QUEUE_SIZE = 100  # deliveries waiting; more are dropped (and logged) rather than held in memory
RETRY_STATUSES = {429}  # plus every 5xx
USER_AGENT = "LatentDesk-webhook"


@dataclass(frozen=True)
class WebhookSettings:
    """The validated ``WEBHOOK_*`` settings (``webapp.config`` checks them at start)."""

    url: str
    secret: str | None
    attempts: int
    backoff_seconds: float
    backoff_max_seconds: float
    timeout_seconds: float

    @classmethod
    def from_config(cls, config: Mapping[str, Any]) -> WebhookSettings | None:
        """The settings, or None when ``WEBHOOK_URL`` is unset (the webhook is off)."""
        if not config.get("WEBHOOK_URL"):
            return None
        return cls(
            url=config["WEBHOOK_URL"], secret=config.get("WEBHOOK_SECRET") or None,
            attempts=config["WEBHOOK_ATTEMPTS"], backoff_seconds=config["WEBHOOK_BACKOFF_SECONDS"],
            backoff_max_seconds=config["WEBHOOK_BACKOFF_MAX_SECONDS"],
            timeout_seconds=config["WEBHOOK_TIMEOUT_SECONDS"],
        )

    @property
    def destination(self) -> str:
        """Scheme, host and port only: the path and any user info may hold a token."""
        parts = urlsplit(self.url)
        port = f":{parts.port}" if parts.port else ""
        return f"{parts.scheme}://{parts.hostname}{port}"


@dataclass(frozen=True)
class Delivery:
    """One body to send: the batch it is about, its delivery id and the JSON bytes."""

    batch_id: int
    delivery_id: str
    event: str
    body: bytes


@dataclass(frozen=True)
class _Answer:
    ok: bool
    retry: bool
    reason: str
    retry_after: float | None = None


class _NoRedirects(urllib.request.HTTPRedirectHandler):
    """A redirect becomes an HTTPError: the body and its signature go to the configured URL only."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


def signature(secret: str, timestamp: str, body: bytes) -> str:
    """``sha256=<hex>``: HMAC-SHA256 (RFC 2104) of ``<timestamp>.<body>`` under ``secret``."""
    message = timestamp.encode("ascii") + b"." + body
    return "sha256=" + hmac.new(secret.encode("utf-8"), message, hashlib.sha256).hexdigest()


def retry_after_seconds(value: str | None, now: float) -> float | None:
    """Seconds to wait from a ``Retry-After`` value (delay-seconds or an HTTP date); None if unusable."""
    if not value:
        return None
    text = value.strip()
    if text.isdigit():
        return float(text)
    try:
        moment = parsedate_to_datetime(text)
    except (TypeError, ValueError):
        return None
    if moment is None or moment.tzinfo is None:
        return None
    return max(0.0, moment.timestamp() - now)


def backoff_delay(retry: int, base: float, cap: float, rng: random.Random) -> float:
    """The wait before retry number ``retry`` (1, 2, ...): ``d = min(cap, base * 2**(retry-1))``,
    drawn uniformly from [d/2, d] ("equal jitter", common practice) so that many senders
    failing together do not retry in step."""
    delay = min(cap, base * 2 ** (retry - 1))
    return delay / 2 + rng.uniform(0, delay / 2)


class WebhookSender:
    """A bounded queue and one lazily started daemon thread POSTing to one URL.

    Parameters
    ----------
    settings : WebhookSettings
    sleep : callable
        Waits between attempts; tests pass one that records the delay and returns at once.
    rng : random.Random, optional
        Source of the jitter.
    clock : callable
        Unix time, for the timestamp header and HTTP-date ``Retry-After`` values.
    """

    def __init__(self, settings: WebhookSettings, *, sleep: Callable[[float], None] = time.sleep,
                 rng: random.Random | None = None, clock: Callable[[], float] = time.time):
        self.settings = settings
        self._sleep = sleep
        self._rng = rng or random.Random()
        self._clock = clock
        self._queue: queue.Queue[Delivery] = queue.Queue(maxsize=QUEUE_SIZE)
        self._opener = urllib.request.build_opener(_NoRedirects())
        self._start_lock = threading.Lock()
        self._thread: threading.Thread | None = None

    def submit(self, delivery: Delivery) -> None:
        """Queue ``delivery`` and return at once; a full queue drops it with a logged warning."""
        self._ensure_worker()
        try:
            self._queue.put_nowait(delivery)
        except queue.Full:
            self._log(logging.WARNING, delivery, "dropped", 0,
                      f"dropped: {QUEUE_SIZE} deliveries are already waiting")

    def _ensure_worker(self) -> None:
        with self._start_lock:
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._run, name="latentdesk-webhooks", daemon=True)
                self._thread.start()

    def _run(self) -> None:
        while True:
            delivery = self._queue.get()
            try:
                self.deliver(delivery)
            except Exception:  # the worker must outlive any one delivery
                LOGGER.exception("webhook for batch %s: unexpected error", delivery.batch_id,
                                 extra={"webhook_outcome": "gave_up", "webhook_attempts": None,
                                        "batch_id": delivery.batch_id})
            finally:
                self._queue.task_done()

    def deliver(self, delivery: Delivery) -> bool:
        """Send ``delivery`` with retries on this thread; log the final outcome; True when delivered."""
        settings = self.settings
        for attempt in range(1, settings.attempts + 1):
            answer = self._attempt(delivery)
            if answer.ok:
                self._log(logging.INFO, delivery, "delivered", attempt, f"delivered after {attempt} attempt(s)")
                return True
            if not answer.retry or attempt == settings.attempts:
                self._log(logging.WARNING, delivery, "gave_up", attempt,
                          f"gave up after {attempt} attempt(s): {answer.reason}")
                return False
            if answer.retry_after is not None:
                delay = min(answer.retry_after, settings.backoff_max_seconds)
            else:
                delay = backoff_delay(attempt, settings.backoff_seconds, settings.backoff_max_seconds, self._rng)
            LOGGER.debug("webhook for batch %s: attempt %d failed (%s); next in %.1f s",
                         delivery.batch_id, attempt, answer.reason, delay)
            self._sleep(delay)
        return False

    def _headers(self, delivery: Delivery) -> dict[str, str]:
        headers = {
            "Content-Type": "application/json; charset=utf-8", "User-Agent": USER_AGENT,
            "X-LatentDesk-Event": delivery.event, "X-LatentDesk-Delivery": delivery.delivery_id,
        }
        if self.settings.secret:
            timestamp = str(int(self._clock()))
            headers["X-LatentDesk-Timestamp"] = timestamp
            headers["X-LatentDesk-Signature"] = signature(self.settings.secret, timestamp, delivery.body)
        return headers

    def _attempt(self, delivery: Delivery) -> _Answer:
        request = urllib.request.Request(self.settings.url, data=delivery.body, method="POST",
                                         headers=self._headers(delivery))
        timeout = self.settings.timeout_seconds
        try:
            with self._opener.open(request, timeout=timeout) as response:
                response.read()
                return _Answer(ok=True, retry=False, reason=f"answered {response.status}")
        except urllib.error.HTTPError as error:
            with error:
                status = error.code
                if status in RETRY_STATUSES or status >= 500:
                    wait = retry_after_seconds(error.headers.get("Retry-After"), self._clock())
                    return _Answer(ok=False, retry=True, reason=f"answered {status}", retry_after=wait)
                note = " (redirects are not followed)" if 300 <= status < 400 else ""
                return _Answer(ok=False, retry=False, reason=f"answered {status}{note}")
        except urllib.error.URLError as error:
            if isinstance(error.reason, TimeoutError):
                return _Answer(ok=False, retry=True, reason=f"no answer within {timeout} s")
            return _Answer(ok=False, retry=True, reason=f"connection failed ({error.reason})")
        except TimeoutError:
            return _Answer(ok=False, retry=True, reason=f"no answer within {timeout} s")
        except (OSError, http.client.HTTPException) as error:
            return _Answer(ok=False, retry=True, reason=f"connection failed ({error.__class__.__name__}: {error})")

    def _log(self, level: int, delivery: Delivery, outcome: str, attempts: int, text: str) -> None:
        LOGGER.log(level, "webhook %s for batch %s to %s: %s", delivery.event, delivery.batch_id,
                   self.settings.destination, text,
                   extra={"webhook_outcome": outcome, "webhook_attempts": attempts, "batch_id": delivery.batch_id})
