"""Arrows point one way (DESIGN.md "Layout"): each package imports only the rooms below it."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "service" / "plumbwatch"

# Room -> the plumbwatch rooms it may import. Top-level modules (config, errors,
# timefmt, declarations, validation) are shared vocabulary below every room but stats.
SHARED = {"errors", "timefmt", "declarations", "validation", "config", "rulespec"}
ALLOWED = {
    "stats": set(),
    "store": {"stats"} | SHARED,
    "evaluate": {"stats", "store"} | SHARED,
    "alerts": {"stats", "store", "evaluate"} | SHARED,
    "jobs": {"evaluate", "alerts", "store", "stats"} | SHARED,
    "web": {"stats"} | SHARED,
    "api": {"stats", "store", "evaluate", "alerts", "jobs", "web"} | SHARED,
    "client": set(),
    "cli": {"stats", "store", "evaluate", "alerts", "jobs", "web", "api", "client"} | SHARED,
}


def _imports(path: Path) -> set[str]:
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            names = [node.module]
        elif isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        else:
            continue
        for name in names:
            parts = name.split(".")
            if parts[0] == "plumbwatch" and len(parts) > 1:
                found.add(parts[1])
    return found


def test_rooms_import_only_downwards() -> None:
    problems = []
    for room, allowed in ALLOWED.items():
        folder = PACKAGE / room
        if not folder.exists():
            continue
        for path in folder.rglob("*.py"):
            bad = _imports(path) - allowed - {room}
            if bad:
                problems.append(f"{path.relative_to(PACKAGE)} imports {sorted(bad)}")
    assert problems == []


def test_shared_modules_stay_below_the_rooms() -> None:
    for name in SHARED:
        path = PACKAGE / f"{name}.py"
        assert _imports(path) <= SHARED, f"{name}.py imports a room"
