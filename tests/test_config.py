"""Settings: defaults, environment, TOML file, and readable errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from plumbwatch.config import load_settings
from plumbwatch.errors import ConfigError


@pytest.fixture(autouse=True)
def clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in (
        "PLUMBWATCH_CONFIG",
        "PLUMBWATCH_DATABASE_URL",
        "PLUMBWATCH_PORT",
        "PLUMBWATCH_HOST",
    ):
        monkeypatch.delenv(name, raising=False)


def test_laptop_defaults() -> None:
    s = load_settings()
    assert s.database_url == "sqlite:///./var/plumbwatch.db"
    assert (s.host, s.port) == ("127.0.0.1", 8000)
    assert s.max_batch_rows == 10_000
    assert s.future_tolerance_micros == 3_600_000_000


def test_environment_beats_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    file = tmp_path / "pw.toml"
    file.write_text('port = 9000\nhost = "0.0.0.0"\n')
    monkeypatch.setenv("PLUMBWATCH_CONFIG", str(file))
    monkeypatch.setenv("PLUMBWATCH_PORT", "9100")
    s = load_settings()
    assert (s.host, s.port) == ("0.0.0.0", 9100)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("port = 0\n", "port"),
        ("future_tolerance = 'an hour'\n", "future_tolerance"),
        ("prot = 8000\n", "prot"),
        ("port = [\n", "not valid TOML"),
    ],
)
def test_bad_settings_say_which(tmp_path: Path, monkeypatch, text: str, match: str) -> None:
    file = tmp_path / "pw.toml"
    file.write_text(text)
    monkeypatch.setenv("PLUMBWATCH_CONFIG", str(file))
    with pytest.raises(ConfigError, match=match):
        load_settings()


def test_missing_file(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("PLUMBWATCH_CONFIG", "/nonexistent/pw.toml")
    with pytest.raises(ConfigError, match="does not exist"):
        load_settings()


def test_page_settings(monkeypatch: pytest.MonkeyPatch) -> None:
    s = load_settings()
    assert (s.public_pages, s.session_key, s.metrics_slice_cap) == (False, None, 25)
    monkeypatch.setenv("PLUMBWATCH_PUBLIC_PAGES", "true")
    monkeypatch.setenv("PLUMBWATCH_SESSION_KEY", "a-long-enough-key")
    assert load_settings().public_pages is True
    monkeypatch.setenv("PLUMBWATCH_SESSION_KEY", "short")
    with pytest.raises(ConfigError, match="session_key"):
        load_settings()
