"""In headless Chromium: the Content-Security-Policy lets the app work and blocks nothing it needs.

The dataset page of the lab demo (SVG plots) and of an invented dataset large enough for
WebGL score plots (``figures.WEBGL_THRESHOLD``: Plotly's scattergl through regl) must draw
with no ``securitypolicyviolation`` event and no CSP message on the console.

Sources: W3C (2023) Content Security Policy Level 3: violation reporting (the
``securitypolicyviolation`` event) and frame-ancestors.
"""

from __future__ import annotations

import io

import numpy as np

from tests.e2e.conftest import analyst_on_lab_demo
from webapp.web.ui.figures import WEBGL_THRESHOLD

FIT_WAIT = 90_000
# Collected before any page script runs, in every document the page opens.
VIOLATION_LISTENER = """
window.__cspViolations = [];
document.addEventListener('securitypolicyviolation', (e) => window.__cspViolations.push(
    `${e.effectiveDirective} blocked ${e.blockedURI || 'inline'} at ${e.sourceFile}:${e.lineNumber}`));
"""
# Pixels whose channels differ by more than 60 of 255 (markers; gridlines and text are grey).
COLOURED_WEBGL_PIXELS = """() => {
    const gd = document.querySelector('#graph-scores .js-plotly-plot');
    const scene = gd._fullLayout._plots.xy._scene;
    scene.draw();
    const canvas = document.querySelector('#graph-scores .gl-canvas-context');
    const gl = canvas.getContext('webgl') || canvas.getContext('experimental-webgl');
    const pixels = new Uint8Array(gl.drawingBufferWidth * gl.drawingBufferHeight * 4);
    gl.readPixels(0, 0, gl.drawingBufferWidth, gl.drawingBufferHeight, gl.RGBA, gl.UNSIGNED_BYTE, pixels);
    let coloured = 0;
    for (let i = 0; i < pixels.length; i += 4) {
        const [r, g, b, a] = pixels.subarray(i, i + 4);
        if (a > 0 && Math.max(r, g, b) - Math.min(r, g, b) > 60) coloured += 1;
    }
    return coloured;
}"""


def _watch(page) -> list[str]:
    """Console lines that report a CSP refusal, filled as the page runs."""
    page.add_init_script(VIOLATION_LISTENER)
    reported: list[str] = []
    page.on("console", lambda message: reported.append(message.text)
            if "Content Security Policy" in message.text or "Refused to" in message.text else None)
    page.on("pageerror", lambda error: reported.append(f"page error: {error}"))
    return reported


def _no_violations(page, reported: list[str]) -> None:
    events = page.evaluate("window.__cspViolations")
    assert events == [] and reported == [], events + reported


def _invented_many_samples(n: int, seed: int = 41) -> bytes:
    """Invented readings: three correlated gauges and a station letter; made up for this test."""
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 2))
    values = latent @ np.array([[1.0, 0.7, -0.4], [0.2, -0.5, 0.9]]) + 0.3 * rng.normal(size=(n, 3))
    out = io.StringIO()
    out.write("reading,station,gauge a,gauge b,gauge c\n")
    for i, row in enumerate(values):
        out.write(f"R{i + 1:05d},{'PQR'[i % 3]},{row[0] + 20:.4f},{row[1] + 5:.4f},{row[2] + 60:.4f}\n")
    return out.getvalue().encode()


def test_the_lab_dataset_page_draws_under_the_policy(demo_server, new_page):
    page = new_page()
    reported = _watch(page)
    page, dataset_id = analyst_on_lab_demo(lambda: page, demo_server)
    response = page.goto(f"{demo_server.url}/datasets/{dataset_id}")
    assert "frame-ancestors 'none'" in response.headers["content-security-policy"]
    assert response.headers["x-frame-options"] == "DENY"
    page.wait_for_selector("#graph-scores .scatterlayer .point", timeout=FIT_WAIT)
    # Saving a picture: Plotly draws the SVG into an image from a data: URL (img-src).
    with page.expect_download() as download:
        page.locator("#graph-scores").locator("xpath=..").get_by_role("button", name="PNG").click()
    assert download.value.suggested_filename.endswith(".png")
    page.locator(".ld-tab", has_text="Diagnostics").click()
    page.wait_for_selector("#graph-t2-spe .scatterlayer .point", timeout=FIT_WAIT)
    page.wait_for_timeout(500)  # let late scripts (hover layers, modebar) run
    _no_violations(page, reported)


def test_webgl_score_plots_draw_under_the_policy(demo_server, new_page):
    from webapp.services import ingest
    from webapp.store import accounts, session_scope

    n = WEBGL_THRESHOLD + 500
    with demo_server.app.app_context():
        with session_scope() as s:
            owner = accounts.get_user_by_name(s, "ana").id
        dataset = ingest.ingest_upload(_invented_many_samples(n), "csp_webgl_readings.csv", owner)

    page = new_page()
    reported = _watch(page)
    page, _ = analyst_on_lab_demo(lambda: page, demo_server)
    page.goto(f"{demo_server.url}/datasets/{dataset['id']}")
    page.wait_for_selector("#graph-scores .gl-canvas-context", state="attached", timeout=FIT_WAIT)
    drawn = page.wait_for_function(
        """() => {
            const gd = document.querySelector('#graph-scores .js-plotly-plot');
            const scene = gd && gd._fullLayout && gd._fullLayout._plots.xy._scene;
            const traces = (gd && gd._fullData || []).filter(t => t.type === 'scattergl');
            return scene && scene.scatter2d && traces.length
                ? traces.reduce((sum, t) => sum + t.x.length, 0) : 0;
        }""", timeout=FIT_WAIT).json_value()
    assert drawn == n
    page.wait_for_timeout(500)
    _no_violations(page, reported)
    # The WebGL canvas holds coloured markers: redraw it and read its pixels in the same
    # task, before the browser composites and clears the drawing buffer.
    coloured = page.evaluate(COLOURED_WEBGL_PIXELS)
    assert coloured > 500, coloured
