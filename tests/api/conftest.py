from __future__ import annotations

from collections.abc import Iterator

import pytest
from sqlalchemy.engine import Engine

from tests.factories import Service, running_service


@pytest.fixture
def service(engine: Engine) -> Iterator[Service]:
    with running_service(engine) as svc:
        yield svc
