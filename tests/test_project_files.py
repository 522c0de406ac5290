"""The project's own files install everything the package and its tests import, and CI
runs the tests in an environment made from those files alone."""

from __future__ import annotations

import ast
import re
import shutil
import subprocess
import sys
import tomllib
from importlib.metadata import packages_distributions
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LOCAL = {
    "streamrate",
    "service_fakes",
    "tests",
    "conftest",
    "helpers",
    "rating_reference",
    "encode_reference",
}


def _canonical(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower()


def _declared() -> set[str]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text("utf-8"))["project"]
    reqs = [*project["dependencies"], *project["optional-dependencies"]["test"]]
    return {_canonical(re.split(r"[<>=!~;\[ ]", r, maxsplit=1)[0]) for r in reqs}


def _catches_import_error(node: ast.AST) -> bool:
    if not isinstance(node, ast.Try):
        return False
    caught = {ast.unparse(h.type) for h in node.handlers if h.type is not None}
    return bool(caught & {"ImportError", "ModuleNotFoundError"})


def _imported_modules(*folders: str) -> dict[str, str]:
    """Top-level module -> first file importing it, over every .py file in the folders."""
    found: dict[str, str] = {}
    for folder in folders:
        for path in sorted((ROOT / folder).rglob("*.py")):
            tree = ast.parse(path.read_text("utf-8"))
            optional = {id(n) for t in ast.walk(tree) if _catches_import_error(t) for n in t.body}
            for node in ast.walk(tree):
                if id(node) in optional:  # try: import x / except ImportError: optional
                    continue
                if isinstance(node, ast.Import):
                    names = [a.name for a in node.names]
                elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                    names = [node.module]
                else:
                    continue
                for name in names:
                    found.setdefault(name.split(".")[0], str(path.relative_to(ROOT)))
    return found


def test_every_third_party_import_is_a_declared_dependency() -> None:
    dists = packages_distributions()
    declared = _declared()
    missing = []
    for module, where in _imported_modules("streamrate", "tests", "bench").items():
        if module in sys.stdlib_module_names or module in LOCAL or module == "__future__":
            continue
        names = {_canonical(d) for d in dists.get(module, [module])}
        if not names & declared:
            missing.append(f"{module} (imported by {where}; distribution {sorted(names)})")
    assert not missing, "not in pyproject.toml dependencies or the test extras: " + "; ".join(
        missing
    )


def test_ci_runs_the_tests_in_a_fresh_virtual_environment() -> None:
    script = (ROOT / ".ci" / "run").read_text("utf-8")
    assert "python3 -m venv" in script
    assert re.search(r"^make test PYTHON=\"\$venv/bin/python\"$", script, re.M)
    assert "prometheus" in script and "redis-server" in script


@pytest.mark.skipif(shutil.which("make") is None, reason="make is not installed")
def test_make_has_a_typecheck_target_that_runs_mypy() -> None:
    out = subprocess.run(
        ["make", "-n", "typecheck", "PYTHON=py"], cwd=ROOT, capture_output=True, text=True
    )
    assert out.returncode == 0, out.stderr
    assert "py -m mypy streamrate" in out.stdout
    assert "mypy" in _declared()
