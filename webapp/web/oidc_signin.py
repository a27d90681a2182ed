"""Single sign-on routes: ``/-/oidc/login`` sends the browser to the OpenID provider,
``/-/oidc/callback`` completes the sign-in. The protocol lives in ``webapp.auth.oidc``;
a successful sign-in then goes the way a password sign-in does (``signin.start_session``).
"""

from __future__ import annotations

from flask import Blueprint, Flask, make_response, redirect, request, url_for
from flask_login import current_user

from webapp import auth
from webapp.auth import oidc
from webapp.web import signin

bp = Blueprint("oidc", __name__)


def init_app(server: Flask) -> None:
    """Mount the routes when single sign-on is configured (ConfigError when its settings are unusable)."""
    if oidc.enabled(server.config):
        oidc.init_app(server)
        server.register_blueprint(bp)


def _no_store(response):
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.route(auth.OIDC_LOGIN_PATH, methods=["GET"], endpoint="login")
def login():
    next_path = auth.safe_next(request.args.get("next"))
    if current_user.is_authenticated:
        return redirect(next_path)
    try:
        target = oidc.begin(url_for("oidc.callback", _external=True), next_path)
    except oidc.SignInRefused as refused:
        return signin.refused_page(str(refused), 502)
    return _no_store(make_response(redirect(target)))


@bp.route(auth.OIDC_CALLBACK_PATH, methods=["GET"], endpoint="callback")
def callback():
    try:
        user, next_path = oidc.finish(request.args, auth.client_address())
    except oidc.SignInRefused as refused:
        return signin.refused_page(str(refused), 403)
    signin.start_session(user)
    return _no_store(make_response(redirect(next_path)))
