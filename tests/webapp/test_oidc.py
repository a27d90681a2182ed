"""Single sign-on by OpenID Connect against a real provider run here (tests/webapp/oidc_provider.py).

The provider is built from Authlib's own server components and serves HTTP on
127.0.0.1; our app talks to it over the network exactly as it would to a
production provider (discovery, JWKS, token endpoint). The browser is played by
Flask's test client (our side) and ``requests`` (the provider's side), following
each redirect by hand.

Sources for the checks:
- OpenID Connect Core 1.0 (Sakimura, Bradley, Jones, de Medeiros, Mortimore, 2014):
  3.1.2.1 (authentication request: state, nonce), 3.1.3.7 (ID token validation:
  item 2 iss, item 3 aud, items 6-8 signature, item 9 exp, item 11 nonce),
  5.7 (issuer + sub identify the user).
- OpenID Connect Discovery 1.0 (Sakimura, Bradley, Jones, Jay, 2014), 4.3 (issuer match).
- RFC 6749 (Hardt, 2012), OAuth 2.0: 4.1.1 (authorization request), 4.1.2 (a code is
  used once), 10.12 (state against cross-site request forgery).
- RFC 7636 (Sakimura, Bradley, Agarwal, 2015), PKCE: 4.2 (S256 challenge), 4.5, 4.6.
"""

from __future__ import annotations

import base64
import hashlib
import json
import time
import uuid
from urllib.parse import parse_qs, urlsplit

import pytest
import requests
from joserfc.jwk import RSAKey
from sqlalchemy import func, select

from tests.webapp.conftest import add_user, login
from tests.webapp.oidc_provider import OpenIDProvider
from webapp import auth as webapp_auth
from webapp.auth import oidc
from webapp.config import ConfigError, load_config
from webapp.store import accounts, session_scope
from webapp.store.tables import LoginAttempt, OidcIdentity, User

CLIENT_ID = "latentdesk-under-test"
CLIENT_SECRET = "provider-issued-secret-" + uuid.uuid4().hex
# Flask's test client addresses the app as http://localhost.
REDIRECT_URI = "http://localhost/-/oidc/callback"
ROLE_MAP = "qa-viewers=viewer,qa-analysts=analyst,qa-reviewers=reviewer,qa-admins=admin"


@pytest.fixture
def provider():
    running = OpenIDProvider(CLIENT_ID, CLIENT_SECRET, REDIRECT_URI).start()
    _set_user(running)
    yield running
    running.stop()


@pytest.fixture
def sso_settings(provider):
    return {
        "OIDC_ISSUER": provider.issuer,
        "OIDC_CLIENT_ID": CLIENT_ID,
        "OIDC_CLIENT_SECRET": CLIENT_SECRET,
        "OIDC_ROLE_MAP": ROLE_MAP,
    }


@pytest.fixture
def sso_app(app_factory, sso_settings):
    return app_factory(**sso_settings)


def _start(client, next_path: str = "/") -> str:
    """Our app's redirect to the provider, then the provider's answer: the callback path."""
    start = client.get("/-/oidc/login", query_string={"next": next_path})
    assert start.status_code == 302, start.get_data(as_text=True)
    answer = requests.get(start.headers["Location"], allow_redirects=False, timeout=10)
    assert answer.status_code == 302, answer.text
    callback = answer.headers["Location"]
    assert callback.startswith(REDIRECT_URI + "?"), callback
    parts = urlsplit(callback)
    return f"{parts.path}?{parts.query}"


def sign_in(client, next_path: str = "/"):
    """A whole sign-in; returns (our callback response, the callback path the provider sent)."""
    callback = _start(client, next_path)
    return client.get(callback), callback


def _signed_in_as(client) -> str | None:
    """The shell's layout names the signed-in user; None when the browser is not signed in."""
    response = client.get("/_dash-layout")
    return json.dumps(response.get_json()) if response.status_code == 200 else None


def _users(app):
    with app.app_context(), session_scope() as s:
        return [(u.name, u.role, u.display_name) for u in s.scalars(select(User).order_by(User.id))]


def _identities(app):
    with app.app_context(), session_scope() as s:
        return s.scalar(select(func.count(OidcIdentity.id)))


def _set_user(provider, sub="subject-0001", groups=("qa-analysts",), **claims):
    provider.user = {"sub": sub, "groups": list(groups), **claims}


# -- the whole flow ---------------------------------------------------------------

def test_a_full_sign_in_creates_the_user_with_the_mapped_role(sso_app, provider):
    _set_user(provider, preferred_username="dana.lab", name="Dana Lab")
    client = sso_app.test_client()
    response, _ = sign_in(client, next_path="/datasets/7")
    assert response.status_code == 302 and response.headers["Location"] == "/datasets/7"
    layout = _signed_in_as(client)
    assert layout is not None and "Dana Lab" in layout and "analyst" in layout
    assert _users(sso_app) == [("dana.lab", "analyst", "Dana Lab")]
    assert _identities(sso_app) == 1
    with sso_app.app_context(), session_scope() as s:
        assert [(a.name, a.ok) for a in s.scalars(select(LoginAttempt))] == [("dana.lab", True)]


def test_the_authorization_request_carries_state_nonce_and_an_s256_challenge(sso_app, provider):
    client = sso_app.test_client()
    response, _ = sign_in(client)
    assert response.status_code == 302
    asked = provider.authorization_requests[-1]
    # RFC 6749, 4.1.1: response_type=code, our client id and redirect URI.
    assert (asked["response_type"], asked["client_id"], asked["redirect_uri"]) == ("code", CLIENT_ID, REDIRECT_URI)
    assert "openid" in asked["scope"].split()  # Core 1.0, 3.1.2.1: scope must contain openid
    # RFC 6749, 10.12 and Core 1.0, 3.1.2.1: unguessable state and nonce (at least 128 bits here).
    assert len(asked["state"]) >= 22 and len(asked["nonce"]) >= 22 and asked["state"] != asked["nonce"]
    # RFC 7636, 4.2: code_challenge = BASE64URL(SHA256(ASCII(code_verifier))), method S256;
    # 4.1: the verifier has 43 to 128 characters. The provider checked it (4.6) before issuing tokens.
    verifier = provider.token_requests[-1]["code_verifier"]
    expected = base64.urlsafe_b64encode(hashlib.sha256(verifier.encode("ascii")).digest()).rstrip(b"=").decode()
    assert asked["code_challenge_method"] == "S256" and asked["code_challenge"] == expected
    assert 43 <= len(verifier) <= 128
    # The verifier itself is not in the authorization request, only its challenge.
    assert verifier not in json.dumps(asked)


def test_each_sign_in_uses_fresh_state_nonce_and_verifier(sso_app, provider):
    sign_in(sso_app.test_client())
    sign_in(sso_app.test_client())
    first, second = provider.authorization_requests[-2:]
    assert first["state"] != second["state"] and first["nonce"] != second["nonce"]
    assert first["code_challenge"] != second["code_challenge"]


@pytest.mark.parametrize(
    ("groups", "role"),
    [
        (["qa-viewers"], "viewer"),
        (["qa-analysts", "unrelated-group"], "analyst"),
        (["qa-viewers", "qa-reviewers", "qa-analysts"], "reviewer"),  # the highest mapped role wins
        (["qa-admins", "qa-viewers"], "admin"),
        ("qa-reviewers", "reviewer"),  # a claim may be one string instead of a list
    ],
)
def test_the_role_claim_is_mapped_to_the_highest_role(sso_app, provider, groups, role):
    provider.user = {"sub": "subject-0002", "groups": groups}
    client = sso_app.test_client()
    response, _ = sign_in(client)
    assert response.status_code == 302
    assert [r for _, r, _ in _users(sso_app)] == [role]


def test_another_claim_can_carry_the_roles(app_factory, sso_settings, provider):
    app = app_factory(**{**sso_settings, "OIDC_ROLE_CLAIM": "app_roles", "OIDC_ROLE_MAP": "ld-lead=reviewer"})
    provider.user = {"sub": "subject-0003", "groups": ["qa-admins"], "app_roles": ["ld-lead"]}
    response, _ = sign_in(app.test_client())
    assert response.status_code == 302
    assert [r for _, r, _ in _users(app)] == ["reviewer"]


def test_the_same_subject_is_the_same_user_and_takes_the_role_the_provider_states_now(sso_app, provider):
    _set_user(provider, groups=["qa-reviewers"], preferred_username="sam")
    sign_in(sso_app.test_client())
    _set_user(provider, groups=["qa-viewers"], preferred_username="sam", name="Sam Renamed")
    response, _ = sign_in(sso_app.test_client())
    assert response.status_code == 302
    assert _users(sso_app) == [("sam", "viewer", "Sam Renamed")]
    assert _identities(sso_app) == 1


def test_a_local_user_of_the_same_name_is_not_taken_over(sso_app, provider):
    # Core 1.0, 5.7: only iss + sub identify the user; preferred_username is a mere label.
    name, password = add_user(sso_app, "admin", name="lee")
    _set_user(provider, groups=["qa-viewers"], preferred_username="lee")
    client = sso_app.test_client()
    response, _ = sign_in(client)
    assert response.status_code == 302
    assert _users(sso_app) == [("lee", "admin", "lee"), ("lee-2", "viewer", "lee-2")]
    assert "lee-2" in _signed_in_as(client)


def test_a_user_made_by_single_sign_on_has_no_usable_password(sso_app, provider):
    _set_user(provider, preferred_username="kim")
    sign_in(sso_app.test_client())
    refused = login(sso_app.test_client(), "kim", oidc.NO_PASSWORD)
    assert refused.status_code == 401


def test_a_disabled_user_is_refused(sso_app, provider):
    _set_user(provider, preferred_username="ari")
    sign_in(sso_app.test_client())
    with sso_app.app_context(), session_scope() as s:
        s.scalars(select(User).where(User.name == "ari")).one().active = False
    client = sso_app.test_client()
    response, _ = sign_in(client)
    assert response.status_code == 403 and "disabled" in response.get_data(as_text=True)
    assert _signed_in_as(client) is None


# -- refusals -----------------------------------------------------------------------

def _refused(client, response, words: str):
    text = response.get_data(as_text=True)
    assert response.status_code == 403, text
    assert words in text
    assert _signed_in_as(client) is None


def test_no_mapped_role_refuses_with_a_clear_page(sso_app, provider):
    _set_user(provider, groups=["sales", "qa-visitors"])
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "has no role in LatentDesk")
    assert "Sign in with single sign-on" in response.get_data(as_text=True)  # the page offers to try again
    assert _users(sso_app) == [] and _identities(sso_app) == 0
    with sso_app.app_context(), session_scope() as s:
        # Not a failed password: it must not feed the lockout of an address many people share.
        assert s.scalar(select(func.count(LoginAttempt.id))) == 0


def test_no_role_claim_at_all_refuses(sso_app, provider):
    provider.user = {"sub": "subject-0004"}
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "has no role in LatentDesk")


def test_an_id_token_signed_with_another_key_is_refused(sso_app, provider):
    # Core 1.0, 3.1.3.7 items 6-8: the signature must verify with the provider's published key.
    # The forger even reuses the provider's key id, so only the signature gives it away.
    provider.misbehave["signing_key"] = RSAKey.generate_key(
        2048, parameters={"kid": provider.key.kid, "alg": "RS256", "use": "sig"}
    )
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "signature is not valid")
    assert _users(sso_app) == []


def test_an_id_token_signed_with_an_unpublished_key_id_is_refused(sso_app, provider):
    provider.misbehave["signing_key"] = RSAKey.generate_key(2048, parameters={"kid": "not-published", "alg": "RS256"})
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "signature is not valid")


@pytest.mark.parametrize(
    "claims",
    [
        {"aud": ["another-client"]},
        {"aud": "another-client"},
        # azp naming us does not make up for an audience that does not (item 4 is checked after item 3).
        {"aud": ["another-client"], "azp": CLIENT_ID},
        {"aud": [CLIENT_ID, "another-client"], "azp": CLIENT_ID},
    ],
    ids=["other-list", "other-string", "other-with-our-azp", "shared-with-another"],
)
def test_an_id_token_for_another_audience_is_refused(sso_app, provider, claims):
    # Core 1.0, 3.1.3.7 item 3: aud must contain our client id, and no audience we do not trust.
    provider.misbehave["claims"] = claims
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "The ID token was refused")


def test_an_id_token_from_another_issuer_is_refused(sso_app, provider):
    # Core 1.0, 3.1.3.7 item 2: iss must be exactly the issuer of the discovery document.
    provider.misbehave["claims"] = {"iss": provider.issuer + "/elsewhere"}
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "The ID token was refused")


def test_an_expired_id_token_is_refused(sso_app, provider):
    # Core 1.0, 3.1.3.7 item 9: the current time must be before exp (we allow 60 s of clock skew).
    now = int(time.time())
    provider.misbehave["claims"] = {"iat": now - 7200, "exp": now - 3600}
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "The ID token was refused")


def test_replaying_the_callback_is_refused(sso_app, provider):
    # The state, nonce and verifier are taken out of the session at the first callback
    # (one use); RFC 6749, 10.12 and Core 1.0, 3.1.2.1.
    client = sso_app.test_client()
    response, callback = sign_in(client)
    assert response.status_code == 302
    again = client.get(callback)
    assert again.status_code == 403 and "already completed" in again.get_data(as_text=True)
    other_browser = sso_app.test_client()
    _refused(other_browser, other_browser.get(callback), "already completed")


def test_replaying_the_callback_with_a_copied_session_cookie_is_refused(sso_app, provider):
    # Even with the session cookie taken before the callback, the code works once
    # (RFC 6749, 4.1.2), so the provider refuses the second exchange.
    client = sso_app.test_client()
    callback = _start(client)
    cookie = client.get_cookie("latentdesk_session")
    assert client.get(callback).status_code == 302
    thief = sso_app.test_client()
    thief.set_cookie(cookie.key, cookie.value, domain=cookie.domain or "localhost")
    _refused(thief, thief.get(callback), "did not accept the code")


def test_a_replayed_id_token_fails_the_nonce_check(sso_app, provider):
    # Core 1.0, 3.1.2.1 and 3.1.3.7 item 11: the nonce binds the ID token to this sign-in;
    # an ID token from an earlier sign-in, sent again, is refused.
    first, _ = sign_in(sso_app.test_client())
    assert first.status_code == 302
    provider.misbehave["replay_id_token"] = provider.issued_id_tokens[0]
    client = sso_app.test_client()
    response, _ = sign_in(client)
    _refused(client, response, "The ID token was refused")
    assert "nonce" in response.get_data(as_text=True)


def test_a_callback_with_another_state_is_refused(sso_app, provider):
    client = sso_app.test_client()
    callback = _start(client)
    path, _, query = callback.partition("?")
    params = {k: v[0] for k, v in parse_qs(query).items()}
    params["state"] = "forged-" + params["state"]
    _refused(client, client.get(path, query_string=params), "does not belong to this browser session")


def test_a_refused_callback_ends_the_pending_sign_in(sso_app, provider):
    # One use: a forged answer (login CSRF, RFC 6749 10.12) spends the pending state, so the
    # genuine answer that follows in the same browser no longer signs anybody in.
    client = sso_app.test_client()
    callback = _start(client)
    path, _, query = callback.partition("?")
    assert client.get(path, query_string={"code": "forged", "state": "forged"}).status_code == 403
    _refused(client, client.get(callback), "already completed or has expired")


def test_a_callback_without_a_sign_in_started_is_refused(sso_app):
    client = sso_app.test_client()
    response = client.get("/-/oidc/callback", query_string={"code": "x", "state": "y"})
    _refused(client, response, "already completed or has expired")


def test_a_provider_error_answer_is_shown(sso_app, provider):
    client = sso_app.test_client()
    client.get("/-/oidc/login")
    response = client.get("/-/oidc/callback", query_string={"error": "access_denied", "state": "whatever"})
    _refused(client, response, "access_denied")


def test_a_discovery_document_naming_another_issuer_stops_the_sign_in(sso_app, provider):
    # OpenID Connect Discovery 1.0, 4.3: the issuer in the document must be the one asked for.
    provider.misbehave["discovery_issuer"] = "http://127.0.0.1:9/other"
    response = sso_app.test_client().get("/-/oidc/login")
    assert response.status_code == 502 and "names another issuer" in response.get_data(as_text=True)
    assert provider.authorization_requests == []


# -- local sign-in, the sign-in page, settings -------------------------------------------

def test_the_sign_in_page_offers_single_sign_on_beside_the_password_form(sso_app):
    page = sso_app.test_client().get("/-/login?next=/datasets/3").get_data(as_text=True)
    assert "Sign in with single sign-on" in page and 'href="/-/oidc/login?next=/datasets/3"' in page
    assert 'name="password"' in page


def test_without_single_sign_on_there_is_neither_link_nor_route(client):
    assert "single sign-on" not in client.get("/-/login").get_data(as_text=True)
    assert client.get("/-/oidc/login").status_code == 404
    assert client.get("/-/oidc/callback").status_code == 404


def test_local_sign_in_switched_off_refuses_the_password_form_but_not_api_tokens(app_factory, sso_settings):
    app = app_factory(**sso_settings, LOCAL_SIGNIN=False)
    client = app.test_client()
    page = client.get("/-/login").get_data(as_text=True)
    assert 'name="password"' not in page and "Sign in with single sign-on" in page
    name, password = add_user(app, "admin")
    response = client.post("/-/login", data={"name": name, "password": password, "csrf_token": csrf_from_session(client)})
    assert response.status_code == 403 and "switched off" in response.get_data(as_text=True)
    assert _signed_in_as(client) is None
    with app.app_context(), session_scope() as s:
        assert s.scalar(select(func.count(LoginAttempt.id))) == 0  # the password was not even checked
    # API tokens keep working (a script sends its token and no browser cookie).
    with app.app_context(), session_scope() as s:
        token = webapp_auth.create_token(s, accounts.get_user_by_name(s, name).id, "ci")
    script = app.test_client()
    assert script.get("/api/v1/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 200


def csrf_from_session(client) -> str:
    with client.session_transaction() as sess:
        return sess["csrf_token"]


def test_password_sign_in_still_works_when_local_sign_in_is_on(sso_app):
    name, password = add_user(sso_app, "viewer")
    assert login(sso_app.test_client(), name, password).status_code == 302


@pytest.mark.parametrize(
    ("settings", "words"),
    [
        ({"LOCAL_SIGNIN": False}, "nobody could sign in"),
        ({"OIDC_ISSUER": "http://sso.example.org"}, "https://"),
        ({"OIDC_ISSUER": "https://sso.example.org", "OIDC_ROLE_MAP": "a=viewer"}, "OIDC_CLIENT_ID"),
        ({"OIDC_ISSUER": "https://sso.example.org", "OIDC_CLIENT_ID": "c"}, "OIDC_ROLE_MAP is required"),
        ({"OIDC_ISSUER": "https://sso.example.org", "OIDC_CLIENT_ID": "c", "OIDC_ROLE_MAP": "a=viewer",
          "OIDC_SCOPES": "profile"}, "openid"),
    ],
)
def test_unusable_single_sign_on_settings_stop_the_start(settings, words):
    with pytest.raises(ConfigError, match=words):
        load_config({"SECRET_KEY": "s", **settings}, environ={})


@pytest.mark.parametrize(
    ("role_map", "words"),
    [("qa-admins=owner", "owner"), ("qa-admins", "claim-value=role"), (" , ", "maps no claim value")],
)
def test_a_bad_role_map_stops_the_start_naming_the_entry(app_factory, sso_settings, role_map, words):
    with pytest.raises(ConfigError, match=words):
        app_factory(**{**sso_settings, "OIDC_ROLE_MAP": role_map})


def test_role_map_parsing():
    assert oidc.role_map(" qa-viewers = viewer , team=lead=admin ") == {"qa-viewers": "viewer", "team=lead": "admin"}
