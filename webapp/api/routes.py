"""The route table: every JSON blueprint, in the order ``create_app`` registers them."""

from webapp.api import accounts, batch_reports, batches, datasets, monitoring, projects, review, screening

BLUEPRINTS = (datasets.bp, review.bp, monitoring.bp, batches.bp, batch_reports.bp, screening.bp, accounts.bp, projects.bp)
