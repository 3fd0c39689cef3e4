"""Architecture checks: imports point down the stack only (DEVELOPERS.md, "Layout")."""

from __future__ import annotations

import ast
import pkgutil
import subprocess
import sys
from pathlib import Path
from typing import Final

import pytest

import triage

LOWER_PACKAGES = (
    "triage.results",
    "triage.core",
    "triage.data",
    "triage.engine",
    "triage.views",
)

BASE: Final = frozenset({"_typing", "errors", "wording"})
"""Modules with no triage imports of their own, which every layer may use."""

MAY_IMPORT: Final[dict[str, frozenset[str]]] = {
    "triage": frozenset(),  # triage/__init__.py: the version string
    "_typing": frozenset(),
    "errors": frozenset(),
    "wording": frozenset(),
    "results": BASE,
    "core": BASE | {"results"},
    "data": BASE | {"results", "core"},
    "engine": BASE | {"results", "core", "data"},
    "views": BASE | {"results", "core"},
    "tui": BASE | {"results", "core", "data", "engine", "views"},
    "cli": BASE | {"triage", "results", "core", "data", "engine", "views", "tui"},
    "__main__": frozenset({"cli"}),
}
"""Each layer of triage (a sub-package or top-level module) -> the layers it may import.

The one place the layering is written down; DEVELOPERS.md draws it. An import of the layer
itself is always allowed.
"""

TYPE_ONLY: Final[dict[str, frozenset[str]]] = {"results": frozenset({"core"})}
"""Arrows allowed only inside ``if TYPE_CHECKING:`` (never run): a few result fields name a
core object (`FitOutcome.spec`, `.builder`, `.fit`; `ComparisonOutcome.holdout_rule`)."""

ROOT: Final = Path(triage.__file__).resolve().parent


def _module_name(path: Path) -> str:
    parts = path.relative_to(ROOT.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _layer(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else parts[0]


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


class _Imports(ast.NodeVisitor):
    """Every import in one module, at any depth, with whether it runs only for type checking."""

    def __init__(self, module: str, is_package: bool) -> None:
        self.package = module if is_package else module.rpartition(".")[0]
        self.found: list[tuple[int, str, bool]] = []
        self._type_only = False

    def visit_If(self, node: ast.If) -> None:
        if not _is_type_checking(node.test):
            self.generic_visit(node)
            return
        outer, self._type_only = self._type_only, True
        for child in node.body:
            self.visit(child)
        self._type_only = outer
        for child in node.orelse:
            self.visit(child)

    def visit_Import(self, node: ast.Import) -> None:
        self.found += [(node.lineno, alias.name, self._type_only) for alias in node.names]

    def visit_ImportFrom(self, node: ast.ImportFrom) -> None:
        base = node.module or ""
        if node.level:
            anchor = self.package.split(".")[: len(self.package.split(".")) - node.level + 1]
            base = ".".join([*anchor, base] if base else anchor)
        # `from triage.tui import app` may import the module triage.tui.app: keep both names
        # (the checks look up which of them are modules).
        targets = [base] + [f"{base}.{alias.name}" for alias in node.names]
        self.found += [(node.lineno, target, self._type_only) for target in targets]


def _triage_imports() -> dict[str, list[tuple[int, str, bool]]]:
    """Module name -> (line, imported triage module, type-checking only) for every module."""
    found: dict[str, list[tuple[int, str, bool]]] = {}
    for path in sorted(ROOT.rglob("*.py")):
        module = _module_name(path)
        visitor = _Imports(module, is_package=path.name == "__init__.py")
        visitor.visit(ast.parse(path.read_text(encoding="utf-8"), filename=str(path)))
        found[module] = [
            (line, target, type_only)
            for line, target, type_only in visitor.found
            if target == "triage" or target.startswith("triage.")
        ]
    modules = set(found)
    # Keep an imported name only when it is a module, or the module it was imported from.
    return {
        module: [
            (line, target, type_only)
            for line, target, type_only in imports
            if target in modules or target.rpartition(".")[0] not in modules
        ]
        for module, imports in found.items()
    }


def test_layers_every_module_belongs_to_a_listed_layer() -> None:
    # A new sub-package must be placed in MAY_IMPORT before its imports can be checked.
    assert {_layer(module) for module in _triage_imports()} <= set(MAY_IMPORT)


def test_layers_every_import_points_down_the_allowed_arrows() -> None:
    wrong = []
    for module, imports in _triage_imports().items():
        layer = _layer(module)
        for line, target, type_only in imports:
            to = _layer(target)
            if to == layer or to in MAY_IMPORT[layer]:
                continue
            if type_only and to in TYPE_ONLY.get(layer, frozenset()):
                continue
            kind = "type-checking import" if type_only else "import"
            wrong.append(f"{module}:{line}: {kind} of {target} ({layer} -> {to})")
    assert not wrong, "imports against the layers (tests/test_layers.py, MAY_IMPORT):\n" + (
        "\n".join(wrong)
    )


def test_layers_no_import_cycle_between_modules() -> None:
    # Counting type-checking and function-level imports too: the type-only arrows from results
    # to core must not close a loop through the core module that builds the result.
    imports = _triage_imports()
    graph = {
        module: {target for _, target, _ in found if target in imports and target != module}
        for module, found in imports.items()
    }
    done: set[str] = set()

    def visit(module: str, path: tuple[str, ...]) -> None:
        if module in path:
            cycle = (*path[path.index(module) :], module)
            pytest.fail("import cycle: " + " -> ".join(cycle))
        if module in done:
            return
        for target in sorted(graph[module]):
            visit(target, (*path, module))
        done.add(module)

    for module in sorted(graph):
        visit(module, ())


def _modules(package: str) -> list[str]:
    module = __import__(package, fromlist=["__path__"])
    return [package] + [f"{package}.{info.name}" for info in pkgutil.iter_modules(module.__path__)]


@pytest.mark.parametrize("package", LOWER_PACKAGES)
def test_layers_lower_packages_never_import_textual(package: str) -> None:
    modules = _modules(package)
    code = (
        "import importlib, sys\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        "print('textual' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "False", f"{package} pulled in Textual"


def test_layers_fit_command_never_imports_textual() -> None:
    code = (
        "import sys\n"
        "from triage.cli.main import build_parser\n"
        "build_parser()\n"
        "import triage.cli.commands.fit, triage.cli.commands.report\n"
        "print('textual' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "False"


def test_layers_package_version_is_the_installed_one() -> None:
    # The installed distribution's metadata (importlib.metadata) as the outside record.
    from importlib.metadata import version

    assert triage.__version__.count(".") >= 2
    assert version("triage") == triage.__version__


def test_layers_every_package_is_listed_for_installation() -> None:
    # pyproject.toml lists packages explicitly (keymaps/ is mapped to triage.keymaps), so a
    # new sub-package must be added there or an installed triage would lack it.
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    listed = set(
        tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    )
    found = {
        ".".join(init.parent.relative_to(root).parts)
        for init in (root / "triage").rglob("__init__.py")
    }
    assert found | {"triage.keymaps"} == listed


def test_layers_code_is_ruff_clean() -> None:
    # ruff (a test dependency) with the project's own settings in pyproject.toml
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    done = subprocess.run(
        [sys.executable, "-m", "ruff", "check", "triage", "tests", "bench"],
        cwd=root,
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0, done.stdout[-3000:]
