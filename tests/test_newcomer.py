"""A newcomer's first command on a fresh clone: ``make demo`` reaches the status page.

The repository's committed HEAD is cloned into a temporary folder and the
quick start is run there exactly as the README says, creating its own
``.venv`` (pip reuses whatever wheels and cache the machine has). The bound is
generous and only stops a hang: the time it takes is a benchmark figure, printed
here and quoted in the README, not asserted.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from tests import live

pytestmark = [pytest.mark.slow, pytest.mark.timeout(1200)]

ROOT = Path(__file__).resolve().parents[1]


def git(*args: str, cwd: Path = ROOT) -> str:
    done = subprocess.run(
        ["git", *args], cwd=cwd, capture_output=True, text=True, check=True, timeout=120
    )
    return done.stdout.strip()


def newcomer_environment(port: int) -> dict[str, str]:
    """The machine's environment without this test run's virtualenv or settings."""
    venv_bin = str(Path(sys.executable).parent)
    path = os.pathsep.join(p for p in os.environ["PATH"].split(os.pathsep) if p != venv_bin)
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith(("PLUMBWATCH_", "PYTEST", "VIRTUAL_ENV", "PYTHON"))
    }
    return {**env, "PATH": path, "PLUMBWATCH_PORT": str(port)}


def test_a_fresh_clone_reaches_the_status_page_with_make_demo(tmp_path: Path) -> None:
    clone = tmp_path / "plumbwatch"
    git("clone", "--quiet", str(ROOT), str(clone), cwd=tmp_path)
    assert git("rev-parse", "HEAD", cwd=clone) == git("rev-parse", "HEAD")
    port = live.free_port()
    began = time.monotonic()
    process = subprocess.Popen(
        ["make", "demo"],
        cwd=clone,
        env=newcomer_environment(port),
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        start_new_session=True,  # its own process group, like a terminal's foreground job
    )
    out = live.Lines(process)
    try:
        page = out.wait_for(r"status page:\s+(\S+)", 900).group(1)
        started = time.monotonic() - began
        server_ready = float(out.wait_for(r"server ready in ([\d.]+) s", 5).group(1))
        token = out.wait_for(r"read token:\s+(\S+)", 5).group(1)
        deadline = time.monotonic() + 120
        while True:
            answer = httpx.get(page, headers={"Authorization": f"Bearer {token}"}, timeout=10)
            # The overview lists the demo's models once the feed has declared them.
            listed = answer.status_code == 200 and "late-delivery" in answer.text
            if listed or time.monotonic() > deadline:
                break
            time.sleep(0.5)
        reached = time.monotonic() - began
        assert answer.status_code == 200, answer.text
        assert "late-delivery" in answer.text
        os.killpg(process.pid, signal.SIGINT)  # Ctrl-C in the terminal
        process.wait(timeout=60)
    finally:
        if process.poll() is None:
            # Ctrl-C first, so the demo stops the server and feed it started in their
            # own sessions; only then force it.
            os.killpg(process.pid, signal.SIGINT)
            try:
                process.wait(timeout=60)
            except subprocess.TimeoutExpired:
                os.killpg(process.pid, signal.SIGKILL)
                process.wait(timeout=10)
        out.close()
    out.wait_for(r"plumbwatch demo stopped", 5)
    assert (clone / ".venv" / ".installed-run").exists()
    print(
        f"\nnewcomer: `make demo` on a fresh clone printed the status page after {started:.0f} s "
        f"(install {started - server_ready:.0f} s, server start {server_ready:.1f} s); "
        f"the page answered 200 at {reached:.0f} s"
    )
