"""plumbwatch.stats stays a pure library: no web, database or HTTP packages."""

from __future__ import annotations

import json
import pkgutil
import subprocess
import sys

import plumbwatch.stats

FORBIDDEN = ("sqlalchemy", "fastapi", "httpx", "starlette")


def test_importing_every_stats_module_loads_no_service_stack() -> None:
    modules = [m.name for m in pkgutil.iter_modules(plumbwatch.stats.__path__, "plumbwatch.stats.")]
    assert "plumbwatch.stats.sketch" in modules
    code = (
        "import importlib, json, sys\n"
        f"for m in {modules!r}: importlib.import_module(m)\n"
        "print(json.dumps(sorted(sys.modules)))\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120
    )
    loaded = json.loads(out.stdout)
    bad = [m for m in loaded if m.split(".")[0] in FORBIDDEN]
    assert bad == []
    others = [
        m for m in loaded if m.startswith("plumbwatch.") and not m.startswith("plumbwatch.stats")
    ]
    assert others == []
