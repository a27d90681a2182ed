"""Security headers on pages, API answers and assets (webapp.web.security_headers).

Sources: W3C (2023) Content Security Policy Level 3 (CSP3): script-src,
frame-ancestors and hash-source (the base64 of the SHA-256 digest of the script's
UTF-8 text); Ross, D., Gondrom, T. (2013) RFC 7034, X-Frame-Options; WHATWG Fetch
Standard, "X-Content-Type-Options"; W3C (2017) Referrer Policy, "same-origin".
"""

from __future__ import annotations

import base64
import hashlib
import re

import pytest

EXPECTED = {
    "X-Frame-Options": "DENY",  # RFC 7034
    "X-Content-Type-Options": "nosniff",  # WHATWG Fetch, "X-Content-Type-Options"
    "Referrer-Policy": "same-origin",  # W3C Referrer Policy
}


def _directives(response) -> dict[str, list[str]]:
    policy = response.headers["Content-Security-Policy"]
    return {name: sources for name, *sources in (part.split() for part in policy.split(";") if part.strip())}


def _assert_headers(response) -> dict[str, list[str]]:
    for name, value in EXPECTED.items():
        assert response.headers.get(name) == value, name
    directives = _directives(response)
    assert directives["frame-ancestors"] == ["'none'"]  # CSP3 frame-ancestors: no site may frame us
    assert directives["default-src"] == ["'self'"] and directives["object-src"] == ["'none'"]
    # CSP3 script-src: without 'unsafe-inline' an injected inline script does not run.
    assert "'unsafe-inline'" not in directives["script-src"]
    return directives


def test_the_dash_page_has_the_headers_and_hashes_for_each_inline_script(client, auth):
    auth.login("viewer")
    response = client.get("/")
    assert response.status_code == 200
    directives = _assert_headers(response)
    html = response.get_data(as_text=True)
    # Every inline script that runs (not the JSON config block) must be allowed by its hash (CSP3 hash-source).
    inline = [body for attrs, body in re.findall(r"<script([^>]*)>(.*?)</script>", html, re.S)
              if "src=" not in attrs and "application/json" not in attrs]
    assert inline, "the Dash page has inline scripts (its renderer start-up at least)"
    for body in inline:
        digest = base64.b64encode(hashlib.sha256(body.encode("utf-8")).digest()).decode("ascii")
        assert f"'sha256-{digest}'" in directives["script-src"], body[:80]


def test_the_sign_in_form_and_refusals_have_the_headers(client):
    _assert_headers(client.get("/-/login"))
    _assert_headers(client.get("/datasets/1"))  # 302 to the sign-in form


@pytest.mark.parametrize("path", ["/api/v1/datasets", "/health"])
def test_api_answers_have_the_headers(client, auth, path):
    response = client.get(path, headers=auth.token("viewer"))
    assert response.status_code == 200
    _assert_headers(response)


def test_a_refused_api_call_has_the_headers(client):
    response = client.get("/api/v1/datasets")
    assert response.status_code == 401
    _assert_headers(response)


def test_assets_and_dash_bundles_have_the_headers(client, auth):
    _assert_headers(client.get("/assets/latentdesk.css"))
    auth.login("viewer")
    html = client.get("/").get_data(as_text=True)
    bundle = re.search(r'<script src="(/_dash-component-suites/[^"]+)"', html).group(1)
    response = client.get(bundle)
    assert response.status_code == 200
    _assert_headers(response)
