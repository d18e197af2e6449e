"""Subpackages meet through public names only, and sim's lazy table is complete."""

from __future__ import annotations

import ast
from pathlib import Path

import plantrig.sim

REPO = Path(__file__).resolve().parents[1]
# folder -> the package it is installed as (pyproject's package-dir)
PACKAGES = {"app": "plantrig", "sim": "plantrig.sim", "io": "plantrig.io", "gui": "plantrig.gui"}


def _subpackage(module: str) -> str:
    parts = module.split(".")
    return ".".join(parts[:2]) if len(parts) > 1 and parts[1] in ("sim", "io", "gui") \
        else "plantrig"


def test_cross_package_imports_use_public_names() -> None:
    private = []
    for folder, package in PACKAGES.items():
        for path in sorted((REPO / folder).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                if not (isinstance(node, ast.ImportFrom) and node.module
                        and node.module.startswith("plantrig")):
                    continue
                if _subpackage(node.module) == package:
                    continue   # inside a subpackage, its private modules are its own
                names = [node.module.split(".")[2:], [a.name for a in node.names]]
                if any(part.startswith("_") and not part.endswith("__")   # __version__
                       for group in names for part in group):
                    private.append(f"{folder}/{path.name}:{node.lineno} {node.module}")
    assert private == []


def test_every_lazy_sim_name_is_declared_for_type_checkers() -> None:
    # sim/__init__.py maps each public name to its module (_HOME) and imports the same
    # names under TYPE_CHECKING; a name in one and not the other is a mistake
    tree = ast.parse((REPO / "sim" / "__init__.py").read_text(encoding="utf-8"))
    declared = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and getattr(node.test, "id", "") == "TYPE_CHECKING":
            for imp in node.body:
                assert isinstance(imp, ast.ImportFrom) and imp.module
                declared.update({a.name: imp.module.removeprefix("plantrig.sim.")
                                 for a in imp.names})
    home = plantrig.sim._HOME
    assert declared == home
