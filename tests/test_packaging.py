"""The package as shipped: declared files exist, declared Pythons can run it, the library
stands without the command line, and a first run leaves the clone clean."""

from __future__ import annotations

import ast
import inspect
import subprocess
import sys
from pathlib import Path

import pytest

if sys.version_info >= (3, 11):
    import tomllib
else:
    import tomli as tomllib

ROOT = Path(__file__).resolve().parent.parent
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())


def test_every_package_data_pattern_names_shipped_files():
    patterns = PYPROJECT["tool"]["setuptools"]["package-data"]["invariance"]
    for pattern in patterns:
        assert list((ROOT / "invariance").glob(pattern)), f"package-data {pattern!r} matches no file"


def test_a_declared_python_without_tomllib_gets_tomli():
    # tomllib joined the standard library in Python 3.11 (PEP 680); below it the same
    # parser is the tomli package, which must then be a dependency.
    floor = PYPROJECT["project"]["requires-python"]
    admits_310 = floor.startswith(">=3.10") or floor.startswith(">=3.9") or floor.startswith(">=3.8")
    deps = PYPROJECT["project"]["dependencies"]
    if admits_310:
        assert any(d.replace(" ", "").startswith("tomli>=") and "python_version<'3.11'" in d.replace(" ", "")
                   for d in deps), deps
    source = (ROOT / "invariance" / "encoder_list.py").read_text()
    assert "import tomli as tomllib" in source


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


def test_the_library_never_imports_click():
    # click belongs to the command line only; the library reports progress through
    # invariance/progress.py
    offenders = [str(p.relative_to(ROOT)) for p in (ROOT / "invariance").rglob("*.py")
                 if "cli" not in p.relative_to(ROOT / "invariance").parts and "click" in _imports(p)]
    assert offenders == []


def test_the_demo_writes_outside_the_tracked_files():
    from invariance.cli.other import demo
    from invariance.demo import run_demo

    default = inspect.signature(run_demo).parameters["out_dir"].default
    cli_default = next(p.default for p in demo.params if p.name == "out_dir")
    assert Path(default) == Path(cli_default)
    tracked = subprocess.run(["git", "ls-files", str(default)], cwd=ROOT, capture_output=True, text=True)
    if tracked.returncode != 0:
        pytest.skip("not a git checkout")
    assert tracked.stdout == ""  # nothing shipped lives where the demo writes
    ignored = subprocess.run(["git", "check-ignore", "-q", f"{default}/report.html"], cwd=ROOT)
    assert ignored.returncode == 0  # and what it writes never shows as a change


def test_public_api_names_resolve():
    import invariance

    for name in invariance.__all__:
        assert getattr(invariance, name) is not None, name
