"""Docs cannot drift: every CLI command, API route and LATENTDESK_* variable is documented.

A habit taken from self-hosted data browsers that treat their docs as part of the contract
(common practice).
"""

from __future__ import annotations

import argparse
import re
from pathlib import Path

import pytest

from webapp.cli import build_parser

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"


def _sub_commands(parser: argparse.ArgumentParser, prefix: str = "") -> list[str]:
    """Every leaf command path, e.g. 'fit', 'users add', 'log verify'."""
    found = []
    for action in parser._actions:  # argparse has no public walk over sub-parsers
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                path = f"{prefix}{name}"
                children = _sub_commands(sub, path + " ")
                found.extend(children or [path])
    return found


def _api_rules(home: Path) -> list[str]:
    from webapp.app import create_app

    app = create_app({"TESTING": True, "SECRET_KEY": "docs-test", "HOME": str(home)})
    rules = sorted(
        {r.rule for r in app.url_map.iter_rules() if r.rule.startswith(("/api/", "/health"))}
    )
    return rules


def _config_variables() -> set[str]:
    pattern = re.compile(r"LATENTDESK_[A-Z0-9_]+")
    names: set[str] = set()
    for folder in ("webapp", "analysis"):
        for path in (ROOT / folder).rglob("*.py"):
            names.update(pattern.findall(path.read_text(encoding="utf-8")))
    return names


@pytest.mark.parametrize("command", _sub_commands(build_parser()))
def test_cli_command_is_documented(command):
    text = (DOCS / "cli.md").read_text(encoding="utf-8")
    assert f"latentdesk {command}" in text, f"`latentdesk {command}` is missing from docs/cli.md"


def test_every_api_route_is_documented(tmp_path):
    text = (DOCS / "api.md").read_text(encoding="utf-8")
    documented = {re.sub(r"<[^>]+>", "<>", m) for m in re.findall(r"`(?:GET|POST|PUT|DELETE|PATCH) ([^`\s]+)`", text)}
    missing = []
    for rule in _api_rules(tmp_path):
        shape = re.sub(r"<[^>]+>", "<>", rule)
        if shape not in documented:
            missing.append(rule)
    assert not missing, f"routes missing from docs/api.md: {missing}"


def test_every_configuration_variable_is_documented():
    text = (DOCS / "configuration.md").read_text(encoding="utf-8")
    missing = sorted(name for name in _config_variables() if name not in text)
    assert not missing, f"variables missing from docs/configuration.md: {missing}"
