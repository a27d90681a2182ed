"""The sign-in form, sign-out and choosing a new password (plain Flask, so they work without JavaScript).

Both live under the reserved ``/-/`` prefix, which user-named things never use.
"""

from __future__ import annotations

import time

from flask import Blueprint, current_app, make_response, redirect, render_template_string, request, session, url_for
from flask_login import current_user, login_user, logout_user

from webapp import auth
from webapp.auth import passwords, sessions
from webapp.web.ui.messages import as_sentence

bp = Blueprint("auth", __name__)

_PAGE = """<!doctype html>
<html lang="en">
<head>
  <meta charset="utf-8">
  <meta name="viewport" content="width=device-width, initial-scale=1">
  <title>{{ title }} · LatentDesk</title>
  <link rel="stylesheet" href="/assets/latentdesk.css">
</head>
<body class="ld-plain">
  <main class="ld-card">
    <p class="ld-brand">LatentDesk</p>
    {% block body %}{% endblock %}
  </main>
</body>
</html>"""

_LOGIN = _PAGE.replace("{% block body %}{% endblock %}", """
    <h1>Sign in</h1>
    {% if message %}<p class="ld-alert" role="alert">{{ message }}</p>{% endif %}
    {% if sso_url %}<p><a class="ld-button" href="{{ sso_url }}">Sign in with single sign-on</a></p>{% endif %}
    {% if local_signin %}
    <form method="post" action="{{ action }}" class="ld-form">
      <input type="hidden" name="csrf_token" value="{{ csrf }}">
      <input type="hidden" name="next" value="{{ next_path }}">
      <label for="name">User name</label>
      <input id="name" name="name" autocomplete="username" required autofocus value="{{ name }}">
      <label for="password">Password</label>
      <input id="password" name="password" type="password" autocomplete="current-password" required>
      <button type="submit" class="ld-button">Sign in</button>
    </form>
    {% endif %}
""")

_SIGN_OUT = _PAGE.replace("{% block body %}{% endblock %}", """
    <h1>Sign out</h1>
    <form method="post" action="{{ action }}" class="ld-form">
      <input type="hidden" name="csrf_token" value="{{ csrf }}">
      <button type="submit" class="ld-button">Sign out</button>
    </form>
    <p><a href="/">Back to the datasets</a></p>
""")

_CHOOSE_PASSWORD = _PAGE.replace("{% block body %}{% endblock %}", """
    <h1>Choose a new password</h1>
    {% if due %}<p>An administrator set the password you signed in with. Choose your own before anything
    else; it is not shown to anyone.</p>{% endif %}
    {% if message and done %}<p class="ld-success" role="status">{{ message }}</p>
    {% elif message %}<p class="ld-alert" role="alert">{{ message }}</p>{% endif %}
    {% if not done %}
    <form method="post" action="{{ action }}" class="ld-form">
      <input type="hidden" name="csrf_token" value="{{ csrf }}">
      <input type="hidden" name="next" value="{{ next_path }}">
      <label for="old_password">Current password</label>
      <input id="old_password" name="old_password" type="password" autocomplete="current-password" required>
      <label for="new_password">New password</label>
      <input id="new_password" name="new_password" type="password" autocomplete="new-password" required
             minlength="{{ min_length }}" aria-describedby="password-rules">
      <p id="password-rules" class="ld-muted">At least {{ min_length }} characters; a phrase of a few words is
      easy to remember. Commonly used passwords, repeated or consecutive characters and your user name are
      refused.</p>
      <label for="repeat_password">New password again</label>
      <input id="repeat_password" name="repeat_password" type="password" autocomplete="new-password" required>
      <button type="submit" class="ld-button">Set the new password</button>
    </form>
    {% else %}
    <p><a href="{{ next_path }}">Go on</a></p>
    {% endif %}
    <form method="post" action="{{ logout }}" class="ld-form">
      <input type="hidden" name="csrf_token" value="{{ csrf }}">
      <button type="submit" class="ld-link-button">Sign out</button>
    </form>
""")

_ERROR = _PAGE.replace("{% block body %}{% endblock %}", """
    <h1>{{ title }}</h1>
    <p>{{ message }}</p>
    <p><a href="/">Back to the datasets</a></p>
""")


def error_page(status: int, message: str):
    titles = {403: "Not allowed", 404: "Not found"}
    html = render_template_string(_ERROR, title=titles.get(status, "Error"), message=message)
    return make_response(html, status)


@bp.record_once
def _register_error_page(state) -> None:
    state.app.extensions[auth.ERROR_PAGE_KEY] = error_page


def _login_form(message: str = "", name: str = "", next_path: str = "/", status: int = 200):
    html = render_template_string(
        _LOGIN,
        title="Sign in",
        message=message,
        name=name,
        next_path=auth.safe_next(next_path),
        csrf=auth.csrf_token(),
        action=auth.LOGIN_PATH,
        local_signin=current_app.config["LOCAL_SIGNIN"],
        sso_url=url_for("oidc.login", next=auth.safe_next(next_path)) if "oidc.login" in current_app.view_functions else None,
    )
    response = make_response(html, status)
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.route(auth.LOGIN_PATH, methods=["GET", "POST"], endpoint="login")
def login():
    next_path = auth.safe_next(request.values.get("next"))
    if request.method == "GET":
        if current_user.is_authenticated:
            return redirect(next_path)
        return _login_form(next_path=next_path)

    name = (request.form.get("name") or "").strip()
    if not current_app.config["LOCAL_SIGNIN"]:
        return _login_form("Sign-in with a password is switched off here; use single sign-on.", status=403)
    if not auth.csrf_valid(request.form.get("csrf_token")):
        return _login_form("The form expired. Please sign in again.", name, next_path, 400)
    try:
        user = auth.attempt_login(name, request.form.get("password") or "", auth.client_address())
    except auth.LoginRefused as refused:
        return _login_form(str(refused), name, next_path, 401)
    start_session(user)
    return redirect(next_path)


def start_session(user: auth.CurrentUser) -> None:
    """What every successful sign-in does next, by password or by single sign-on."""
    sessions.revoke_current(sessions.REPLACED)  # whoever was signed in here before
    session.clear()  # a fresh session on sign-in (no fixation)
    # Not a "permanent" session: flask-login's strong protection only acts on
    # browser-session cookies. Its lifetime is enforced by auth.guard_request.
    session[auth.SIGNED_IN_AT_KEY] = int(time.time())
    login_user(user, fresh=True)
    sessions.start(user.id)
    auth.csrf_token()


def refused_page(message: str, status: int = 403):
    """The sign-in page with a refusal that did not come from the password form."""
    return _login_form(message, status=status)


@bp.route(auth.LOGOUT_PATH, methods=["GET", "POST"], endpoint="logout")
def logout():
    """POST with the form's CSRF token signs out; a GET (a link, an image on another site) only asks.

    OWASP Cross-Site Request Forgery Prevention Cheat Sheet: no state change on GET.
    """
    if request.method == "GET":
        html = render_template_string(_SIGN_OUT, title="Sign out", csrf=auth.csrf_token(), action=auth.LOGOUT_PATH)
        response = make_response(html)
        response.headers["Cache-Control"] = "no-store"
        return response
    if not auth.csrf_valid(request.form.get("csrf_token")):
        return error_page(400, "The form expired. Reload the page and sign out again.")
    sessions.revoke_current(sessions.SIGNED_OUT)
    logout_user()
    session.clear()
    return redirect(url_for("auth.login"))


def _choose_form(message: str = "", next_path: str = "/", status: int = 200, done: bool = False):
    html = render_template_string(
        _CHOOSE_PASSWORD,
        title="Choose a new password",
        message=message,
        done=done,
        due=current_user.must_change_password and not done,
        next_path=auth.safe_next(next_path),
        csrf=auth.csrf_token(),
        action=auth.PASSWORD_PATH,
        logout=auth.LOGOUT_PATH,
        min_length=passwords.MIN_LENGTH,
    )
    response = make_response(html, status)
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.route(auth.PASSWORD_PATH, methods=["GET", "POST"], endpoint="choose_password")
def choose_password():
    """Choose a new password: where a user whose password an administrator set is sent first.

    Any signed-in user may use it; the current password is asked again, every
    other session of the user ends, and the change goes into the admin log
    (``webapp.services.my_account.change_password``).
    """
    from analysis.errors import InputError
    from webapp.services import my_account

    next_path = auth.safe_next(request.values.get("next"))
    if request.method == "GET":
        return _choose_form(next_path=next_path)
    if not auth.csrf_valid(request.form.get("csrf_token")):
        return _choose_form("The form expired. Please fill it in again.", next_path, 400)
    new_password = request.form.get("new_password") or ""
    if new_password != (request.form.get("repeat_password") or ""):
        return _choose_form("The two new passwords differ; nothing was changed.", next_path, 400)
    try:
        my_account.change_password(current_user, request.form.get("old_password") or "", new_password)
    except InputError as exc:
        return _choose_form(as_sentence(str(exc)), next_path, 400)
    return _choose_form("Your new password is set. Your other sessions have ended.", next_path, done=True)
