"""Single sign-on with OpenID Connect: the authorization code flow with PKCE, through Authlib.

- Discovery: the provider's settings are read from
  ``<issuer>/.well-known/openid-configuration`` (OpenID Connect Discovery 1.0,
  section 4) and checked with Authlib's ``OpenIDProviderMetadata``; the
  document's ``issuer`` must be the configured one exactly (section 4.3).
- ``begin``: a fresh ``state`` (RFC 6749, section 10.12), ``nonce`` (OpenID
  Connect Core 1.0, section 3.1.2.1) and PKCE verifier with the S256 challenge
  (RFC 7636, section 4.2) are kept in the Flask session; the browser goes to the
  provider's authorization endpoint.
- ``finish``: the pending values are taken out of the session before anything
  else, so a callback works once. The state must match, the code is exchanged
  with the verifier, and the ID token is validated as Core 1.0, section
  3.1.3.7 asks: signature against the provider's JWKS (asymmetric algorithms
  only), ``iss``, ``aud`` (this client and nobody else), ``azp``, ``exp``,
  ``iat``, ``nonce`` and ``at_hash``.
- Roles: the values of one claim (``OIDC_ROLE_CLAIM``) are looked up in
  ``OIDC_ROLE_MAP``; the highest mapped role wins, none mapped refuses.
- Users: the pair (issuer, subject) is the identity (Core 1.0, section 5.7);
  a first sign-in creates the local user, which has no usable password.
  Later sign-ins take the role and name the provider states then.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass
from typing import Any, Mapping

import requests
from authlib.integrations.requests_client import OAuth2Session, OAuthError
from authlib.oidc.core import CodeIDToken
from authlib.oidc.discovery import OpenIDProviderMetadata, get_well_known_url
from flask import Flask, current_app, session
from joserfc import jwt
from joserfc.errors import InvalidKeyIdError, JoseError
from joserfc.jwk import KeySet

from webapp.auth import ROLE_RANK, CurrentUser
from webapp.config import ConfigError
from webapp.store import accounts, oidc_identities, session_scope
from webapp.store.tables import ROLES

EXTENSION_KEY = "latentdesk.oidc"
PENDING_KEY = "oidc_pending"
HTTP_TIMEOUT_SECONDS = 10
# Clock difference allowed on exp/iat/nbf (RFC 7519, section 4.1.4: "a few minutes").
LEEWAY_SECONDS = 60
# ID tokens signed with a key from the provider's JWKS only: never "none", and no
# HMAC with the client secret (Core 1.0, section 3.1.3.7, items 6-8).
SIGNING_ALGORITHMS = (
    "RS256", "RS384", "RS512", "PS256", "PS384", "PS512", "ES256", "ES384", "ES512", "EdDSA",
)
# Stored as the password hash of users made by single sign-on. It has no "$", so
# werkzeug's check_password_hash never accepts any password for it.
NO_PASSWORD = "!single-sign-on"
USER_NAME_LENGTH = 80


class SignInRefused(Exception):
    """Single sign-on refused; the message is safe to show."""


@dataclass(frozen=True)
class Settings:
    issuer: str
    client_id: str
    client_secret: str | None
    scopes: str
    role_claim: str
    role_map: dict[str, str]


def enabled(config: Mapping[str, Any]) -> bool:
    return bool(config.get("OIDC_ISSUER"))


def role_map(text: str) -> dict[str, str]:
    """Parse ``"qa-viewers=viewer, qa-admins=admin"`` into {claim value: role}.

    Raises ConfigError naming the entry that is not ``value=role`` with a known role.
    """
    mapping: dict[str, str] = {}
    for entry in (part.strip() for part in text.split(",")):
        if not entry:
            continue
        value, sep, role = (piece.strip() for piece in entry.rpartition("="))
        if not sep or not value:
            raise ConfigError(f"LATENTDESK_OIDC_ROLE_MAP: {entry!r} is not of the form claim-value=role")
        if role not in ROLES:
            raise ConfigError(
                f"LATENTDESK_OIDC_ROLE_MAP: {entry!r} names the role {role!r}; choose one of {', '.join(ROLES)}"
            )
        mapping[value] = role
    if not mapping:
        raise ConfigError("LATENTDESK_OIDC_ROLE_MAP maps no claim value to a role")
    return mapping


def mapped_role(claim_value: Any, mapping: Mapping[str, str]) -> str | None:
    """The highest role any value of the claim maps to (a string or a list of strings), or None."""
    values = [claim_value] if isinstance(claim_value, str) else claim_value if isinstance(claim_value, list) else []
    roles = {mapping[v] for v in values if isinstance(v, str) and v in mapping}
    return max(roles, key=ROLE_RANK.__getitem__) if roles else None


class Provider:
    """One app's view of its OpenID provider: settings, discovery document and keys.

    The document and the key set are fetched on first use and kept; the key set is
    fetched again once when a token names a key id it does not hold (key rotation).
    """

    def __init__(self, settings: Settings):
        self.settings = settings
        self._metadata: dict[str, Any] | None = None
        self._keys: KeySet | None = None

    def client(self, redirect_uri: str) -> OAuth2Session:
        s = self.settings
        return OAuth2Session(
            client_id=s.client_id,
            client_secret=s.client_secret,
            scope=s.scopes,
            redirect_uri=redirect_uri,
            code_challenge_method="S256",
            default_timeout=HTTP_TIMEOUT_SECONDS,
        )

    def _get_json(self, url: str, what: str) -> dict[str, Any]:
        try:
            response = requests.get(url, timeout=HTTP_TIMEOUT_SECONDS)
            response.raise_for_status()
            data = response.json()
        except (requests.RequestException, ValueError) as exc:
            raise SignInRefused(f"The sign-in service could not be reached ({what}: {type(exc).__name__}).") from None
        if not isinstance(data, dict):
            raise SignInRefused(f"The sign-in service sent an unusable {what}.")
        return data

    def metadata(self) -> dict[str, Any]:
        if self._metadata is None:
            issuer = self.settings.issuer
            data = self._get_json(get_well_known_url(issuer, external=True), "discovery document")
            try:
                OpenIDProviderMetadata(data).validate()
            except ValueError as exc:
                raise SignInRefused(f"The sign-in service's discovery document is not valid: {exc}") from None
            if data["issuer"] != issuer:
                raise SignInRefused(
                    "The sign-in service's discovery document names another issuer "
                    "(OpenID Connect Discovery 1.0, section 4.3)."
                )
            self._metadata = data
        return self._metadata

    def keys(self, refresh: bool = False) -> KeySet:
        if self._keys is None or refresh:
            data = self._get_json(self.metadata()["jwks_uri"], "key set")
            try:
                self._keys = KeySet.import_key_set(data)
            except (JoseError, ValueError, TypeError, KeyError):
                raise SignInRefused("The sign-in service's key set could not be read.") from None
        return self._keys

    def algorithms(self) -> list[str]:
        offered = self.metadata().get("id_token_signing_alg_values_supported") or []
        return [alg for alg in offered if alg in SIGNING_ALGORITHMS]


def init_app(app: Flask) -> None:
    """Read the single sign-on settings (ConfigError when unusable) and keep the provider."""
    cfg = app.config
    settings = Settings(
        issuer=cfg["OIDC_ISSUER"],
        client_id=cfg["OIDC_CLIENT_ID"].strip(),
        client_secret=cfg["OIDC_CLIENT_SECRET"] or None,
        scopes=" ".join(cfg["OIDC_SCOPES"].split()),
        role_claim=cfg["OIDC_ROLE_CLAIM"].strip(),
        role_map=role_map(cfg["OIDC_ROLE_MAP"]),
    )
    app.extensions[EXTENSION_KEY] = Provider(settings)


def _provider() -> Provider:
    return current_app.extensions[EXTENSION_KEY]


# -- the flow ----------------------------------------------------------------

def begin(redirect_uri: str, next_path: str) -> str:
    """Keep fresh state, nonce and PKCE verifier in the session; the provider URL to go to."""
    provider = _provider()
    pending = {
        "state": secrets.token_urlsafe(32),
        "nonce": secrets.token_urlsafe(32),
        # RFC 7636, section 4.1: 43 to 128 unreserved characters; 64 random bytes give 86.
        "verifier": secrets.token_urlsafe(64),
        "redirect_uri": redirect_uri,
        "next": next_path,
    }
    with provider.client(redirect_uri) as client:
        url, _ = client.create_authorization_url(
            provider.metadata()["authorization_endpoint"],
            state=pending["state"],
            code_verifier=pending["verifier"],
            nonce=pending["nonce"],
        )
    session[PENDING_KEY] = pending
    return url


def finish(args: Mapping[str, str], address: str) -> tuple[CurrentUser, str]:
    """Complete a callback: the signed-in user and the page to go to; SignInRefused otherwise.

    A success is recorded as a sign-in (``login_attempts``, no password checked). A
    refusal goes to the application log only: it must not count toward the password
    lockout of a client address that many people may share.
    """
    try:
        return _finish(args, address)
    except SignInRefused as refused:
        current_app.logger.warning("single sign-on refused for %s: %s", address, refused)
        raise


def _finish(args: Mapping[str, str], address: str) -> tuple[CurrentUser, str]:
    # One use: the pending values leave the session before they are looked at.
    pending = session.pop(PENDING_KEY, None)
    if not isinstance(pending, dict):
        raise SignInRefused("This sign-in was already completed or has expired. Please start again.")
    provider = _provider()
    if args.get("error"):
        raise SignInRefused(f"The sign-in service refused the sign-in ({args['error'][:100]}).")
    if not hmac.compare_digest(str(args.get("state", "")), pending["state"]):
        raise SignInRefused("The sign-in answer does not belong to this browser session (state). Please start again.")
    # RFC 9207: when the provider names itself in the answer, it must be ours (mix-up defence).
    if "iss" in args and args["iss"] != provider.settings.issuer:
        raise SignInRefused("The sign-in answer came from another issuer.")
    code = args.get("code")
    if not code:
        raise SignInRefused("The sign-in answer carries no authorization code.")
    token = _exchange(provider, code, pending)
    claims = verify_id_token(provider, token.get("id_token"), pending["nonce"], token.get("access_token"))
    role = mapped_role(claims.get(provider.settings.role_claim), provider.settings.role_map)
    if role is None:
        raise SignInRefused(
            "Your account at the sign-in service has no role in LatentDesk. "
            "Ask an administrator to add you to one of the groups that grant access."
        )
    return _sign_in_user(provider.settings.issuer, claims, role, address), pending["next"]


def _exchange(provider: Provider, code: str, pending: Mapping[str, str]) -> dict[str, Any]:
    """The token response for ``code`` (RFC 6749, section 4.1.3; RFC 7636, section 4.5)."""
    try:
        with provider.client(pending["redirect_uri"]) as client:
            token = client.fetch_token(
                provider.metadata()["token_endpoint"],
                grant_type="authorization_code",
                code=code,
                code_verifier=pending["verifier"],
            )
    except OAuthError as exc:
        raise SignInRefused(f"The sign-in service did not accept the code ({exc.error}).") from None
    except (requests.RequestException, ValueError) as exc:
        raise SignInRefused(f"The sign-in service could not be reached (token: {type(exc).__name__}).") from None
    return dict(token)


def verify_id_token(provider: Provider, id_token: str | None, nonce: str, access_token: str | None = None) -> dict:
    """The claims of a valid ID token; SignInRefused naming the failed check otherwise.

    OpenID Connect Core 1.0, section 3.1.3.7 (items 2-3, 6-10) and 3.1.2.1 (nonce).
    """
    if not id_token:
        raise SignInRefused("The sign-in service sent no ID token (is the scope openid granted?).")
    algorithms = provider.algorithms()
    if not algorithms:
        raise SignInRefused("The sign-in service offers no signature algorithm LatentDesk accepts.")
    try:
        try:
            decoded = jwt.decode(id_token, provider.keys(), algorithms=algorithms)
        except InvalidKeyIdError:
            decoded = jwt.decode(id_token, provider.keys(refresh=True), algorithms=algorithms)
    except JoseError:
        raise SignInRefused("The ID token's signature is not valid for the sign-in service's keys.") from None
    settings = provider.settings
    claims = CodeIDToken(
        decoded.claims,
        decoded.header,
        options={
            "iss": {"essential": True, "value": settings.issuer},
            "sub": {"essential": True},
            "aud": {"essential": True, "value": settings.client_id},
            "nonce": {"essential": True, "value": nonce},
        },
        params={"nonce": nonce, "client_id": settings.client_id, "access_token": access_token},
    )
    try:
        claims.validate(leeway=LEEWAY_SECONDS)
    except JoseError as exc:
        raise SignInRefused(f"The ID token was refused: {exc.description or exc.error}.") from None
    # Item 3: an audience the client does not trust refuses the token; this client trusts only itself.
    audience = claims["aud"]
    if audience != settings.client_id and audience != [settings.client_id]:
        raise SignInRefused("The ID token was refused: it is meant for other audiences as well.")
    if not isinstance(claims["sub"], str) or len(claims["sub"]) > 255:
        raise SignInRefused("The ID token was refused: its subject is not a string of at most 255 characters.")
    return dict(claims)


# -- local users ----------------------------------------------------------------

def _wanted_name(issuer: str, claims: Mapping[str, Any]) -> str:
    """A readable user name for a new user; only a label, the identity is (issuer, subject)."""
    for key in ("preferred_username", "email"):
        value = claims.get(key)
        if isinstance(value, str) and value.strip():
            return "-".join(value.split())[:USER_NAME_LENGTH]
    digest = hashlib.sha256(f"{issuer}\n{claims['sub']}".encode("utf-8")).hexdigest()[:12]
    return f"sso-{digest}"


def _display_name(claims: Mapping[str, Any], fallback: str) -> str:
    value = claims.get("name")
    return value.strip()[:200] if isinstance(value, str) and value.strip() else fallback


def _sign_in_user(issuer: str, claims: Mapping[str, Any], role: str, address: str) -> CurrentUser:
    subject = claims["sub"]
    with session_scope() as s:
        row = oidc_identities.find_user(s, issuer, subject)
        if row is None:
            name = oidc_identities.free_user_name(s, _wanted_name(issuer, claims), USER_NAME_LENGTH)
            row = accounts.add_user(s, name, role, NO_PASSWORD, _display_name(claims, name))
            oidc_identities.link(s, row.id, issuer, subject)
        if not row.active:
            raise SignInRefused("This account is disabled in LatentDesk. Ask an administrator.")
        oidc_identities.record_sign_in(s, row, issuer, subject, role, _display_name(claims, row.display_name))
        accounts.record_login_attempt(s, row.name, address, ok=True, evaluated=False)
        return CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role)
