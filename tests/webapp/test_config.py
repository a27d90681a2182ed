"""Configuration: defaults < home-folder file < LATENTDESK_* < config given to create_app.

The factory-honours-test-config check follows the Flask tutorial's testing
chapter ("Testing the factory"); cookie flags follow the OWASP Session
Management Cheat Sheet (common practice).
"""

from __future__ import annotations

import os
import stat

import pytest

from webapp.app import create_app
from webapp.config import ConfigError, load_config


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch):
    for name in list(os.environ):
        if name.startswith("LATENTDESK_") and not name.startswith("LATENTDESK_TEST_"):
            monkeypatch.delenv(name)


def test_factory_honours_a_test_config(tmp_path):
    app = create_app({"TESTING": True, "SECRET_KEY": "s", "HOME": str(tmp_path), "MAX_UPLOAD_MB": 3})
    assert app.testing and app.config["HOME"] == str(tmp_path.resolve())
    assert app.config["MAX_CONTENT_LENGTH"] >= 3 * 1024**2
    assert (tmp_path / "latentdesk.db").exists()


def test_default_is_not_testing(tmp_path):
    assert not create_app({"SECRET_KEY": "s", "HOME": str(tmp_path)}).testing


def test_environment_overrides_defaults_and_config_overrides_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path))
    monkeypatch.setenv("LATENTDESK_SECRET_KEY", "from-env")
    monkeypatch.setenv("LATENTDESK_MAX_UPLOAD_MB", "7")
    monkeypatch.setenv("LATENTDESK_SECURE_COOKIES", "yes")
    config = load_config()
    assert config["HOME"] == str(tmp_path.resolve())
    assert (config["SECRET_KEY"], config["MAX_UPLOAD_MB"], config["SECURE_COOKIES"]) == ("from-env", 7, True)
    assert load_config({"MAX_UPLOAD_MB": 9})["MAX_UPLOAD_MB"] == 9


def test_home_folder_file_sits_between_defaults_and_environment(tmp_path, monkeypatch):
    (tmp_path / "latentdesk.toml").write_text('secret_key = "from-file"\nlockout_minutes = 30\n')
    config = load_config({"HOME": str(tmp_path)})
    assert config["SECRET_KEY"] == "from-file" and config["LOCKOUT_MINUTES"] == 30
    monkeypatch.setenv("LATENTDESK_LOCKOUT_MINUTES", "5")
    assert load_config({"HOME": str(tmp_path)})["LOCKOUT_MINUTES"] == 5


def test_unknown_setting_in_the_home_folder_file_is_named(tmp_path):
    (tmp_path / "latentdesk.toml").write_text("secret_keyy = 'typo'\n")
    with pytest.raises(ConfigError, match="secret_keyy"):
        load_config({"HOME": str(tmp_path), "SECRET_KEY": "s"})


def test_database_url_selects_the_database(tmp_path, pg_url):
    app = create_app({"SECRET_KEY": "s", "HOME": str(tmp_path), "DATABASE_URL": pg_url})
    engine = app.extensions["latentdesk.engine"]
    assert engine.dialect.name == "postgresql"
    assert not (tmp_path / "latentdesk.db").exists()
    engine.dispose()


def test_secret_key_is_required_outside_demo_mode(tmp_path):
    with pytest.raises(ConfigError, match="LATENTDESK_SECRET_KEY"):
        create_app({"HOME": str(tmp_path)})


def test_demo_mode_generates_and_keeps_a_private_secret_key(tmp_path):
    first = load_config({"HOME": str(tmp_path), "DEMO": True})["SECRET_KEY"]
    key_file = tmp_path / "secret_key"
    assert len(first) >= 32 and key_file.read_text().strip() == first
    assert stat.S_IMODE(key_file.stat().st_mode) == 0o600
    assert load_config({"HOME": str(tmp_path), "DEMO": True})["SECRET_KEY"] == first
    # `latentdesk serve` on the demo's home folder keeps using that key.
    assert load_config({"HOME": str(tmp_path)})["SECRET_KEY"] == first


@pytest.mark.parametrize(("name", "value", "words"), [
    ("LATENTDESK_MAX_UPLOAD_MB", "lots", "MAX_UPLOAD_MB must be a whole number"),
    ("LATENTDESK_DEMO", "perhaps", "DEMO must be true or false"),
    ("LATENTDESK_LOCKOUT_ATTEMPTS", "-1", "LOCKOUT_ATTEMPTS must not be negative"),
    ("LATENTDESK_MAX_UPLOAD_MB", "0", "MAX_UPLOAD_MB must be at least 1"),
])
def test_bad_values_are_refused_by_name(monkeypatch, tmp_path, name, value, words):
    monkeypatch.setenv(name, value)
    with pytest.raises(ConfigError, match=words):
        load_config({"HOME": str(tmp_path), "SECRET_KEY": "s"})


def _cookie(response) -> str:
    return next(c for c in response.headers.getlist("Set-Cookie") if c.startswith("latentdesk_session="))


def test_session_cookie_is_httponly_and_samesite(tmp_path):
    app = create_app({"SECRET_KEY": "s", "HOME": str(tmp_path)})
    cookie = _cookie(app.test_client().get("/-/login"))
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie and "Secure" not in cookie


def test_secure_cookies_when_configured(tmp_path):
    app = create_app({"SECRET_KEY": "s", "HOME": str(tmp_path), "SECURE_COOKIES": True})
    assert "Secure" in _cookie(app.test_client().get("/-/login", base_url="https://localhost"))
