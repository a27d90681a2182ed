"""Unknown addresses answer 404: Dash serves its page shell for any path, so the
server checks the path against the registered pages before Dash sees it.

A template part named ``<..._id>`` is a row id and must be spelled as one
(``webapp.store.ids.parse_id``: ASCII digits, 1 to MAX_ID), else the path is no
page; ``TOKEN_PARTS`` are the exceptions, ids that are not row numbers.
"""

from __future__ import annotations

import dash
from flask import request

from webapp.auth import denial, matches_path_template
from webapp.store.ids import parse_id
from webapp.web.ui import ids

DASH_CATCH_ALL = ("/", "/<path:path>")  # the endpoints under which Dash serves its page shell
TOKEN_PARTS = {"view_id"}  # a saved view is named by a random token (webapp.services.views)


def _ids_fit(template: str, path: str) -> bool:
    for part, value in zip(template.strip("/").split("/"), path.strip("/").split("/")):
        name = part[1:-1] if part.startswith("<") and part.endswith(">") else ""
        if name.endswith("_id") and name not in TOKEN_PARTS and parse_id(value) is None:
            return False
    return True


def _fits(page: dict, path: str) -> bool:
    template = page.get("path_template")
    return page.get("path") == path or (matches_path_template(template, path) and _ids_fit(template, path))


def is_page(path: str) -> bool:
    """Whether ``path`` is the path of a registered page or fits a page's template, its row ids
    well formed (OWASP Input Validation Cheat Sheet: allow-list syntax before use)."""
    normal = "/" + path.strip("/")
    return any(_fits(page, normal) for page in dash.page_registry.values())


def refuse_unknown_pages():
    """``before_request`` hook: a 404 page (with status 404) for a path no page serves."""
    if request.endpoint in DASH_CATCH_ALL and not is_page(request.path):
        return denial(404, f"There is no page at {request.path}.")
    return None


def page_templates() -> list[str]:
    """The path templates of the registered pages that name something by id."""
    return [p["path_template"] for p in dash.page_registry.values() if p.get("path_template")]


# Dash components whose value names the thing a callback is about (``webapp.auth.projects``).
PROJECT_CONTEXT_IDS = {ids.DATASET_ID: "dataset", ids.MON_PROPOSE_MODEL: "model", ids.UPLOAD_PROJECT: "project"}
