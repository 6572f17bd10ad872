"""A real ``plumbwatch serve`` process for tests and benchmarks that need one.

The CLI is driven exactly as an operator would: ``plumbwatch migrate``, then
``plumbwatch token create`` (the token is the last line of stdout), then
``plumbwatch serve`` on a free port. Every wait is bounded, and :func:`served`
kills the process on the way out whatever happened.
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx

_SCRIPT = Path(sys.executable).with_name("plumbwatch")


def command() -> list[str]:
    """The ``plumbwatch`` console script of this interpreter's environment."""
    if _SCRIPT.exists():
        return [str(_SCRIPT)]
    return [sys.executable, "-m", "plumbwatch.cli.main"]


def environment(database_url: str, **extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("PLUMBWATCH_")}
    env.update(PLUMBWATCH_DATABASE_URL=database_url, PLUMBWATCH_SCHEDULER="off", **extra)
    return env


def run_cli(database_url: str, *args: str, timeout: float = 60) -> str:
    done = subprocess.run(
        [*command(), *args],
        env=environment(database_url),
        capture_output=True,
        text=True,
        timeout=timeout,
        check=False,
    )
    if done.returncode != 0:
        raise RuntimeError(f"plumbwatch {' '.join(args)} failed: {done.stderr or done.stdout}")
    return done.stdout


def migrate_and_token(database_url: str, *, name: str = "live-admin") -> str:
    """Migrate the database and return a new admin token."""
    run_cli(database_url, "migrate")
    out = run_cli(database_url, "token", "create", "--scope", "admin", "--name", name)
    return out.strip().splitlines()[-1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Server:
    process: subprocess.Popen[bytes]
    url: str
    log: Path

    @property
    def pid(self) -> int:
        return self.process.pid

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def kill(self) -> None:
        """SIGKILL, as a crash would: no shutdown handler runs."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
        self.process.wait(timeout=10)


def start(
    database_url: str,
    log: Path,
    *,
    extra_args: Sequence[str] = (),
    env: dict[str, str] | None = None,
    ready_timeout: float = 30,
) -> Server:
    port = free_port()
    handle = log.open("ab")
    process = subprocess.Popen(
        [*command(), "serve", "--port", str(port), *extra_args],
        env={**environment(database_url), **(env or {})},
        stdout=handle,
        stderr=subprocess.STDOUT,
    )
    handle.close()
    server = Server(process, f"http://127.0.0.1:{port}", log)
    deadline = time.monotonic() + ready_timeout
    while True:
        if process.poll() is not None:
            raise RuntimeError(f"server exited with {process.returncode}:\n{server.log_text()}")
        try:
            if httpx.get(f"{server.url}/healthz", timeout=1).status_code == 200:
                return server
        except httpx.TransportError:
            pass
        if time.monotonic() > deadline:
            server.kill()
            raise RuntimeError(f"server not ready after {ready_timeout} s:\n{server.log_text()}")
        time.sleep(0.05)


@contextmanager
def served(database_url: str, log: Path, **kwargs: Any) -> Iterator[Server]:
    server = start(database_url, log, **kwargs)
    try:
        yield server
    finally:
        server.kill()


def declare_binary_model(url: str, token: str, name: str, **fields: Any) -> None:
    body = {"kind": "binary", "label_horizon": "P5D", "segment_keys": ["region"], **fields}
    r = httpx.put(
        f"{url}/v1/models/{name}",
        json=body,
        headers={"Authorization": f"Bearer {token}"},
        timeout=30,
    )
    r.raise_for_status()


@contextmanager
def database(kind: str, folder: Path) -> Iterator[str]:
    """An empty database URL of ``kind`` ("sqlite" or "postgresql"), for fixtures wider
    than one test (the per-test ``database_url`` fixture lives in conftest)."""
    if kind == "sqlite":
        yield f"sqlite:///{folder / 'live.db'}"
        return
    from tests.conftest import postgres_schema

    with postgres_schema() as url:
        yield url


@contextmanager
def service(kind: str, folder: Path, **kwargs: Any) -> Iterator[tuple[Server, str]]:
    """A migrated database of ``kind``, an admin token and a server on it."""
    with database(kind, folder) as url:
        token = migrate_and_token(url)
        with served(url, folder / "server.log", **kwargs) as server:
            yield server, token


def engine_params() -> list[Any]:
    """Fixture params over both engines, the PostgreSQL one marked like conftest's."""
    import pytest

    return [
        pytest.param("sqlite", id="sqlite"),
        pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
    ]


class Lines:
    """Collects a process's output lines in a thread; ``wait_for`` is bounded."""

    def __init__(self, process: subprocess.Popen[str]) -> None:
        self.lines: list[str] = []
        assert process.stdout is not None
        stream = process.stdout
        self._stream = stream
        self._thread = threading.Thread(target=self._read, daemon=True)
        self._thread.start()

    def _read(self) -> None:
        # close() may shut the pipe while a grandchild still holds it open.
        with contextlib.suppress(ValueError, OSError):
            self.lines.extend(self._stream)

    def close(self) -> None:
        self._thread.join(timeout=10)
        self._stream.close()

    def wait_for(self, pattern: str, timeout: float) -> re.Match[str]:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for line in list(self.lines):
                if found := re.search(pattern, line):
                    return found
            time.sleep(0.2)
        raise AssertionError(f"no line matching {pattern!r} in:\n{''.join(self.lines)}")
