"""The route table: every JSON blueprint, in the order ``create_app`` registers them."""

from webapp.api import batch_reports, batches, datasets, monitoring, review

BLUEPRINTS = (datasets.bp, review.bp, monitoring.bp, batches.bp, batch_reports.bp)
