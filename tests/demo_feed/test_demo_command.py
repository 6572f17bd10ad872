"""``plumbwatch demo`` as a newcomer runs it: server, feed and receiver up, status
reachable with the printed read token, and Ctrl-C stops all of it cleanly."""

from __future__ import annotations

import os
import signal
import subprocess
from pathlib import Path

import httpx
import pytest

from tests import live

pytestmark = [pytest.mark.slow, pytest.mark.timeout(300)]


@pytest.mark.parametrize("kind", live.engine_params())
def test_demo_runs_and_stops_cleanly_on_ctrl_c(kind: str, tmp_path: Path) -> None:
    port = live.free_port()
    with live.database(kind, tmp_path) as url:
        env = {**live.environment(url), "PLUMBWATCH_PORT": str(port)}
        process = subprocess.Popen(
            [*live.command(), "demo", "--history-days", "8", "--parcels-per-day", "150"],
            cwd=tmp_path,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
        )
        try:
            out = live.Lines(process)
            page = out.wait_for(r"status page:\s+(\S+)", 90).group(1)
            token = out.wait_for(r"read token:\s+(\S+)", 5).group(1)
            out.wait_for(r"webhook receiver listening", 30)
            out.wait_for(r"\[feed\] replay done in", 120)
            out.wait_for(r"\[feed\] live ", 60)
            answer = httpx.get(page, headers={"Authorization": f"Bearer {token}"}, timeout=10)
            assert answer.status_code == 200
            if page.endswith("/status"):
                assert answer.json()["model"] == "late-delivery"

            process.send_signal(signal.SIGINT)
            assert process.wait(timeout=60) == 0
        finally:
            if process.poll() is None:
                process.kill()
                process.wait(timeout=10)
            out.close()
    out.wait_for(r"plumbwatch demo stopped", 5)
    log = (tmp_path / "var" / "demo-server.log").read_text()
    assert "Application shutdown complete" in log  # the server stopped gracefully
    with pytest.raises(httpx.TransportError):
        httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=2)
    # No process of the demo is left: none carries its environment any more.
    marker = f"PLUMBWATCH_PORT={port}".encode()
    leftovers = [pid for pid in os.listdir("/proc") if pid.isdigit() and marker in _env(pid)]
    assert leftovers == []


def _env(pid: str) -> bytes:
    try:
        return Path(f"/proc/{pid}/environ").read_bytes()
    except OSError:
        return b""
