"""Rendering of the printable reports from the Jinja2 templates in ``webapp/templates``.

One set-up for every report: templates ending in ``.html`` are autoescaped, so a
value put into a template is shown as text, never read as markup (HTML Living
Standard, section 13.1.2); a template never marks user text as safe.  A missing
value (None) prints as nothing, not as the word "None".
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from jinja2 import Environment, FileSystemLoader, select_autoescape

TEMPLATES = Path(__file__).resolve().parent.parent / "templates"


def _blank_if_missing(value: Any) -> Any:
    return "" if value is None else value


def render(name: str, **context: Any) -> str:
    """The template ``name`` of ``TEMPLATES`` rendered with ``context``, escaped where it is HTML."""
    environment = Environment(
        loader=FileSystemLoader(TEMPLATES), autoescape=select_autoescape(["html"]), finalize=_blank_if_missing
    )
    return environment.get_template(name).render(**context)
