"""The plumbwatch command: migrate, token create/list/revoke, and serve's schema check."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.cli import main
from plumbwatch.store import tokens
from plumbwatch.store.engine import create_engine


@pytest.fixture
def cli_env(database_url: str, monkeypatch: pytest.MonkeyPatch) -> str:
    monkeypatch.setenv("PLUMBWATCH_DATABASE_URL", database_url)
    monkeypatch.delenv("PLUMBWATCH_CONFIG", raising=False)
    return database_url


def test_serve_refuses_a_schema_that_is_behind(cli_env: str, capsys) -> None:
    assert main(["serve", "--port", "1"]) == 2
    assert "run `plumbwatch migrate` first" in capsys.readouterr().err


def test_migrate_then_tokens(cli_env: str, capsys) -> None:
    assert main(["migrate"]) == 0
    assert "migrated from empty" in capsys.readouterr().out
    assert main(["migrate"]) == 0
    assert "already current" in capsys.readouterr().out

    assert (
        main(["token", "create", "--scope", "ingest", "--name", "pipeline", "--expires", "P30D"])
        == 0
    )
    out = capsys.readouterr().out.strip().splitlines()
    secret = out[-1]
    assert secret.startswith("pw_") and " " not in secret  # the bare token alone, last line
    engine: Engine = create_engine(cli_env)
    with engine.connect() as conn:
        row = conn.execute(sa.text("SELECT token_hash FROM api_tokens")).one()
        assert row.token_hash == tokens.hash_token(secret)  # only the hash is stored
        assert secret not in str(conn.execute(sa.text("SELECT * FROM api_tokens")).all())
    engine.dispose()

    assert main(["token", "create", "--scope", "ingest", "--name", "pipeline"]) == 2
    assert "exists" in capsys.readouterr().err
    assert main(["token", "create", "--scope", "read", "--model", "nope"]) == 2
    assert "not declared" in capsys.readouterr().err
    assert main(["token", "create", "--scope", "read", "--expires", "30 days"]) == 2

    assert main(["token", "list"]) == 0
    listing = capsys.readouterr().out
    assert "pipeline" in listing and "active until" in listing and secret not in listing
    assert main(["token", "revoke", "pipeline"]) == 0
    assert main(["token", "list"]) == 0
    assert "revoked" in capsys.readouterr().out
    assert main(["token", "revoke", "ghost"]) == 2
