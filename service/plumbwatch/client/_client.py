"""The HTTP client a model pipeline uses to send predictions and outcomes.

Retrying is safe because ingestion is idempotent: a prediction or outcome id
that is sent again with the same content counts as a duplicate, never twice.
So the client retries connection errors and 5xx answers with exponential
backoff (and jitter, so many pipelines do not retry in step), and gives up
with :class:`ServerUnavailable`. A 4xx answer is never retried: it raises
:class:`RequestRejected` with the server's row-level details.
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, fields
from datetime import datetime
from types import TracebackType
from typing import Any
from urllib.parse import quote

import httpx

from plumbwatch.client._errors import RequestRejected, RowError, RowProblem, ServerUnavailable
from plumbwatch.client._rows import as_rows, chunks, encode, instant_text

DEFAULT_BATCH_SIZE = 5_000  # half the server's default max_batch_rows
_RETRY_STATUSES = frozenset({500, 502, 503, 504})


@dataclass
class SendResult:
    """Totals over every batch of one send (or flush)."""

    rows: int = 0
    batches: int = 0
    accepted: int = 0
    duplicates: int = 0
    corrections: int = 0
    awaiting_prediction: int = 0

    def add(self, other: SendResult) -> SendResult:
        for f in fields(self):
            setattr(self, f.name, getattr(self, f.name) + getattr(other, f.name))
        return self


class Client:
    """``Client(base_url, token)``: send predictions and outcomes in batches.

    >>> with Client("http://127.0.0.1:8000", token) as pw:       # doctest: +SKIP
    ...     pw.send_predictions("late-delivery", rows)           # a list of dicts or a DataFrame
    ...     pw.add_outcome("late-delivery", {"id": "p-1", "outcome": 1})  # buffered
    ... # leaving the block flushes what was added

    ``rows`` are dicts in the API's shape (``id``, ``predicted_at``,
    ``probability`` or ``probabilities``, ``version``, ``segments``; outcomes:
    ``id``, ``outcome``, ``observed_at``); timezone-aware datetimes and numpy
    scalars are converted. A DataFrame may also use the flat CSV columns
    ``segment.<key>`` and ``probability.<class>``.
    """

    def __init__(
        self,
        base_url: str,
        token: str,
        *,
        batch_size: int = DEFAULT_BATCH_SIZE,
        timeout: float = 60.0,
        retries: int = 5,
        backoff: float = 0.5,
        max_backoff: float = 30.0,
        transport: httpx.BaseTransport | None = None,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        self.batch_size = batch_size
        self.retries = retries
        self.backoff = backoff
        self.max_backoff = max_backoff
        self._sleep = sleep
        self._http = httpx.Client(
            base_url=base_url.rstrip("/"),
            headers={"Authorization": f"Bearer {token}", "User-Agent": "plumbwatch-client"},
            timeout=httpx.Timeout(timeout, connect=min(timeout, 10.0)),
            transport=transport,
        )
        self._buffers: dict[tuple[str, str, bool], list[Any]] = {}

    # -- sending ---------------------------------------------------------------

    def send_predictions(self, model: str, rows: Any) -> SendResult:
        """Send every row now, in batches of ``batch_size``; return the totals."""
        return self._send("predictions", model, as_rows(rows))

    def send_outcomes(self, model: str, rows: Any, *, correction: bool = False) -> SendResult:
        """Send outcomes now; ``correction=True`` replaces stored values (the server
        keeps the superseded ones)."""
        return self._send("outcomes", model, as_rows(rows), correction=correction)

    def add_prediction(self, model: str, row: dict[str, Any]) -> SendResult | None:
        """Buffer one prediction; a full buffer is sent (and its result returned)."""
        return self._add("predictions", model, row, False)

    def add_outcome(
        self, model: str, row: dict[str, Any], *, correction: bool = False
    ) -> SendResult | None:
        """Buffer one outcome; a full buffer is sent (and its result returned)."""
        return self._add("outcomes", model, row, correction)

    def flush(self) -> SendResult:
        """Send everything buffered by ``add_*``."""
        total = SendResult()
        for key in list(self._buffers):
            kind, model, correction = key
            rows = self._buffers.pop(key)
            if rows:
                total.add(self._send(kind, model, rows, correction=correction))
        return total

    def _add(
        self, kind: str, model: str, row: dict[str, Any], correction: bool
    ) -> SendResult | None:
        key = (kind, model, correction)
        buffer = self._buffers.setdefault(key, [])
        buffer.append(row)
        if len(buffer) < self.batch_size:
            return None
        del self._buffers[key]
        return self._send(kind, model, buffer, correction=correction)

    def _send(
        self, kind: str, model: str, rows: Iterable[Any], *, correction: bool = False
    ) -> SendResult:
        path = f"/v1/models/{quote(model, safe='')}/{kind}"
        params = {"correction": "true"} if correction else None
        total = SendResult()
        offset = 0
        for batch in chunks(rows, self.batch_size):
            try:
                body = encode(kind, batch)
            except RowError as exc:
                # Count the row in what the caller passed, like the server's details.
                problem = exc.problem
                index = None if problem.index is None else problem.index + offset
                raise RowError(index, problem.field, problem.reason, stored=offset) from None
            response = self._request(
                "POST", path, content=body, params=params, offset=offset, stored=offset
            )
            answer = response.json()
            total.add(
                SendResult(
                    rows=len(batch),
                    batches=1,
                    accepted=answer.get("accepted", 0),
                    duplicates=answer.get("duplicates", 0),
                    corrections=answer.get("corrections", 0),
                    awaiting_prediction=answer.get("awaiting_prediction", 0),
                )
            )
            offset += len(batch)
        return total

    # -- models and evaluations ---------------------------------------------------

    def put_model(self, model: str, declaration: dict[str, Any]) -> dict[str, Any]:
        """Declare (or replace the declaration of) a model; needs an admin token."""
        return self._json("PUT", f"/v1/models/{quote(model, safe='')}", declaration)

    def get_model(self, model: str) -> dict[str, Any]:
        return self._json("GET", f"/v1/models/{quote(model, safe='')}")

    def status(self, model: str) -> dict[str, Any]:
        """The latest evaluation record."""
        return self._json("GET", f"/v1/models/{quote(model, safe='')}/status")

    def evaluate(
        self,
        model: str,
        *,
        as_of: datetime | str | None = None,
        notify: bool = True,
        timeout: float = 600.0,
    ) -> dict[str, Any]:
        """Run one evaluation now (or as of a past instant); needs an admin token.

        A 409 because another server holds the model's lease is retried like a 5xx.
        """
        body: dict[str, Any] = {"notify": notify}
        if as_of is not None:
            body["as_of"] = instant_text(as_of) if isinstance(as_of, datetime) else as_of
        return self._json(
            "POST",
            f"/v1/models/{quote(model, safe='')}/evaluations",
            body,
            timeout=timeout,
            retry_conflict=True,
        )

    # -- plumbing --------------------------------------------------------------

    def _json(
        self,
        method: str,
        path: str,
        body: Any = None,
        *,
        timeout: float | None = None,
        retry_conflict: bool = False,
    ) -> dict[str, Any]:
        content = encode_body(body) if body is not None else None
        response = self._request(
            method, path, content=content, timeout=timeout, retry_conflict=retry_conflict
        )
        result: dict[str, Any] = response.json()
        return result

    def _request(
        self,
        method: str,
        path: str,
        *,
        content: bytes | None = None,
        params: dict[str, str] | None = None,
        timeout: float | None = None,
        offset: int = 0,
        stored: int = 0,
        retry_conflict: bool = False,
    ) -> httpx.Response:
        headers = {"Content-Type": "application/json"} if content is not None else None
        extra: dict[str, Any] = {} if timeout is None else {"timeout": timeout}
        attempt = 0
        while True:
            wait: float | None = None
            try:
                response = self._http.request(
                    method, path, content=content, params=params, headers=headers, **extra
                )
            except httpx.TransportError as exc:
                problem = f"{type(exc).__name__}: {exc}"
            else:
                status = response.status_code
                if status < 400:
                    return response
                if status not in _RETRY_STATUSES and not (retry_conflict and status == 409):
                    raise _rejected(response, offset=offset, stored=stored)
                problem = f"HTTP {status}: {_message(response)}"
                wait = _retry_after(response)
            if attempt >= self.retries:
                raise ServerUnavailable(
                    f"{method} {path}: gave up after {attempt + 1} attempts; last: {problem}",
                    stored=stored,
                )
            if wait is None:
                wait = min(self.max_backoff, self.backoff * 2**attempt) * random.uniform(0.5, 1.0)
            self._sleep(min(wait, self.max_backoff))
            attempt += 1

    def close(self) -> None:
        """Close the connection pool (buffered rows are not sent: call flush first)."""
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        try:
            # Rows added before an error were real predictions: still send them.
            self.flush()
        except Exception as flush_error:
            if exc is None:
                raise
            exc.add_note(f"plumbwatch client: flushing on exit also failed: {flush_error}")
        finally:
            self.close()


def encode_body(body: Any) -> bytes:
    return json.dumps(body, separators=(",", ":")).encode()


def _message(response: httpx.Response) -> str:
    try:
        return str(response.json()["error"]["message"])
    except Exception:
        return response.text[:200]


def _retry_after(response: httpx.Response) -> float | None:
    value = response.headers.get("Retry-After")
    if value is None:
        return None
    try:
        return max(0.0, float(value))
    except ValueError:
        return None  # an HTTP date: fall back to our own backoff


def _rejected(response: httpx.Response, *, offset: int, stored: int) -> RequestRejected:
    try:
        body = response.json()
        error = body["error"]
        code, message = str(error.get("code", "error")), str(error.get("message", ""))
        details = error.get("details") or []
    except Exception:
        body, code, message, details = None, "error", response.text[:500], []
    problems = []
    for d in details:
        index = d.get("index")
        problems.append(
            RowProblem(
                index + offset if isinstance(index, int) else None,
                str(d.get("field", "")),
                str(d.get("reason", "")),
            )
        )
    return RequestRejected(response.status_code, code, message, problems, stored=stored, body=body)
