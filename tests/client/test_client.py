"""plumbwatch.client against a real server: batching, retries, row-level errors, flushing.

Faults are injected at the transport, httpx's own seam (``httpx.BaseTransport``),
in front of a live ``plumbwatch serve``: the server is real, only the network
misbehaves.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from datetime import UTC, datetime, timedelta

import httpx
import pandas as pd
import pytest

from plumbwatch.client import (
    Client,
    RequestRejected,
    RowError,
    ServerUnavailable,
)
from tests import live

pytestmark = pytest.mark.timeout(180)

NOW = datetime.now(UTC).replace(microsecond=0)


class FaultyTransport(httpx.BaseTransport):
    """Forwards to the real server, except where ``fault(n, request)`` answers instead.

    ``fault`` gets the 1-based number of the POST and returns a response, raises a
    transport error, or returns None to forward. ``after=True`` forwards first and
    then replaces the answer (the server committed, the answer was lost).
    """

    def __init__(
        self, fault: Callable[[int], httpx.Response | None] | None = None, *, after: bool = False
    ) -> None:
        self.inner = httpx.HTTPTransport()
        self.fault = fault
        self.after = after
        self.posts = 0
        self.forwarded = 0

    def handle_request(self, request: httpx.Request) -> httpx.Response:
        if request.method != "POST" or self.fault is None:
            return self.inner.handle_request(request)
        self.posts += 1
        if self.after:
            real = self.inner.handle_request(request)
            real.read()
            self.forwarded += 1
            replaced = self.fault(self.posts)
            return real if replaced is None else replaced
        replaced = self.fault(self.posts)
        if replaced is not None:
            return replaced
        self.forwarded += 1
        return self.inner.handle_request(request)

    def close(self) -> None:
        self.inner.close()


@pytest.fixture
def model(live_service: tuple[live.Server, str]) -> str:
    server, token = live_service
    name = f"client-{uuid.uuid4().hex[:8]}"
    live.declare_binary_model(server.url, token, name, segment_keys=["region", "tier"])
    return name


def rows(n: int, prefix: str = "p") -> list[dict[str, object]]:
    return [
        {
            "id": f"{prefix}-{i}",
            "predicted_at": NOW - timedelta(hours=1, minutes=i),
            "probability": round(0.05 + 0.9 * i / max(n, 1), 4),
            "version": "v1",
            "segments": {"region": "north-coast" if i % 3 else "metro", "tier": "express"},
        }
        for i in range(n)
    ]


def make_client(live_service: tuple[live.Server, str], **kwargs: object) -> Client:
    server, token = live_service
    sleeps: list[float] = []
    client = Client(server.url, token, sleep=sleeps.append, **kwargs)  # type: ignore[arg-type]
    client.sleeps = sleeps  # type: ignore[attr-defined]
    return client


def test_batches_are_split_and_repeats_are_duplicates(live_service, model) -> None:
    counting = FaultyTransport(lambda n: None)
    with make_client(live_service, batch_size=1000, transport=counting) as client:
        first = client.send_predictions(model, rows(2500))
        again = client.send_predictions(model, rows(2500))
    assert (first.batches, first.rows, first.accepted, first.duplicates) == (3, 2500, 2500, 0)
    assert (again.accepted, again.duplicates) == (0, 2500)
    assert counting.forwarded == 6  # 3 requests per send, each a real POST


def test_retries_an_injected_503_with_backoff(live_service, model) -> None:
    unavailable = httpx.Response(503, json={"error": {"code": "unavailable", "message": "busy"}})
    transport = FaultyTransport(lambda n: unavailable if n <= 2 else None)
    with make_client(live_service, transport=transport, backoff=0.25) as client:
        result = client.send_predictions(model, rows(10))
        sleeps = client.sleeps  # type: ignore[attr-defined]
    assert result.accepted == 10
    assert transport.posts == 3 and transport.forwarded == 1
    # Exponential backoff with jitter in [0.5, 1] of 0.25 * 2**attempt.
    assert len(sleeps) == 2
    assert 0.125 <= sleeps[0] <= 0.25 and 0.25 <= sleeps[1] <= 0.5


def test_a_lost_answer_is_retried_and_counts_once(live_service, model) -> None:
    # The server stores the batch, then the answer is lost (a 502 from a proxy):
    # the retry finds every id stored with the same content.
    bad_gateway = httpx.Response(502, text="bad gateway")
    transport = FaultyTransport(lambda n: bad_gateway if n == 1 else None, after=True)
    with make_client(live_service, transport=transport) as client:
        result = client.send_predictions(model, rows(7))
    assert transport.forwarded == 2
    assert (result.accepted, result.duplicates) == (0, 7)
    with make_client(live_service) as client:
        assert client.send_predictions(model, rows(7)).duplicates == 7


def test_connection_errors_are_retried_then_given_up(live_service, model) -> None:
    def refuse(n: int) -> httpx.Response | None:
        if n == 1:
            raise httpx.ConnectError("connection refused (injected)")
        return None

    with make_client(live_service, transport=FaultyTransport(refuse)) as client:
        assert client.send_predictions(model, rows(4)).accepted == 4

    sleeps: list[float] = []
    with (
        Client(
            f"http://127.0.0.1:{live.free_port()}", "pw_x", retries=2, sleep=sleeps.append
        ) as nobody,
        pytest.raises(ServerUnavailable, match="gave up after 3 attempts") as caught,
    ):
        nobody.send_predictions(model, rows(1))
    assert caught.value.stored == 0 and len(sleeps) == 2


def test_4xx_carries_the_row_details_counted_in_the_callers_rows(live_service, model) -> None:
    data = rows(6)
    data[4]["probability"] = 1.5
    data[5]["predicted_at"] = "2026-13-40T00:00:00Z"
    with make_client(live_service, batch_size=3) as client:
        with pytest.raises(RequestRejected) as caught:
            client.send_predictions(model, data)
        assert client.sleeps == []  # type: ignore[attr-defined]  # a 4xx is never retried
    error = caught.value
    assert error.status == 422 and error.code == "invalid"
    assert error.stored == 3  # the first batch went through; nothing of the second
    assert error.bad_rows == [4, 5]  # positions in the caller's list, not in the batch
    fields = {(p.index, p.field) for p in error.problems}
    assert fields == {(4, "probability"), (5, "predicted_at")}
    assert "row 4" in str(error)
    with make_client(live_service) as client:
        result = client.send_predictions(model, data[:4])
    assert (result.accepted, result.duplicates) == (1, 3)


def test_conflicting_content_is_a_409_naming_the_row(live_service, model) -> None:
    with make_client(live_service) as client:
        client.send_predictions(model, rows(3))
        changed = rows(3)
        changed[2]["probability"] = 0.999
        with pytest.raises(RequestRejected) as caught:
            client.send_predictions(model, changed)
    assert caught.value.status == 409 and caught.value.bad_rows == [2]


def test_auth_errors_are_rejections_with_the_servers_message(live_service, model) -> None:
    server, _ = live_service
    with Client(server.url, "pw_not-a-token") as client, pytest.raises(RequestRejected) as caught:
        client.send_predictions(model, rows(1))
    assert caught.value.status == 401


def test_naive_datetimes_are_refused_before_sending(live_service, model) -> None:
    data = rows(4)
    data[3]["predicted_at"] = datetime(2026, 11, 30, 8, 15)  # no time zone
    with (
        make_client(live_service, batch_size=2) as client,
        pytest.raises(RowError, match="naive") as caught,
    ):
        client.send_predictions(model, data)
    assert caught.value.problem.index == 3 and caught.value.stored == 2


def test_dataframes_send_the_same_content_as_dicts(live_service, model) -> None:
    data = rows(5, prefix="df")
    frame = pd.DataFrame(
        {
            "id": [r["id"] for r in data],
            "predicted_at": pd.to_datetime([r["predicted_at"] for r in data], utc=True),
            "probability": [r["probability"] for r in data],
            "version": "v1",
            "segment.region": [r["segments"]["region"] for r in data],  # type: ignore[index]
            "segment.tier": "express",
        }
    )
    with make_client(live_service) as client:
        assert client.send_predictions(model, frame).accepted == 5
        # The same rows as plain dicts are exact repeats: same parsed content.
        assert client.send_predictions(model, data).duplicates == 5


def test_missing_segment_values_in_a_dataframe_are_left_out(live_service, model) -> None:
    frame = pd.DataFrame(
        {
            "id": ["nan-0", "nan-1"],
            "predicted_at": [NOW - timedelta(hours=2)] * 2,
            "probability": [0.2, 0.3],
            "segment.region": ["metro", None],
        }
    )
    with make_client(live_service) as client:
        assert client.send_predictions(model, frame).accepted == 2
        plain = [
            {"id": "nan-0", "predicted_at": NOW - timedelta(hours=2), "probability": 0.2,
             "segments": {"region": "metro"}},
            {"id": "nan-1", "predicted_at": NOW - timedelta(hours=2), "probability": 0.3},
        ]  # fmt: skip
        assert client.send_predictions(model, plain).duplicates == 2


def test_the_context_manager_flushes_what_was_added(live_service, model) -> None:
    counting = FaultyTransport(lambda n: None)
    with make_client(live_service, batch_size=5, transport=counting) as client:
        for row in rows(7, prefix="buf"):
            client.add_prediction(model, row)
        assert counting.forwarded == 1  # the full buffer of five went at once
        client.add_outcome(model, {"id": "buf-0", "outcome": 1, "observed_at": NOW})
    assert counting.forwarded == 3  # two predictions and one outcome on exit
    with make_client(live_service) as client:
        assert client.send_predictions(model, rows(7, prefix="buf")).duplicates == 7
        again = client.send_outcomes(model, [{"id": "buf-0", "outcome": 1, "observed_at": NOW}])
        assert again.duplicates == 1


def test_rows_added_before_an_error_are_still_sent(live_service, model) -> None:
    with pytest.raises(KeyError), make_client(live_service) as client:
        client.add_prediction(model, rows(1, prefix="err")[0])
        raise KeyError("the pipeline failed")
    with make_client(live_service) as client:
        assert client.send_predictions(model, rows(1, prefix="err")).duplicates == 1


def test_evaluate_and_status(live_service, model) -> None:
    with make_client(live_service) as client:
        client.send_predictions(model, rows(3, prefix="ev"))
        record = client.evaluate(model, notify=False)
        assert record["model"] == model
        assert client.status(model)["as_of"] == record["as_of"]
        assert client.get_model(model)["kind"] == "binary"
