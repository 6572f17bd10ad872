"""``plumbwatch demo``: a local service on SQLite with fresh tokens, ready to try.

For now it migrates, creates an admin, an ingest and a read token, and serves;
the demo feed (issue: a newcomer's first hour) will add the parcel-courier data.
"""

from __future__ import annotations

from datetime import UTC, datetime

from plumbwatch.config import Settings
from plumbwatch.store import tokens
from plumbwatch.store.engine import create_engine
from plumbwatch.store.migrate import upgrade
from plumbwatch.timefmt import format_instant, to_micros


def run_demo(settings: Settings, *, host: str, port: int) -> int:
    import uvicorn

    from plumbwatch.api import create_app

    engine = create_engine(settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms)
    upgrade(engine)
    now_us = to_micros(datetime.now(UTC))
    stamp = format_instant(now_us)
    created = {}
    with engine.begin() as conn:
        for scope in ("admin", "ingest", "read"):
            _, secret = tokens.create(
                conn=conn, name=f"demo-{scope}-{stamp}", scope=scope, now_us=now_us
            )
            created[scope] = secret
    url = f"http://{host}:{port}"
    print(f"plumbwatch demo on {settings.database_url}")
    print(f"  URL:          {url}/v1/models   (open probes: {url}/healthz, {url}/readyz)")
    for scope, secret in created.items():
        print(f"  {scope + ' token:':13} {secret}")
    print(f"  try: curl -H 'Authorization: Bearer {created['read']}' {url}/v1/models")
    print("Ctrl-C stops the server.", flush=True)
    uvicorn.run(create_app(settings, engine=engine), host=host, port=port, log_level="warning")
    return 0
