"""Layering: dependencies point downward only (DESIGN.md §2)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "tracker"

FORBIDDEN = {
    "domain": (
        "sqlalchemy",
        "alembic",
        "streamlit",
        "plotly",
        "click",
        "tracker.db",
        "tracker.services",
        "tracker.cli",
        "tracker.criteria",
    ),
    "response": (
        "sqlalchemy",
        "alembic",
        "streamlit",
        "plotly",
        "click",
        "tracker.db",
        "tracker.services",
        "tracker.cli",
    ),
    "criteria": (
        "sqlalchemy",
        "alembic",
        "streamlit",
        "plotly",
        "click",
        "tracker.db",
        "tracker.services",
        "tracker.cli",
    ),
    "db": ("streamlit", "plotly", "click", "tracker.services", "tracker.cli"),
    "services": ("streamlit", "plotly", "click", "tracker.cli"),
    # The printable report: content from services, laid out with matplotlib
    # and reportlab; no SQL, no UI toolkit.
    "report": (
        "sqlalchemy",
        "alembic",
        "streamlit",
        "plotly",
        "click",
        "tracker.db",
        "tracker.cli",
        "tracker.dashboard",
    ),
    # Pages read widgets, call services, render: no SQL, no models, no criteria rules of their own.
    "dashboard/views": (
        "sqlalchemy",
        "tracker.db",
        "tracker.criteria.rules",
        "tracker.criteria.sets",
        "tracker.criteria.features",
        "click",
        "tracker.cli",
    ),
    "dashboard": ("click", "tracker.cli"),
}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
    return names


@pytest.mark.parametrize("layer", sorted(FORBIDDEN))
def test_layer_imports_point_downward(layer):
    offenders = []
    for path in sorted((PACKAGE / layer).rglob("*.py")):
        for name in _imports(path):
            if any(name == f or name.startswith(f + ".") for f in FORBIDDEN[layer]):
                offenders.append(f"{path.relative_to(PACKAGE)} imports {name}")
    assert offenders == []
