"""Outgoing alerts: a checked batch with flags is announced to the admin-configured URL.

Off unless ``LATENTDESK_WEBHOOK_URL`` is set.  ``init_app`` keeps a
``WebhookSender`` in ``app.extensions``; ``batch_checked`` is called once a
batch is committed and returns at once, the POST (with retries) running on
the sender's thread (``webhook_delivery``).  The body is small JSON; its
fields are listed in docs/api.md ("Alerts by webhook").

Statistics support, never replace, QA judgement and local procedures; the
body says so, for whoever reads it in a chat or ticket system.
"""

from __future__ import annotations

import json
import math
import time
import uuid
from datetime import datetime
from typing import Any, Callable, Mapping

from flask import Flask, current_app

from webapp.services import audit
from webapp.services.webhook_delivery import Delivery, WebhookSender, WebhookSettings

KEY = "latentdesk.webhooks"
EVENT = "batch_flagged"
MAX_LISTED = 50  # flagged samples named in one body; ``more_flagged`` counts the rest
BATCH_PAGE = "/monitoring/batches/{batch_id}"
CAUTION = ("Statistics support, never replace, QA judgement and local procedures; "
           "regulated use needs the site's own validation.")


def init_app(app: Flask, *, sleep: Callable[[float], None] = time.sleep) -> None:
    """Attach a sender to ``app`` when the webhook is configured (``sleep``: tests pass a fake)."""
    settings = WebhookSettings.from_config(app.config)
    if settings is None:
        app.extensions.pop(KEY, None)
    else:
        app.extensions[KEY] = WebhookSender(settings, sleep=sleep)


def _number(value: Any) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


def _flagged_sample(sample: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "sample": sample["sample"],
        "t2": _number(sample.get("t2")),
        "spe": _number(sample.get("spe")),
        "rules": [{"chart": r.get("chart"), "label": r.get("label")} for r in sample.get("rules") or []],
    }


def batch_payload(batch: Mapping[str, Any], *, delivery_id: str, at: datetime) -> dict[str, Any]:
    """The ``batch_flagged`` body for a batch dict as ``services.batches`` returns it."""
    flagged = [s for s in batch.get("samples") or [] if s.get("flagged")]
    model = batch.get("reference_model") or {}
    return {
        "event": EVENT,
        "delivery_id": delivery_id,
        "time_utc": audit.utc_iso(at),
        "batch_id": batch["id"],
        "link": BATCH_PAGE.format(batch_id=batch["id"]),
        "reference_model": {"id": batch["reference_model_id"], "name": model.get("name"),
                            "version": model.get("version")},
        "file_name": batch.get("file_name"),
        "file_sha256": batch.get("file_sha256"),
        "n_samples": batch.get("n_samples"),
        "n_flagged": batch.get("n_flagged"),
        "flagged_samples": [_flagged_sample(s) for s in flagged[:MAX_LISTED]],
        "more_flagged": max(0, int(batch.get("n_flagged") or 0) - min(len(flagged), MAX_LISTED)),
        "caution": CAUTION,
    }


def batch_checked(batch: Mapping[str, Any]) -> None:
    """Queue the alert for a committed batch that has flags; nothing when the webhook is off.

    Returns at once: the delivery runs on the app's webhook thread and its
    outcome is logged on ``latentdesk.webhooks``.  Call inside an app context.
    """
    sender: WebhookSender | None = current_app.extensions.get(KEY)
    if sender is None or not batch.get("n_flagged"):
        return
    delivery_id = str(uuid.uuid4())
    payload = batch_payload(batch, delivery_id=delivery_id, at=audit.now_utc())
    body = json.dumps(payload, ensure_ascii=False, allow_nan=False, separators=(",", ":")).encode("utf-8")
    sender.submit(Delivery(batch_id=batch["id"], delivery_id=delivery_id, event=EVENT, body=body))
