"""The application factory: ``create_app`` builds the Flask server, then mounts Dash.

Order: configuration -> store (engine, migrations) -> accounts (flask-login,
request guard) -> blueprints -> Dash pages. ``create_app`` returns the Flask
server (the WSGI app gunicorn runs); the Dash app is kept in
``server.extensions["latentdesk.dash"]``.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, Mapping

from flask import Flask
from werkzeug.middleware.proxy_fix import ProxyFix

from webapp.config import load_config

PACKAGE = Path(__file__).resolve().parent
DASH_KEY = "latentdesk.dash"
# Dash's page template with the page language set (WCAG 2.2, 3.1.1) and its scripts in a
# plain div: the page's own footer is its only contentinfo landmark.
INDEX_STRING = """<!DOCTYPE html>
<html lang="en">
    <head>
        {%metas%}
        <title>{%title%}</title>
        {%favicon%}
        {%css%}
    </head>
    <body>
        {%app_entry%}
        <div class="ld-scripts">
            {%config%}
            {%scripts%}
            {%renderer%}
        </div>
    </body>
</html>"""


def _register_blueprints(server: Flask) -> None:
    """The plain Flask routes: sign-in and sign-out, then the JSON API. Routes take row ids
    as ``<id:name>`` (``webapp.api.responses.IdConverter``); a JSON body too large or too
    deeply nested is refused before any view reads it (after the sign-in check)."""
    from webapp.api.responses import install_request_checks
    from webapp.api.routes import BLUEPRINTS
    from webapp.web import oidc_signin, signin

    install_request_checks(server)
    server.register_blueprint(signin.bp)
    oidc_signin.init_app(server)  # single sign-on, only when LATENTDESK_OIDC_ISSUER is set
    for blueprint in BLUEPRINTS:
        server.register_blueprint(blueprint)


def _assets_folder() -> Path:
    """The CSS and icons: the checkout's top-level assets/, or the copy a non-editable
    install puts under <prefix>/share/latentdesk/assets (pyproject data-files)."""
    for folder in (PACKAGE.parent / "assets", Path(sys.prefix) / "share" / "latentdesk" / "assets"):
        if folder.is_dir():
            return folder
    raise RuntimeError("LatentDesk's assets folder is missing; reinstall the package")


def _mount_dash(server: Flask) -> None:
    import dash

    from webapp import jobs
    from webapp.auth import projects
    from webapp.web import page_paths
    from webapp.web.ui import shell

    app = dash.Dash(
        "webapp",
        server=server,
        use_pages=True,
        pages_folder=str(PACKAGE / "web" / "pages"),
        assets_folder=str(_assets_folder()),
        url_base_pathname="/",
        suppress_callback_exceptions=True,
        background_callback_manager=jobs.make_manager(server.config),
        title="LatentDesk",
        update_title=None,
        index_string=INDEX_STRING,
    )
    app.layout = shell.layout
    shell.guard_page_layouts()
    server.before_request(page_paths.refuse_unknown_pages)
    projects.init_app(server, context_ids=page_paths.PROJECT_CONTEXT_IDS, templates=page_paths.page_templates())
    # Dash copies callbacks declared with ``dash.callback`` into the first app
    # that serves a request. Doing that now keeps each app built by
    # ``create_app`` complete even when a process builds several (tests).
    with server.test_request_context("/"):
        app._setup_server()
    server.extensions[DASH_KEY] = app


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the app from defaults, the home folder, LATENTDESK_* and ``config``.

    Raises webapp.config.ConfigError when a setting is unusable or the secret
    key is missing outside demo mode.
    """
    from webapp import auth, store
    from webapp.services import webhooks
    from webapp.web import security_headers

    settings = load_config(config)
    Path(settings["HOME"]).mkdir(parents=True, exist_ok=True)
    server = Flask("webapp", instance_path=settings["HOME"], static_folder=None)
    server.config.update(settings)
    # A page upload travels base64-encoded inside a callback (4/3 of the bytes).
    server.config["MAX_CONTENT_LENGTH"] = settings["MAX_UPLOAD_MB"] * 1024**2 * 3 // 2 + 1024**2
    if settings["PROXY_HOPS"]:
        hops = settings["PROXY_HOPS"]
        server.wsgi_app = ProxyFix(server.wsgi_app, x_for=hops, x_proto=hops, x_host=hops)

    store.init_app(server)
    auth.init_app(server)
    webhooks.init_app(server)
    _register_blueprints(server)
    _mount_dash(server)
    security_headers.init_app(server, server.extensions[DASH_KEY].csp_hashes)
    return server
