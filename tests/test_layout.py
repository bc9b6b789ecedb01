"""The house rules of the package, read from the source of every module.

- ``lotproof.runner`` is layered in the order data flows (recipe, evaluate, lot,
  record, history, show, jobs, study, cli): a module imports only from its own layer or the
  layers before it, and the step library imports nothing of the runner;
- no import cycle between modules, lazy (function-level) and type-checking
  imports included;
- no module imports another module's ``_private`` name, and a ``_private``
  module is imported only from inside its own package;
- installed, the distribution provides the one import package ``lotproof``.
"""

from __future__ import annotations

import ast
import re
import subprocess
import sys
from pathlib import Path

import networkx as nx
import pytest

ROOT = Path(__file__).resolve().parents[1]
#: where each part of the import package lives in the repository
FOLDERS = {
    "lotproof": ROOT / "lotproof",
    "lotproof.runner": ROOT / "runner",
    "lotproof.steps": ROOT / "steps",
}
#: runner sub-packages in the order data flows; a module may import only from its own rank or lower
LAYERS = ("recipe", "evaluate", "lot", "record", "history", "show", "jobs", "study", "cli")


def _modules() -> dict[str, Path]:
    found: dict[str, Path] = {}
    for package, folder in FOLDERS.items():
        for path in sorted(folder.rglob("*.py")):
            parts = list(path.relative_to(folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            if package == "lotproof" and parts and parts[0] in ("runner", "steps"):
                continue
            found[".".join([package, *parts])] = path
    return found


MODULES = _modules()


def _is_package(name: str) -> bool:
    return MODULES.get(name, Path()).name == "__init__.py"


def _imports(name: str, path: Path) -> list[tuple[str, str | None, int]]:
    """(module imported, name taken from it or None, line) for every import statement."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = name if _is_package(name) else name.rpartition(".")[0]
    found: list[tuple[str, str | None, int]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(alias.name, None, node.lineno) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module or ""
            for alias in node.names:
                if f"{source}.{alias.name}" in MODULES:  # a submodule, not a name
                    found.append((f"{source}.{alias.name}", None, node.lineno))
                else:
                    found.append((source, alias.name, node.lineno))
    return [item for item in found if item[0].split(".")[0] == "lotproof"]


def _rank(name: str) -> int:
    parts = name.split(".")
    if parts[:2] == ["lotproof", "steps"]:
        return 0
    if parts[:2] == ["lotproof", "runner"]:
        if len(parts) > 2 and parts[2] in LAYERS:
            return 2 + LAYERS.index(parts[2])
        return 1  # lotproof.runner itself, errors, files: shared by every layer
    return 2 + len(LAYERS)  # the top package: the public API over everything


def _graph() -> nx.DiGraph:
    graph = nx.DiGraph()
    for name, path in MODULES.items():
        graph.add_node(name)
        for target, _, line in _imports(name, path):
            if target != name:
                graph.add_edge(name, target, line=line)
    return graph


def test_every_module_is_found() -> None:
    # the scan must see the package, or every other check here would pass on nothing
    assert "lotproof.runner.jobs.run" in MODULES
    assert "lotproof.steps.morphology" in MODULES
    assert len(MODULES) > 50


def test_imports_go_one_way() -> None:
    wrong = []
    for name, path in MODULES.items():
        for target, _, line in _imports(name, path):
            if _rank(target) > _rank(name):
                wrong.append(
                    f"{path.relative_to(ROOT)}:{line}: {name} imports {target}, a later stage"
                )
    assert wrong == []


def test_no_import_cycles() -> None:
    graph = _graph()
    cycles = [" -> ".join(c) for c in nx.simple_cycles(graph) if len(c) > 1]
    assert cycles == []


def test_no_private_names_across_modules() -> None:
    wrong = []
    for name, path in MODULES.items():
        package = name if _is_package(name) else name.rpartition(".")[0]
        for target, taken, line in _imports(name, path):
            where = f"{path.relative_to(ROOT)}:{line}"
            if taken is not None and taken.startswith("_") and not taken.startswith("__"):
                wrong.append(f"{where}: takes {taken} from {target}")
            private = [i for i, part in enumerate(target.split(".")) if part.startswith("_")]
            if private:
                owner = ".".join(target.split(".")[: private[0]])
                if not (package == owner or package.startswith(owner + ".")):
                    wrong.append(f"{where}: imports the private module {target}")
    assert wrong == []


def test_the_checks_see_a_cycle_and_a_private_import(tmp_path: Path) -> None:
    # the checks above can fail: a graph with a loop has a cycle, a private name is seen
    graph = nx.DiGraph([("a", "b"), ("b", "a")])
    assert [c for c in nx.simple_cycles(graph) if len(c) > 1]
    path = tmp_path / "m.py"
    path.write_text("from lotproof.runner.record.ledger import _private\n", encoding="utf-8")
    assert _imports("lotproof.runner.jobs.m", path) == [
        ("lotproof.runner.record.ledger", "_private", 1)
    ]
    assert (
        _rank("lotproof.runner.cli.main")
        > _rank("lotproof.runner.recipe.model")
        > _rank("lotproof.steps")
    )


def test_only_the_lotproof_package_is_importable_outside_the_tree(tmp_path: Path) -> None:
    # run from an empty folder, so the repository is not on the path
    code = (
        "import importlib.util, lotproof\n"
        "print(lotproof.load_recipe.__module__, lotproof.run_lot.__module__)\n"
        "print(importlib.util.find_spec('runner'), importlib.util.find_spec('steps'))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        check=True,
        env={"PATH": "/usr/bin:/bin", "PYTHONNOUSERSITE": "1"},
    )
    assert done.stdout.split() == [
        "lotproof.runner.recipe.load",
        "lotproof.runner.jobs.run",
        "None",
        "None",
    ]


@pytest.mark.parametrize("name", sorted(n for n in MODULES if n.startswith("lotproof.runner.")))
def test_every_runner_module_has_a_docstring(name: str) -> None:
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    assert ast.get_docstring(tree), f"{MODULES[name]} says nothing of what it is for"


def _developers_sections() -> dict[str, str]:
    """DEVELOPERS.md's module tables, by the folder each maps ('runner', 'runner/recipe', ...)."""
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    marks = list(re.finditer(r"^(?:### `(\w+)/`|\*\*`(\w+)/`\*\*)", text, flags=re.M))
    sections = {}
    for mark, following in zip(marks, [*marks[1:], None], strict=True):
        name = mark.group(1) or f"runner/{mark.group(2)}"
        end = following.start() if following is not None else text.find("\n## ", mark.end())
        sections[name] = text[mark.end() : end]
    return sections


def test_developers_md_maps_every_module() -> None:
    # every module file of the package is named in DEVELOPERS.md's table for its folder
    sections = _developers_sections()
    missing = []
    for path in MODULES.values():
        folder = path.parent.relative_to(ROOT).as_posix()
        if path.name == "__init__.py" and folder.count("/"):
            continue  # a sub-package's docstring-only __init__: its heading maps it
        table = sections.get(folder)
        if table is None or f"`{path.name}`" not in table:
            missing.append(path.relative_to(ROOT).as_posix())
    assert {"lotproof", "runner", "runner/recipe", "runner/show", "steps"} <= set(sections)
    assert missing == []
