"""The README stays true: its configuration table matches the settings, and its
curl lines and Python example run against a live server as written."""

from __future__ import annotations

import contextlib
import io
import re
import shlex
import subprocess
from pathlib import Path
from typing import Any

import pytest

from plumbwatch.config import Settings
from tests import live

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()
DOC_URL = "http://127.0.0.1:8000"


def section(title: str) -> str:
    found = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## |\Z)", README, re.M | re.S)
    assert found, f"README has no section {title!r}"
    return found.group(1)


def shown(value: Any) -> str:
    return "none" if value in (None, {}, []) else str(value)


def test_the_configuration_reference_lists_every_setting_with_its_default() -> None:
    rows = [
        [cell.strip().strip("`") for cell in line.strip("|").split("|")]
        for line in section("Configuration reference").splitlines()
        if line.startswith("| `")
    ]
    documented = {row[0]: row for row in rows}
    fields = Settings.model_fields
    assert set(documented) == set(fields), (
        f"undocumented: {sorted(set(fields) - set(documented))}; "
        f"unknown: {sorted(set(documented) - set(fields))}"
    )
    for name, (_, variable, default, meaning) in documented.items():
        field = fields[name]
        assert default == shown(field.get_default(call_default_factory=True)), name
        if name not in ("models", "sinks", "routes"):  # tables of the TOML file
            assert variable == f"PLUMBWATCH_{name.upper()}", name
        assert meaning, name


def blocks(language: str) -> list[tuple[int, str]]:
    """(position, text) of every fenced block in that language, in document order."""
    return [
        (m.start(), m.group(1))
        for m in re.finditer(rf"^```{language}\n(.*?)^```", README, re.M | re.S)
    ]


def commands(text: str) -> list[tuple[str, str | None]]:
    """(command, expected output or None) with continuation lines joined."""
    out: list[tuple[str, str | None]] = []
    pending = ""
    for line in text.splitlines():
        if line.startswith("# -> "):
            out[-1] = (out[-1][0], line.removeprefix("# -> "))
            continue
        if not line.strip():
            continue
        pending += line.rstrip("\\").strip() + " "
        if not line.endswith("\\") and pending.count("'") % 2 == 0:
            out.append((pending.strip(), None))
            pending = ""
    return out


@pytest.mark.parametrize("kind", live.engine_params())
def test_readme_examples_run_as_written(kind: str, tmp_path: Path) -> None:
    examples = [(pos, "sh", text) for pos, text in blocks("sh")]
    examples += [(pos, "python", text) for pos, text in blocks("python")]
    assert len(examples) >= 3
    ran = 0
    with live.service(kind, tmp_path) as (server, token):
        for _, language, text in sorted(examples):
            if language == "python":
                printed = io.StringIO()
                code = text.replace(DOC_URL, server.url)
                with contextlib.redirect_stdout(printed):
                    exec(compile(code, "README.md", "exec"), {"TOKEN": token})
                assert printed.getvalue().split() == ["1", "0"]
                ran += 1
                continue
            for command, expected in commands(text):
                assert command.startswith("curl "), command
                args = shlex.split(command.replace("$TOKEN", token).replace(DOC_URL, server.url))
                done = subprocess.run(
                    ["curl", "-sS", "--fail-with-body", "--max-time", "60", *args[1:]],
                    capture_output=True,
                    text=True,
                    timeout=90,
                    check=False,
                )
                assert done.returncode == 0, f"{command}\n{done.stdout}{done.stderr}"
                if expected is not None:
                    assert done.stdout.strip() == expected, command
                ran += 1
    assert ran == 7  # six curl lines and the Python example
