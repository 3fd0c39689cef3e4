"""Architecture checks: imports point down the stack only (DEVELOPERS.md, "Layout")."""

from __future__ import annotations

import pkgutil
import subprocess
import sys

import pytest

import triage

LOWER_PACKAGES = ("triage.core", "triage.data", "triage.engine", "triage.views")


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
