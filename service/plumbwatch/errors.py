"""The exception tree of plumbwatch.

::

    PlumbwatchError                 base of every domain error
    ├── ConfigError                 settings or TOML declarations are unusable
    ├── SchemaBehindError           the database schema is older than the code
    ├── NotFound                    a named thing does not exist (HTTP 404)
    ├── Conflict                    the request contradicts stored state (409)
    ├── InvalidInput                rows or fields are invalid (422), with details
    ├── TooLarge                    a batch or body exceeds a limit (413)
    ├── AuthError                   no valid credentials (401)
    └── Forbidden                   valid credentials, wrong scope or model (403)

Domain code raises these; the API turns them into the JSON error body of
DESIGN.md in one registered handler, so ``HTTPException`` never appears
outside ``plumbwatch.api``.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Detail:
    """One problem in a request: which row (if any), which field, and why."""

    field: str
    reason: str
    index: int | None = None

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"field": self.field, "reason": self.reason}
        if self.index is not None:
            out = {"index": self.index, **out}
        return out


class PlumbwatchError(Exception):
    """Base of every domain error; carries a stable code and optional details."""

    code = "error"
    status = 500

    def __init__(self, message: str, details: list[Detail] | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.details = details or []


class ConfigError(PlumbwatchError):
    code = "config_error"


class SchemaBehindError(PlumbwatchError):
    code = "schema_behind"
    status = 503


class NotFound(PlumbwatchError):
    code = "not_found"
    status = 404


class Conflict(PlumbwatchError):
    code = "conflict"
    status = 409


class InvalidInput(PlumbwatchError):
    code = "invalid"
    status = 422


class TooLarge(PlumbwatchError):
    code = "too_large"
    status = 413


class AuthError(PlumbwatchError):
    code = "unauthorized"
    status = 401


class Forbidden(PlumbwatchError):
    code = "forbidden"
    status = 403
