"""The house's import contracts (pyproject.toml, ``[tool.importlinter]``) hold.

import-linter builds the import graph with grimp and checks three contracts:
the webapp layers (ways in -> services -> auth/jobs -> store -> config), the
framework-free ``analysis`` package, and no import cycle between sibling
modules at any depth. Source for the contract types: import-linter
documentation, "Contract types" (import-linter.readthedocs.io), layers,
forbidden and acyclic_siblings.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
LINT = [sys.executable, "-c", "import sys; from importlinter.cli import lint_imports_command; sys.exit(lint_imports_command())"]


def _lint(cwd: Path, config: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(cwd)}
    return subprocess.run([*LINT, "--config", str(config), "--no-cache"], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def test_the_house_keeps_its_import_contracts():
    result = _lint(ROOT, ROOT / "pyproject.toml")
    assert result.returncode == 0, result.stdout + result.stderr
    assert "3 kept, 0 broken" in result.stdout


def _package(root: Path, files: dict[str, str]) -> None:
    for name, body in files.items():
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(body))


def test_the_cycle_contract_fails_on_two_modules_that_import_each_other(tmp_path):
    # The same contract type as the house's, on a package with the cycle the old
    # webapp had (a page module and its helper importing each other).
    _package(tmp_path, {
        "house/__init__.py": "",
        "house/pages/__init__.py": "",
        "house/pages/dataset.py": "from house.pages import dataset_views\n",
        "house/pages/dataset_views.py": "from house.pages import dataset\n",
    })
    config = tmp_path / "contracts.toml"
    config.write_text(textwrap.dedent("""
        [tool.importlinter]
        root_packages = ["house"]

        [[tool.importlinter.contracts]]
        name = "no cycles"
        type = "acyclic_siblings"
        ancestors = ["house"]
    """))
    result = _lint(tmp_path, config)
    assert result.returncode != 0
    assert "BROKEN" in result.stdout


def test_the_layer_contract_fails_when_the_store_reaches_up_into_a_service(tmp_path):
    _package(tmp_path, {
        "house/__init__.py": "",
        "house/services.py": "import house.store\n",
        "house/store.py": "import house.services\n",
    })
    config = tmp_path / "contracts.toml"
    config.write_text(textwrap.dedent("""
        [tool.importlinter]
        root_packages = ["house"]

        [[tool.importlinter.contracts]]
        name = "layers"
        type = "layers"
        containers = ["house"]
        layers = ["services", "store"]
    """))
    result = _lint(tmp_path, config)
    assert result.returncode != 0
    assert "house.store is not allowed to import house.services" in result.stdout
