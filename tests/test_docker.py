"""The container files parse and only set settings plumbwatch knows.

No Docker engine runs here, so the Dockerfile is checked by a small parser of
our own (instruction names and forms from the Dockerfile reference,
docs.docker.com/reference/dockerfile/), the compose file with PyYAML against
the Compose specification's structure, and every ``PLUMBWATCH_*`` variable they
set against the fields of ``plumbwatch.config.Settings``.
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import yaml

from plumbwatch.config import Settings

ROOT = Path(__file__).resolve().parents[1]
DOCKERFILE = ROOT / "docker" / "Dockerfile"
COMPOSE = ROOT / "docker" / "compose.yaml"

INSTRUCTIONS = {
    "ADD", "ARG", "CMD", "COPY", "ENTRYPOINT", "ENV", "EXPOSE", "FROM", "HEALTHCHECK",
    "LABEL", "ONBUILD", "RUN", "SHELL", "STOPSIGNAL", "USER", "VOLUME", "WORKDIR",
}  # fmt: skip
JSON_FORM = {"CMD", "ENTRYPOINT", "RUN", "SHELL", "VOLUME"}


def instructions(text: str) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with continuation lines joined and comments dropped."""
    out: list[tuple[str, str]] = []
    pending = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if pending and line.startswith("#"):
            continue  # a comment inside a continued instruction
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        full = (pending + line).strip()
        pending = ""
        keyword, _, args = full.partition(" ")
        out.append((keyword, args.strip()))
    assert not pending, "the file ends inside a continued instruction"
    return out


def settings_env_names() -> set[str]:
    return {f"PLUMBWATCH_{name.upper()}" for name in Settings.model_fields}


def test_dockerfile_instructions_are_well_formed() -> None:
    found = instructions(DOCKERFILE.read_text())
    assert found[0][0] == "FROM" and "slim" in found[0][1]
    for keyword, args in found:
        assert keyword in INSTRUCTIONS, keyword
        assert keyword == keyword.upper() and args, keyword
        if keyword in JSON_FORM and args.startswith("["):
            value = json.loads(args)
            assert isinstance(value, list) and all(isinstance(v, str) for v in value)
        if keyword == "COPY":
            *sources, _target = shlex.split(args)
            for source in sources:
                assert (ROOT / source).exists(), f"COPY source {source} is not in the context"
        if keyword == "HEALTHCHECK":
            options, _, command = args.partition("CMD ")
            assert all(re.fullmatch(r"--[a-z-]+=\S+", o) for o in options.split())
            assert json.loads(command)[0] == "python" and "/healthz" in command


def test_the_image_runs_as_a_non_root_user_with_a_health_check() -> None:
    found = instructions(DOCKERFILE.read_text())
    users = [args for keyword, args in found if keyword == "USER"]
    assert users and users[-1] not in ("root", "0")
    assert any(keyword == "HEALTHCHECK" for keyword, _ in found)
    last_user = max(i for i, (k, _) in enumerate(found) if k == "USER")
    last_cmd = max(i for i, (k, _) in enumerate(found) if k == "CMD")
    assert last_user < last_cmd
    assert json.loads(found[last_cmd][1]) == ["plumbwatch", "serve"]


def dockerfile_env() -> dict[str, str]:
    env: dict[str, str] = {}
    for keyword, args in instructions(DOCKERFILE.read_text()):
        if keyword == "ENV":
            for pair in shlex.split(args):
                name, sep, value = pair.partition("=")
                assert sep, f"ENV {pair}: use the NAME=value form"
                env[name] = value
    return env


def compose() -> dict:
    data = yaml.safe_load(COMPOSE.read_text())
    assert isinstance(data, dict)
    return data


def compose_env() -> dict[str, str]:
    env: dict[str, str] = {}
    for service in compose()["services"].values():
        given = service.get("environment") or {}
        items = given.items() if isinstance(given, dict) else (e.split("=", 1) for e in given)
        for name, value in items:
            env[name] = str(value)
    return env


def test_compose_runs_migrations_then_the_server_on_postgresql() -> None:
    services = compose()["services"]
    assert set(services) == {"postgres", "migrate", "plumbwatch"}
    assert services["postgres"]["healthcheck"]["test"][0] in ("CMD", "CMD-SHELL")
    migrate, server = services["migrate"], services["plumbwatch"]
    assert migrate["command"] == ["plumbwatch", "migrate"]
    assert migrate["depends_on"]["postgres"]["condition"] == "service_healthy"
    assert server["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
    build = migrate["build"]
    context = (COMPOSE.parent / build["context"]).resolve()
    assert context == ROOT and (context / build["dockerfile"]).is_file()
    for service in (migrate, server):
        url = service["environment"]["PLUMBWATCH_DATABASE_URL"]
        assert url.startswith("postgresql://") and "@postgres:5432/" in url


def test_every_plumbwatch_variable_set_is_a_setting() -> None:
    known = settings_env_names()
    used = {name for name in [*dockerfile_env(), *compose_env()] if name.startswith("PLUMBWATCH_")}
    assert used, "the container files set no PLUMBWATCH_* variable at all?"
    assert used <= known, f"unknown settings: {sorted(used - known)}"


def test_the_settings_accept_the_values_the_files_set() -> None:
    for env in (dockerfile_env(), compose_env()):
        values = {
            name.removeprefix("PLUMBWATCH_").lower(): value.replace("${POSTGRES_PASSWORD}", "pw")
            for name, value in env.items()
            if name.startswith("PLUMBWATCH_")
        }
        Settings(**values)  # raises on a value the settings refuse
