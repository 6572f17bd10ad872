"""``plumbwatch demo``: a local service with the courier's history and a live feed.

It migrates the database, creates an admin, an ingest and a read token, starts
``plumbwatch serve`` (a child process, with its own evaluation schedule off:
the feed drives the evaluations, first one per simulated day of the replay,
then every minute) and the demo feed of the source checkout (``demo_feed/``),
which also runs the webhook receiver that prints each verified alert. The
server's alerts go to its log (``var/demo-server.log``) and, signed, to that
receiver. Ctrl-C stops the three processes cleanly.
"""

from __future__ import annotations

import base64
import os
import secrets
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import httpx

from plumbwatch.config import Settings
from plumbwatch.store import tokens
from plumbwatch.store.engine import create_engine, writing
from plumbwatch.store.migrate import upgrade
from plumbwatch.timefmt import format_instant, to_micros

STATUS_PAGE = "/"  # the overview page; it links to each model's page
JSON_STATUS = "/v1/models/late-delivery/status"
READY_TIMEOUT_S = 60
_RUN_CLI = "import sys; from plumbwatch.cli import main; sys.exit(main())"
STOP_TIMEOUT_S = 15


@dataclass(frozen=True)
class DemoOptions:
    feed: bool = True
    history_days: int = 90
    parcels_per_day: int = 2_000
    log_dir: Path = Path("var")


def repository_root() -> Path | None:
    """The source checkout holding ``demo_feed/``, if plumbwatch runs from one."""
    root = Path(__file__).resolve().parents[3]
    return root if (root / "demo_feed" / "__main__.py").is_file() else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _port_taken(host: str, port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind((host, port))
        except OSError:
            return True
    return False


def _create_tokens(settings: Settings) -> dict[str, str]:
    engine = create_engine(settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms)
    try:
        upgrade(engine)
        now_us = to_micros(datetime.now(UTC))
        stamp = format_instant(now_us)
        created = {}
        with writing(engine) as conn:
            for scope in ("admin", "ingest", "read"):
                _, secret = tokens.create(
                    conn=conn, name=f"demo-{scope}-{stamp}", scope=scope, now_us=now_us
                )
                created[scope] = secret
        return created
    finally:
        engine.dispose()


def _wait_ready(process: subprocess.Popen[bytes], url: str, log: Path) -> None:
    deadline = time.monotonic() + READY_TIMEOUT_S
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited with {process.returncode}:\n{_tail(log)}")
        try:
            if httpx.get(f"{url}/healthz", timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.1)
    raise RuntimeError(f"the server did not answer within {READY_TIMEOUT_S} s:\n{_tail(log)}")


def _tail(log: Path, lines: int = 30) -> str:
    if not log.exists():
        return "(no log)"
    return "\n".join(log.read_text(errors="replace").splitlines()[-lines:])


def _stop(processes: list[subprocess.Popen[bytes]]) -> None:
    """SIGTERM (a graceful stop for uvicorn and the feed), then wait, then kill."""
    for p in processes:
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
    deadline = time.monotonic() + STOP_TIMEOUT_S
    for p in processes:
        try:
            p.wait(timeout=max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=5)


def _interrupt(_signum: int, _frame: object) -> None:
    raise KeyboardInterrupt


def run_demo(settings: Settings, *, host: str, port: int, options: DemoOptions) -> int:
    if _port_taken(host, port):
        raise ValueError(f"port {port} is in use: stop what uses it or set PLUMBWATCH_PORT")
    created = _create_tokens(settings)
    url = f"http://{host}:{port}"
    receiver_port = _free_port()
    secret = "whsec_" + base64.b64encode(secrets.token_bytes(24)).decode()
    options.log_dir.mkdir(parents=True, exist_ok=True)
    log = options.log_dir / "demo-server.log"
    env = {
        **os.environ,
        "PLUMBWATCH_DATABASE_URL": settings.database_url,
        "PLUMBWATCH_SCHEDULER": "off",  # the feed evaluates: forward in time, never mid-replay
        "PLUMBWATCH_WEBHOOK_URL": f"http://127.0.0.1:{receiver_port}/",
        "PLUMBWATCH_WEBHOOK_SECRET": secret,
    }
    root = repository_root() if options.feed else None
    if options.feed and root is None:
        print("plumbwatch demo: the demo feed lives in the source checkout (demo_feed/); ")
        print("  serving without it. Clone the repository and run `make demo` for the full demo.")
    children: list[subprocess.Popen[bytes]] = []
    signal.signal(signal.SIGTERM, _interrupt)  # `kill` stops the demo as Ctrl-C does
    # Ctrl-C even when started from a shell that ignores SIGINT for background jobs.
    signal.signal(signal.SIGINT, signal.default_int_handler)
    began = time.time()
    with log.open("ab") as handle:
        server = subprocess.Popen(
            [sys.executable, "-c", _RUN_CLI, "serve", "--host", host, "--port", str(port)],
            env=env,
            stdout=handle,
            stderr=subprocess.STDOUT,
            start_new_session=True,  # Ctrl-C reaches us only; we stop the children in order
        )
    children.append(server)
    try:
        _wait_ready(server, url, log)
        ready = time.time() - began
        page = f"{url}{STATUS_PAGE}"
        print(f"plumbwatch demo on {settings.database_url} (server ready in {ready:.1f} s)")
        print(f"  status page:  {page}")
        print(f"  read token:   {created['read']}")
        print(f"  admin token:  {created['admin']}")
        print(f"  ingest token: {created['ingest']}")
        print(f"  server log:   {log}   (alerts are logged there too)")
        print(f"  try: curl -H 'Authorization: Bearer {created['read']}' {url}{JSON_STATUS}")
        print("Ctrl-C stops everything.", flush=True)
        if root is not None:
            children.append(
                subprocess.Popen(
                    [
                        sys.executable,
                        "-m",
                        "demo_feed",
                        "--url",
                        url,
                        "--receiver-port",
                        str(receiver_port),
                        "--history-days",
                        str(options.history_days),
                        "--parcels-per-day",
                        str(options.parcels_per_day),
                        "--started-at",
                        str(began),
                    ],
                    cwd=root,
                    env={**env, "DEMO_FEED_TOKEN": created["admin"], "DEMO_FEED_SECRET": secret},
                    start_new_session=True,
                )
            )
        # Serve until Ctrl-C; a feed that finishes (--no-live, or nothing to replay)
        # leaves the server up, a process that fails stops the demo.
        while server.poll() is None and all(p.poll() in (None, 0) for p in children):
            time.sleep(0.5)
        failed = [p for p in children if p.poll() not in (None, 0)]
        for p in failed:
            print(f"plumbwatch demo: a process stopped with {p.returncode}; stopping the rest")
        if server in failed or server.poll() is not None:
            print(_tail(log, 10))
        return 1 if failed or server.poll() is not None else 0
    except KeyboardInterrupt:
        return 0
    finally:
        _stop(children)
        print("plumbwatch demo stopped (the data stays in the database).", flush=True)
