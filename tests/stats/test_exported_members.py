"""The package's public names are exactly the curated ones, and each is documented."""

from __future__ import annotations

import plumbwatch.stats as stats


def test_exports_are_exactly_all() -> None:
    public = {name for name in dir(stats) if not name.startswith("_")}
    modules = {name for name in public if type(getattr(stats, name)).__name__ == "module"}
    assert public - modules == set(stats.__all__)
    assert len(stats.__all__) == len(set(stats.__all__))


def test_every_export_has_a_docstring() -> None:
    missing = [name for name in stats.__all__ if not (getattr(stats, name).__doc__ or "").strip()]
    assert missing == []
