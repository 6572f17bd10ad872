from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests import live


@pytest.fixture(scope="module", params=live.engine_params())
def live_service(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[live.Server, str]]:
    """One real server per engine for the whole module (starting one takes seconds)."""
    with live.service(request.param, tmp_path_factory.mktemp("demo")) as found:
        yield found
