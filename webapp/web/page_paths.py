"""Unknown addresses answer 404: Dash serves its page shell for any path, so the
server checks the path against the registered pages before Dash sees it."""

from __future__ import annotations

import dash
from flask import request

from webapp.auth import denial, matches_path_template

DASH_CATCH_ALL = ("/", "/<path:path>")  # the endpoints under which Dash serves its page shell


def is_page(path: str) -> bool:
    """Whether ``path`` is the path of a registered page or fits a page's template."""
    normal = "/" + path.strip("/")
    return any(page.get("path") == normal or matches_path_template(page.get("path_template"), normal)
               for page in dash.page_registry.values())


def refuse_unknown_pages():
    """``before_request`` hook: a 404 page (with status 404) for a path no page serves."""
    if request.endpoint in DASH_CATCH_ALL and not is_page(request.path):
        return denial(404, f"There is no page at {request.path}.")
    return None
