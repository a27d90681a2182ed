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


def _cycles_through_package_inits(package: str) -> list[list[str]]:
    """Groups of modules that import each other, counting that importing ``a.b.c`` runs
    ``a/__init__`` and ``a/b/__init__`` first (Python language reference, "The import
    system", 5.4.2: parent packages are imported before their submodules). Tarjan's
    strongly connected components over grimp's graph."""
    import grimp

    graph = grimp.build_graph(package, include_external_packages=False)
    edges = {}
    for module in graph.modules:
        direct = set(graph.find_modules_directly_imported_by(module))
        parents = {".".join(t.split(".")[:i]) for t in direct for i in range(1, t.count(".") + 1)}
        # a module's own package has already run when the module runs (a sibling import is no loop)
        parents.discard(module.rpartition(".")[0])
        edges[module] = {t for t in direct | parents if t in graph.modules and t != module}
    index, low, stack, on_stack, groups = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in edges[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                groups.append(sorted(group))

    for module in list(edges):
        if module not in index:
            visit(module)
    return groups


def test_no_module_imports_itself_round_about_through_a_package_init():
    # acyclic_siblings does not count package __init__ files that run on the way to a
    # submodule; a re-export in webapp/__init__.py or a route table in webapp/api/__init__.py
    # made every module of the house depend on the app factory. None may.
    assert _cycles_through_package_inits("webapp") == []
    assert _cycles_through_package_inits("analysis") == []


def test_the_cycle_check_sees_a_loop_through_a_package_init(tmp_path):
    package = tmp_path / "loopy"
    (package / "inner").mkdir(parents=True)
    (package / "__init__.py").write_text("from loopy.factory import make\n")
    (package / "factory.py").write_text("def make():\n    from loopy.inner import part\n")
    (package / "inner" / "__init__.py").write_text("")
    (package / "inner" / "part.py").write_text("import loopy\n")
    sys.path.insert(0, str(tmp_path))
    try:
        groups = _cycles_through_package_inits("loopy")
    finally:
        sys.path.remove(str(tmp_path))
    assert groups and "loopy.factory" in groups[0] and "loopy.inner.part" in groups[0]
