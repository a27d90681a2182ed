"""A real OpenID provider for the single sign-on tests, built from Authlib's server parts.

``authlib.integrations.flask_oauth2.AuthorizationServer`` with the authorization
code grant (RFC 6749, section 4.1), PKCE (``authlib.oauth2.rfc7636.CodeChallenge``,
RFC 7636) and the OpenID Connect code flow (``authlib.oidc.core.grants.OpenIDCode``,
OpenID Connect Core 1.0, section 3.1), signing ID tokens with an RSA key made here
and publishing its public half as a JWKS (RFC 7517). It serves a discovery document
(OpenID Connect Discovery 1.0, section 4) and runs in a thread on 127.0.0.1.

The end user is whoever the test puts in ``provider.user`` (the provider's own
sign-in screen is not what is under test). ``misbehave`` makes the provider do
what an attacker or a broken provider would: sign with another key, name another
audience, replay an old ID token.
"""

from __future__ import annotations

import secrets
import threading
import time
from dataclasses import dataclass, field
from typing import Any

from authlib.integrations.flask_oauth2 import AuthorizationServer
from authlib.oauth2.rfc6749 import OAuth2Error, grants
from authlib.oauth2.rfc7636 import CodeChallenge
from authlib.oidc.core import UserInfo
from authlib.oidc.core.grants import OpenIDCode
from flask import Flask, jsonify, request
from joserfc.jwk import KeySet, RSAKey
from werkzeug.serving import make_server

SCOPES = ("openid", "profile", "email")


@dataclass
class Client:
    """The one registered client (RFC 6749, section 2), a confidential web application."""

    client_id: str
    client_secret: str
    redirect_uris: list[str]

    def get_client_id(self):
        return self.client_id

    def get_default_redirect_uri(self):
        return self.redirect_uris[0]

    def get_allowed_scope(self, scope):
        return " ".join(s for s in scope.split() if s in SCOPES)

    def check_redirect_uri(self, redirect_uri):
        return redirect_uri in self.redirect_uris

    def check_client_secret(self, client_secret):
        return secrets.compare_digest(client_secret, self.client_secret)

    def check_endpoint_auth_method(self, method, endpoint):
        return method == "client_secret_basic"

    def check_response_type(self, response_type):
        return response_type == "code"

    def check_grant_type(self, grant_type):
        return grant_type == "authorization_code"


@dataclass
class AuthorizationCode:
    code: str
    client_id: str
    redirect_uri: str
    scope: str
    nonce: str | None
    code_challenge: str | None
    code_challenge_method: str | None
    user: dict[str, Any]
    auth_time: int = field(default_factory=lambda: int(time.time()))

    def get_redirect_uri(self):
        return self.redirect_uri

    def get_scope(self):
        return self.scope

    def get_nonce(self):
        return self.nonce

    def get_auth_time(self):
        return self.auth_time

    def get_acr(self):
        return None

    def get_amr(self):
        return None


class OpenIDProvider:
    """State of one provider: its client, keys, codes, the signed-in user and what it was sent."""

    def __init__(self, client_id: str, client_secret: str, redirect_uri: str):
        self.client = Client(client_id, client_secret, [redirect_uri])
        self.key = RSAKey.generate_key(2048, parameters={"kid": "provider-key-1", "alg": "RS256", "use": "sig"})
        self.user: dict[str, Any] = {"sub": "subject-0001", "groups": []}
        self.misbehave: dict[str, Any] = {}
        self.codes: dict[str, AuthorizationCode] = {}
        self.authorization_requests: list[dict[str, str]] = []
        self.token_requests: list[dict[str, str]] = []
        self.issued_id_tokens: list[str] = []
        self.issuer = ""
        self._server = None
        self._thread = None

    # -- key material ---------------------------------------------------------
    def jwks(self) -> dict[str, Any]:
        return KeySet([self.key]).as_dict(private=False)

    def signing_key(self) -> RSAKey:
        return self.misbehave.get("signing_key", self.key)

    # -- lifecycle -----------------------------------------------------------
    def start(self) -> "OpenIDProvider":
        app = build_app(self)
        self._server = make_server("127.0.0.1", 0, app, threaded=True)
        self.issuer = f"http://127.0.0.1:{self._server.server_port}"
        self._thread = threading.Thread(target=self._server.serve_forever, name="oidc-provider", daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._thread.join(timeout=10)


def _grants(provider: OpenIDProvider):
    class CodeGrant(grants.AuthorizationCodeGrant):
        TOKEN_ENDPOINT_AUTH_METHODS = ["client_secret_basic"]

        def save_authorization_code(self, code, req):
            data = req.payload.data
            provider.codes[code] = AuthorizationCode(
                code=code,
                client_id=req.client.client_id,
                redirect_uri=req.payload.redirect_uri,
                scope=req.scope,
                nonce=data.get("nonce"),
                code_challenge=data.get("code_challenge"),
                code_challenge_method=data.get("code_challenge_method"),
                user=dict(req.user),
            )

        def query_authorization_code(self, code, client):
            item = provider.codes.get(code)
            return item if item is not None and item.client_id == client.client_id else None

        def delete_authorization_code(self, authorization_code):
            # RFC 6749, section 4.1.2: a code is used once.
            provider.codes.pop(authorization_code.code, None)

        def authenticate_user(self, authorization_code):
            return authorization_code.user

    class ProviderOpenIDCode(OpenIDCode):
        def resolve_client_private_key(self, client):
            return provider.signing_key()

        def get_encode_header(self, client):
            return {"alg": "RS256", "kid": provider.signing_key().kid}

        def get_client_claims(self, client):
            claims = {"iss": provider.issuer, "aud": [client.get_client_id()]}
            claims.update(provider.misbehave.get("claims", {}))
            return claims

        def exists_nonce(self, nonce, req):
            return any(code.nonce == nonce for code in provider.codes.values())

        def generate_user_info(self, user, scope):
            return UserInfo(user)

        def process_token(self, grant, response):
            token = super().process_token(grant, response)
            if "id_token" in token:
                provider.issued_id_tokens.append(token["id_token"])
            replayed = provider.misbehave.get("replay_id_token")
            if replayed is not None:
                token["id_token"] = replayed
            return token

    return CodeGrant, ProviderOpenIDCode(require_nonce=True)


def build_app(provider: OpenIDProvider) -> Flask:
    app = Flask("test_oidc_provider")
    server = AuthorizationServer(app, query_client=lambda cid: provider.client if cid == provider.client.client_id else None,
                                 save_token=lambda token, req: None)
    code_grant, openid_code = _grants(provider)
    server.register_grant(code_grant, [CodeChallenge(required=True), openid_code])

    @app.get("/.well-known/openid-configuration")
    def discovery():
        base = provider.issuer
        return jsonify(
            issuer=provider.misbehave.get("discovery_issuer", base),
            authorization_endpoint=f"{base}/authorize",
            token_endpoint=f"{base}/token",
            jwks_uri=f"{base}/jwks",
            response_types_supported=["code"],
            subject_types_supported=["public"],
            id_token_signing_alg_values_supported=["RS256"],
            scopes_supported=list(SCOPES),
            token_endpoint_auth_methods_supported=["client_secret_basic"],
            code_challenge_methods_supported=["S256"],
            grant_types_supported=["authorization_code"],
        )

    @app.get("/jwks")
    def jwks():
        return jsonify(provider.jwks())

    @app.get("/authorize")
    def authorize():
        provider.authorization_requests.append(request.args.to_dict())
        # The end user is signed in at the provider and consents at once.
        user = dict(provider.user)
        try:
            grant = server.get_consent_grant(end_user=user)
        except OAuth2Error as error:
            return server.handle_error_response(None, error)
        return server.create_authorization_response(grant_user=user, grant=grant)

    @app.post("/token")
    def token():
        provider.token_requests.append(request.form.to_dict())
        return server.create_token_response()

    return app
