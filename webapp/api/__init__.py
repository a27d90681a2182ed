"""The JSON way in (``/api/v1``): one blueprint per resource family.

``BLUEPRINTS`` is the route table ``create_app`` registers; the response and
error shapes every blueprint shares live in ``webapp.api.datasets`` (``json_error``).
"""

from webapp.api import batch_reports, batches, datasets, monitoring, review

BLUEPRINTS = (datasets.bp, review.bp, monitoring.bp, batches.bp, batch_reports.bp)
