"""What the client raises.

::

    ClientError                 base of everything the client raises
    ├── RowError                a row could not be turned into JSON (naive time, odd type)
    ├── RequestRejected         the server answered 4xx: fix the request, do not retry
    └── ServerUnavailable       connection errors or 5xx persisted through every retry

``RequestRejected.problems`` carries the server's row-level details with each
``index`` counted in the rows *you* passed (not in the batch that failed), and
``stored`` says how many leading rows were already stored by earlier batches,
so a caller can resend exactly the rest.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class RowProblem:
    """One problem the server found: which row (if any), which field, and why."""

    index: int | None
    field: str
    reason: str

    def __str__(self) -> str:
        where = f"row {self.index}" if self.index is not None else "request"
        return f"{where}: {self.field}: {self.reason}" if self.field else f"{where}: {self.reason}"


class ClientError(Exception):
    """Base of every error the client raises."""


class RowError(ClientError, ValueError):
    """A row could not be sent as it is (the message names the row and the field).

    Nothing of its batch was sent; ``stored`` rows before it were."""

    def __init__(self, index: int | None, field: str, reason: str, *, stored: int = 0) -> None:
        self.problem = RowProblem(index, field, reason)
        super().__init__(str(self.problem))
        self.stored = stored


class RequestRejected(ClientError):
    """The server refused a batch (4xx). Nothing of that batch was stored."""

    def __init__(
        self,
        status: int,
        code: str,
        message: str,
        problems: list[RowProblem],
        *,
        stored: int = 0,
        body: Any = None,
    ) -> None:
        lines = [f"HTTP {status} {code}: {message}"]
        lines += [f"  {p}" for p in problems[:20]]
        if len(problems) > 20:
            lines.append(f"  ... and {len(problems) - 20} more")
        super().__init__("\n".join(lines))
        self.status = status
        self.code = code
        self.message = message
        self.problems = problems
        self.stored = stored
        self.body = body

    @property
    def bad_rows(self) -> list[int]:
        """Indexes (in the rows you passed) that the server named, sorted."""
        return sorted({p.index for p in self.problems if p.index is not None})


class ServerUnavailable(ClientError):
    """The server could not be reached, or kept failing, through every retry."""

    def __init__(self, message: str, *, stored: int = 0) -> None:
        super().__init__(message)
        self.stored = stored
