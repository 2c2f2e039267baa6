"""Imports point one way: every `server` module imports only from its own package and from
lower layers (`server.LAYERS`); packages of one layer do not import each other; the emulated
box and virtual animals (`hardware_stubs`) are reached only from the lab and above, and never
import the learning models they are meant to test independently."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import server

ROOT = Path(__file__).resolve().parents[1]
RANK = {package: rank for rank, layer in enumerate(server.LAYERS) for package in layer}


def imported_modules(path: Path) -> list[tuple[int, str]]:
    """(line, module) of every import in a file, at any depth (function-level ones too)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), str(path))):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.append((node.lineno, node.module))
    return found


def server_modules() -> list[Path]:
    return sorted(p for p in (ROOT / "server").rglob("*.py") if p.parent != ROOT / "server")


def test_every_package_has_a_layer() -> None:
    packages = {p.name for p in (ROOT / "server").iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    assert packages == set(RANK)
    loose = sorted(p.name for p in (ROOT / "server").glob("*.py") if p.name != "__init__.py")
    assert loose == [], "modules belong in a layer's package"


@pytest.mark.parametrize("path", server_modules(), ids=lambda p: str(p.relative_to(ROOT)))
def test_imports_point_down(path: Path) -> None:
    package = path.relative_to(ROOT / "server").parts[0]
    wrong = []
    for line, module in imported_modules(path):
        parts = module.split(".")
        if parts[0] == "hardware_stubs" and RANK[package] < RANK["lab"]:
            wrong.append(f"line {line}: {module} (test equipment, for the lab and above)")
        if parts[0] != "server" or len(parts) < 2 or parts[1] == package:
            continue
        other = parts[1]
        if other not in RANK:
            wrong.append(f"line {line}: {module} (not a layer)")
        elif RANK[other] >= RANK[package]:
            wrong.append(f"line {line}: {module} ({other} is not below {package})")
    assert wrong == [], f"{path.relative_to(ROOT)} imports upward or sideways: {wrong}"


def test_virtual_animals_share_nothing_with_the_models() -> None:
    for path in sorted((ROOT / "hardware_stubs").rglob("*.py")):
        for line, module in imported_modules(path):
            assert not module.startswith("server.models"), f"{path.relative_to(ROOT)}:{line} imports {module}"
