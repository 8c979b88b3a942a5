"""Import direction between layers (STYLE.md): only the UI imports Textual; estimation is pure."""

from __future__ import annotations

import ast
from pathlib import Path

import tracker

PACKAGE = Path(tracker.__file__).parent


def imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text("utf-8"))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def modules_under(sub: str = "") -> list[Path]:
    return sorted((PACKAGE / sub).rglob("*.py"))


def test_only_the_ui_imports_textual():
    offenders = [
        str(p.relative_to(PACKAGE))
        for p in modules_under()
        if "ui" not in p.relative_to(PACKAGE).parts[:1]
        and any(m == "textual" or m.startswith("textual.") for m in imported_modules(p))
    ]
    assert offenders == []


def test_estimation_never_touches_the_store_or_the_ui():
    forbidden = ("duckdb", "textual", "tracker.store", "tracker.ingest", "tracker.service", "tracker.ui")
    offenders = {
        str(p.relative_to(PACKAGE)): sorted(m for m in imported_modules(p) if m.startswith(forbidden))
        for p in modules_under("estimation")
    }
    assert {k: v for k, v in offenders.items() if v} == {}


def test_store_layer_does_not_import_upper_layers():
    forbidden = ("textual", "tracker.ui", "tracker.service", "tracker.estimation", "tracker.ingest")
    bad = {
        str(p.relative_to(PACKAGE)): sorted(m for m in imported_modules(p) if m.startswith(forbidden))
        for p in modules_under("store")
    }
    assert {k: v for k, v in bad.items() if v} == {}


def test_the_layer_checks_see_real_files():
    # Guards the checks above against passing vacuously on an empty walk.
    assert len(modules_under("store")) >= 4 and len(modules_under()) >= 10
