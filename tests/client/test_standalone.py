"""plumbwatch.client stands alone: httpx only (DESIGN.md "Layout")."""

from __future__ import annotations

import subprocess
import sys


def test_importing_the_client_loads_no_server_or_data_library() -> None:
    code = (
        "import sys, plumbwatch.client; "
        "print(sorted({m.split('.')[0] for m in sys.modules} & "
        "{'numpy', 'pandas', 'sqlalchemy', 'fastapi', 'pydantic', 'orjson', 'scipy', 'alembic'}))"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert done.stdout.strip() == "[]"
