"""Configuration: defaults, then the instance file, then LATENTDESK_* variables,
then the mapping given to ``create_app`` (a test config wins over everything).

Keys are the environment names without the ``LATENTDESK_`` prefix (``HOME``,
``DATABASE_URL``, ``SECRET_KEY`` ...). The home folder (``LATENTDESK_HOME``) is
the instance folder: it holds ``latentdesk.db``, ``files/``, ``cache/``, the
optional ``latentdesk.toml`` (same keys, lower or upper case) and, in demo
mode, the generated ``secret_key`` file. Every variable is described in
docs/configuration.md.
"""

from __future__ import annotations

import os
import secrets
import tomllib
from pathlib import Path
from typing import Any, Mapping
from urllib.parse import urlsplit

from analysis.errors import InputError

PREFIX = "LATENTDESK_"
INSTANCE_FILE = "latentdesk.toml"
SECRET_KEY_FILE = "secret_key"

# name -> (type, default). Types: str, int, bool; None default means "not set".
SETTINGS: dict[str, tuple[type, Any]] = {
    "HOME": (str, "./instance"),
    "DATABASE_URL": (str, None),
    "SECRET_KEY": (str, None),
    "REDIS_URL": (str, None),
    "MAX_UPLOAD_MB": (int, 200),
    "DEMO": (bool, False),
    "SECURE_COOKIES": (bool, False),
    "SESSION_HOURS": (int, 12),
    "SESSION_IDLE_MINUTES": (int, 60),
    "LOCKOUT_ATTEMPTS": (int, 5),
    "LOCKOUT_MINUTES": (int, 15),
    "ADDRESS_LOCKOUT_ATTEMPTS": (int, 100),
    "PROXY_HOPS": (int, 0),
    "MIGRATE_ON_START": (bool, True),
    # Outgoing alert when a checked batch has flags (webapp/services/webhooks.py); off when unset.
    "WEBHOOK_URL": (str, None),
    "WEBHOOK_SECRET": (str, None),
    "WEBHOOK_ATTEMPTS": (int, 5),
    "WEBHOOK_BACKOFF_SECONDS": (int, 1),
    "WEBHOOK_BACKOFF_MAX_SECONDS": (int, 60),
    "WEBHOOK_TIMEOUT_SECONDS": (int, 5),
    # Single sign-on by OpenID Connect (webapp/auth/oidc.py); off while OIDC_ISSUER is unset.
    "OIDC_ISSUER": (str, None),
    "OIDC_CLIENT_ID": (str, None),
    "OIDC_CLIENT_SECRET": (str, None),
    "OIDC_SCOPES": (str, "openid profile email"),
    "OIDC_ROLE_CLAIM": (str, "groups"),
    "OIDC_ROLE_MAP": (str, None),
    "LOCAL_SIGNIN": (bool, True),
}
WEBHOOK_SCHEMES = ("http", "https")
# OpenID Connect Discovery 1.0, section 3: the issuer is an https URL; plain http is
# accepted only for a provider on this machine (a test or a local trial).
LOOPBACK_HOSTS = ("localhost", "127.0.0.1", "::1")


class ConfigError(InputError):
    """A setting is missing or has a value we cannot use; the message names it."""


def _parse(name: str, kind: type, value: Any, source: str) -> Any:
    if value is None or kind is str and isinstance(value, str):
        return value
    if kind is bool:
        if isinstance(value, bool):
            return value
        text = str(value).strip().lower()
        if text in {"1", "true", "yes", "on"}:
            return True
        if text in {"0", "false", "no", "off", ""}:
            return False
        raise ConfigError(f"{source}: {name} must be true or false, got {value!r}")
    if kind is int:
        try:
            number = int(str(value).strip()) if not isinstance(value, int) else value
        except ValueError:
            raise ConfigError(f"{source}: {name} must be a whole number, got {value!r}") from None
        if number < 0:
            raise ConfigError(f"{source}: {name} must not be negative, got {number}")
        return number
    return str(value)


def _from_mapping(data: Mapping[str, Any], source: str, strip_prefix: bool) -> dict[str, Any]:
    found: dict[str, Any] = {}
    for key, value in data.items():
        name = key.upper()
        if strip_prefix:
            if not name.startswith(PREFIX):
                continue
            name = name[len(PREFIX):]
        elif name.startswith(PREFIX):
            name = name[len(PREFIX):]
        if name in SETTINGS:
            found[name] = _parse(name, SETTINGS[name][0], value, source)
        elif not strip_prefix:
            found[key] = value  # Flask's own keys (TESTING, ...) pass through
    return found


def _instance_file(home: Path) -> dict[str, Any]:
    path = home / INSTANCE_FILE
    if not path.is_file():
        return {}
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    unknown = sorted(k for k in data if k.upper().removeprefix(PREFIX) not in SETTINGS)
    if unknown:
        raise ConfigError(f"{path}: unknown setting(s) {', '.join(unknown)}")
    return _from_mapping(data, str(path), strip_prefix=False)


def demo_secret_key(home: Path) -> str:
    """The demo's secret key: read from ``HOME/secret_key``, created on first use."""
    path = home / SECRET_KEY_FILE
    if path.is_file():
        return path.read_text(encoding="utf-8").strip()
    home.mkdir(parents=True, exist_ok=True)
    key = secrets.token_hex(32)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as handle:
        handle.write(key + "\n")
    return key


def _check_webhook(config: dict[str, Any]) -> None:
    """An empty URL turns the webhook off; a set one must be an http(s) address with a host.

    The messages name the setting but not the whole address, which may carry a token.
    """
    url = (config["WEBHOOK_URL"] or "").strip()
    config["WEBHOOK_URL"] = url or None
    config["WEBHOOK_SECRET"] = config["WEBHOOK_SECRET"] or None
    if not url:
        return
    parts = urlsplit(url)
    if parts.scheme.lower() not in WEBHOOK_SCHEMES:
        raise ConfigError(
            f"LATENTDESK_WEBHOOK_URL must be an http:// or https:// address, got scheme {parts.scheme or 'none'!r}"
        )
    if not parts.hostname:
        raise ConfigError("LATENTDESK_WEBHOOK_URL has no host name (expected e.g. https://alerts.example/hook)")
    try:
        parts.port
    except ValueError:
        raise ConfigError("LATENTDESK_WEBHOOK_URL has a port that is not a number from 0 to 65535") from None
    for name in ("WEBHOOK_ATTEMPTS", "WEBHOOK_TIMEOUT_SECONDS"):
        if config[name] < 1:
            raise ConfigError(f"LATENTDESK_{name} must be at least 1, got {config[name]}")


def _check_oidc(config: dict[str, Any]) -> None:
    """Single sign-on needs an https issuer and a client id; no sign-in at all is refused.

    The role map's roles are checked by ``webapp.auth.oidc.role_map`` when the app starts.
    """
    issuer = (config["OIDC_ISSUER"] or "").strip().rstrip("/")
    config["OIDC_ISSUER"] = issuer or None
    if not issuer:
        if not config["LOCAL_SIGNIN"]:
            raise ConfigError(
                "LATENTDESK_LOCAL_SIGNIN is off but single sign-on is not configured "
                "(LATENTDESK_OIDC_ISSUER): nobody could sign in"
            )
        return
    parts = urlsplit(issuer)
    loopback = parts.scheme == "http" and parts.hostname in LOOPBACK_HOSTS
    if parts.scheme != "https" and not loopback or not parts.hostname:
        raise ConfigError(
            f"LATENTDESK_OIDC_ISSUER must be an https:// address with a host, got {issuer!r}"
        )
    if parts.query or parts.fragment:
        raise ConfigError("LATENTDESK_OIDC_ISSUER must not carry a query or fragment")
    if not (config["OIDC_CLIENT_ID"] or "").strip():
        raise ConfigError("LATENTDESK_OIDC_CLIENT_ID is required when LATENTDESK_OIDC_ISSUER is set")
    if not (config["OIDC_ROLE_CLAIM"] or "").strip():
        raise ConfigError("LATENTDESK_OIDC_ROLE_CLAIM must name a claim of the ID token")
    if not (config["OIDC_ROLE_MAP"] or "").strip():
        raise ConfigError(
            "LATENTDESK_OIDC_ROLE_MAP is required when LATENTDESK_OIDC_ISSUER is set "
            "(e.g. qa-viewers=viewer,qa-admins=admin)"
        )
    if "openid" not in (config["OIDC_SCOPES"] or "").split():
        raise ConfigError("LATENTDESK_OIDC_SCOPES must include openid")


def load_config(
    overrides: Mapping[str, Any] | None = None,
    *,
    environ: Mapping[str, str] | None = None,
    require_secret: bool = True,
) -> dict[str, Any]:
    """Merge defaults, the instance file, the environment and ``overrides``.

    Raises ConfigError naming the setting when a value is unusable, or when no
    secret key is configured outside demo mode (and ``require_secret``).
    """
    environ = os.environ if environ is None else environ
    from_env = _from_mapping(environ, "environment", strip_prefix=True)
    given = _from_mapping(overrides or {}, "config", strip_prefix=False)

    config = {name: default for name, (_, default) in SETTINGS.items()}
    home = Path(given.get("HOME") or from_env.get("HOME") or config["HOME"])
    config.update(_instance_file(home))
    config.update(from_env)
    config.update(given)
    config["HOME"] = str(home.resolve())

    if not config["SECRET_KEY"]:
        key_file = Path(config["HOME"]) / SECRET_KEY_FILE
        if config["DEMO"]:
            config["SECRET_KEY"] = demo_secret_key(Path(config["HOME"]))
        elif key_file.is_file():
            config["SECRET_KEY"] = key_file.read_text(encoding="utf-8").strip()
        elif require_secret:
            raise ConfigError(
                "LATENTDESK_SECRET_KEY is not set: give a long random value (for example "
                "`python -c 'import secrets; print(secrets.token_hex(32))'`), or run "
                "`latentdesk demo` for a local trial"
            )
    if config["MAX_UPLOAD_MB"] < 1:
        raise ConfigError("MAX_UPLOAD_MB must be at least 1")
    if config["LOCKOUT_ATTEMPTS"] < 1 or config["ADDRESS_LOCKOUT_ATTEMPTS"] < 1:
        raise ConfigError("LOCKOUT_ATTEMPTS and ADDRESS_LOCKOUT_ATTEMPTS must be at least 1")
    if config["SESSION_HOURS"] < 1 or config["SESSION_IDLE_MINUTES"] < 1:
        raise ConfigError("SESSION_HOURS and SESSION_IDLE_MINUTES must be at least 1")
    _check_webhook(config)
    _check_oidc(config)
    return config
