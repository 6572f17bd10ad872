"""A small HTTP client for model pipelines: ``Client(base_url, token)``.

It imports only httpx (pandas is recognised, never imported), so a pipeline can
install plumbwatch for the client alone. See ``Client`` for the methods and
``_errors`` for what it raises.
"""

from plumbwatch.client._client import DEFAULT_BATCH_SIZE, Client, SendResult
from plumbwatch.client._errors import (
    ClientError,
    RequestRejected,
    RowError,
    RowProblem,
    ServerUnavailable,
)

__all__ = [
    "DEFAULT_BATCH_SIZE",
    "Client",
    "ClientError",
    "RequestRejected",
    "RowError",
    "RowProblem",
    "SendResult",
    "ServerUnavailable",
]
