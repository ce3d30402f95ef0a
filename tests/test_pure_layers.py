"""The policy maths and the audit statistics stay pure: no database, HTTP, files or app code.

``service.policy`` and ``service.stats`` may import each other, the standard library, numpy
and scipy, and pydantic (the policy document), and ``service.errors`` (the one root of every
refusal, which itself imports nothing but the standard library). Nothing above them (store,
api, audit, cli, demo, reports) and no I/O framework. The check reads every module's imports
with ``ast``.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PURE = ("policy", "stats")
ALLOWED_THIRD_PARTY = {"numpy", "scipy", "pydantic"}
ALLOWED_SERVICE = {f"service.{p}" for p in PURE} | {"service.errors"}
STDLIB_IO = {"sqlite3", "socket", "http", "urllib", "subprocess", "shutil"}


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
    return names


MODULES = sorted(p for layer in PURE for p in (ROOT / "service" / layer).rglob("*.py"))


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(ROOT)))
def test_pure_layer_imports(path: Path) -> None:
    bad = []
    for name in _imports(path):
        top = name.split(".")[0]
        if top == "service":
            if not any(name == a or name.startswith(a + ".") for a in ALLOWED_SERVICE):
                bad.append(name)
        elif top in STDLIB_IO or (top not in ALLOWED_THIRD_PARTY and not _is_stdlib(top)):
            bad.append(name)
    assert not bad, f"{path.relative_to(ROOT)} imports {bad}: keep this layer pure"


def _is_stdlib(top: str) -> bool:
    import sys

    return top in sys.stdlib_module_names or top == "__future__"


def test_the_check_sees_the_modules() -> None:
    # A guard against a glob that matches nothing (the parametrized test would then pass
    # vacuously).
    assert any(p.name == "derive.py" for p in MODULES)
    assert any(p.name == "proportions.py" for p in MODULES)


def test_the_error_root_imports_only_the_standard_library() -> None:
    # The pure layers derive their errors from it, so it must not pull anything in.
    bad = [n for n in _imports(ROOT / "service" / "errors.py") if not _is_stdlib(n.split(".")[0])]
    assert not bad, f"service/errors.py imports {bad}"
