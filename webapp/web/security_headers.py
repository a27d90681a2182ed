"""Security headers on every response: pages, API answers, reports and assets.

Content-Security-Policy (W3C Content Security Policy Level 3), source by source:

- ``default-src 'self'``: anything not named below comes from this server only.
- ``script-src 'self'``: Dash's renderer, the component bundles and Plotly come from
  ``/_dash-component-suites/`` and ``/assets/``; plus
  - the SHA-256 hashes of Dash's inline scripts (``dash.Dash.csp_hashes``): the line
    that starts the renderer and the clientside callbacks. Hashes, not
    ``'unsafe-inline'``, so an injected ``<script>`` still does not run;
  - ``'unsafe-eval'``: Plotly draws large score plots with WebGL (``scattergl``, above
    ``figures.WEBGL_THRESHOLD`` points) through regl, which builds its draw calls with
    ``new Function``; without it those plots stay empty.
- ``style-src 'self' 'unsafe-inline'``: Dash's renderer and its core components
  (which bundle Plotly) add ``<style>`` elements at run time, and the sign-off and
  batch reports carry their style in the page. Styles cannot run code.
- ``img-src 'self' data: blob:``: saving a plot as a picture, Plotly turns the SVG into
  an image through ``data:`` and ``blob:`` URLs; without either the download never comes.
- ``connect-src 'self'``: Dash's callbacks and the page's API calls.
- ``object-src 'none'``, ``base-uri 'self'``, ``form-action 'self'``: no plugins, no
  ``<base>`` pointing elsewhere, forms (sign-in, sign-out) post to this server only.
- ``frame-ancestors 'none'`` (and the older ``X-Frame-Options: DENY``): no page may
  be framed by another site (clickjacking).

Also ``X-Content-Type-Options: nosniff`` (files are read as the type they are served
with) and ``Referrer-Policy: same-origin`` (links to other sites get no Referer, so
dataset ids in URLs stay here).

A response that sets one of these headers itself keeps its own value. The script,
style and image sources above were each checked by taking them out: the browser test
(tests/e2e/test_security_headers.py) then fails.

References
----------
W3C (2023) Content Security Policy Level 3: fetch directives (script-src, style-src,
img-src), navigation directives (frame-ancestors, form-action) and hash-source
expressions. W3C (2017) Referrer Policy ("same-origin"). WHATWG Fetch Standard,
"X-Content-Type-Options". Ross, D., Gondrom, T. (2013) RFC 7034, HTTP Header Field
X-Frame-Options. OWASP HTTP Headers and Clickjacking Defense Cheat Sheets (common practice).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

from flask import Flask, Response

REFERRER_POLICY = "same-origin"


def content_security_policy(inline_script_hashes: Iterable[str]) -> str:
    """The policy for this app; ``inline_script_hashes`` as ``'sha256-…'`` sources."""
    directives = {
        "default-src": ["'self'"],
        "script-src": ["'self'", *dict.fromkeys(inline_script_hashes), "'unsafe-eval'"],
        "style-src": ["'self'", "'unsafe-inline'"],
        "img-src": ["'self'", "data:", "blob:"],
        "connect-src": ["'self'"],
        "object-src": ["'none'"],
        "base-uri": ["'self'"],
        "form-action": ["'self'"],
        "frame-ancestors": ["'none'"],
    }
    return "; ".join(f"{name} {' '.join(sources)}" for name, sources in directives.items())


def header_values(inline_script_hashes: Iterable[str]) -> tuple[tuple[str, str], ...]:
    """Every header this module adds, as (name, value) pairs."""
    return (
        ("Content-Security-Policy", content_security_policy(inline_script_hashes)),
        ("X-Frame-Options", "DENY"),
        ("X-Content-Type-Options", "nosniff"),
        ("Referrer-Policy", REFERRER_POLICY),
    )


def init_app(server: Flask, inline_script_hashes: Callable[[], Iterable[str]]) -> None:
    """Add the headers to every response ``server`` sends.

    ``inline_script_hashes`` is ``dash.Dash.csp_hashes``. It is asked at each response,
    not once: Dash adds an inline script of its own (the page-title callback of
    ``use_pages``) while it serves its first request.
    """

    def add_security_headers(response: Response) -> Response:
        for name, value in header_values(inline_script_hashes()):
            response.headers.setdefault(name, value)
        return response

    server.after_request(add_security_headers)
