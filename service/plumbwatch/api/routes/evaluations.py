"""Status, evaluation runs and their history."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool

from plumbwatch.alerts import status as alert_status
from plumbwatch.api.deps import EngineDep, PrincipalDep, SettingsDep, read_json
from plumbwatch.api.responses import JsonResponse
from plumbwatch.api.schemas import EvaluationCreate, body, errors, inline_schema
from plumbwatch.errors import Detail, InvalidInput, NotFound
from plumbwatch.evaluate.ranges import range_metrics
from plumbwatch.evaluate.slices import OVERALL, parse_slice
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store import models as store_models
from plumbwatch.timefmt import format_instant, parse_instant, to_micros

router = APIRouter(prefix="/v1/models", tags=["evaluations"])


def _instant(name: str, value: str | None) -> int | None:
    if value is None:
        return None
    try:
        return to_micros(parse_instant(value))
    except ValueError as exc:
        raise InvalidInput(
            f"{name} is not an RFC 3339 timestamp", [Detail(field=name, reason=str(exc))]
        ) from None


@router.get("/{model}/status", responses=errors(401, 403, 404))
def get_status(model: str, engine: EngineDep, principal: PrincipalDep) -> JsonResponse:
    """The latest evaluation record of the model, with its alerts as they are now."""
    principal.require("read", model)
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
        record = store_evaluations.latest(conn, model_id=found.id)
        if record is None:
            raise NotFound(
                f"model {model!r} has not been evaluated yet; POST "
                f"/v1/models/{model}/evaluations or wait for the scheduler"
            )
        # Alerts and deliveries as they are now (acknowledged since, failed since).
        record = alert_status.overlay(conn, model_id=found.id, record=record)
    return JsonResponse(record)


@router.post(
    "/{model}/evaluations",
    responses=errors(401, 403, 404, 409, 413, 422),
    openapi_extra=body(inline_schema(EvaluationCreate)),
)
async def post_evaluation(
    model: str, request: Request, settings: SettingsDep, principal: PrincipalDep
) -> JsonResponse:
    """Run one evaluation now (or as of a past instant, for a replay) and return its record."""
    principal.require("admin", model)
    data: Any = await read_json(request, max_bytes=settings.max_body_bytes) or {}
    if not isinstance(data, dict) or set(data) - {"as_of", "notify"}:
        raise InvalidInput(
            'the body is {"as_of": T, "notify": bool}, both optional',
            [Detail(field="body", reason="unexpected shape or fields")],
        )
    state = request.app.state
    now_us = state.clock_us()
    as_of_us = _instant("as_of", data.get("as_of")) if data.get("as_of") is not None else now_us
    if as_of_us > now_us + settings.future_tolerance_micros:
        raise InvalidInput(
            "as_of lies in the future", [Detail(field="as_of", reason="later than now")]
        )
    if not isinstance(data.get("notify", True), bool):
        raise InvalidInput(
            "notify must be true or false", [Detail(field="notify", reason="not a boolean")]
        )

    def run() -> dict[str, Any]:
        with state.engine.connect() as conn:
            found = store_models.get_or_raise(conn=conn, name=model)
        return state.evaluator.evaluate(
            found, as_of_us=as_of_us, now_us=now_us, notify=data.get("notify", True)
        )

    return JsonResponse(await run_in_threadpool(run))


@router.get("/{model}/evaluations", responses=errors(401, 403, 404, 422))
def list_evaluations(
    model: str,
    engine: EngineDep,
    principal: PrincipalDep,
    since: Annotated[str | None, Query(description="as_of at or after (RFC 3339)")] = None,
    until: Annotated[str | None, Query(description="as_of before (RFC 3339)")] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    cursor: Annotated[str | None, Query()] = None,
) -> JsonResponse:
    """Evaluation records, oldest first, paged."""
    principal.require("read", model)
    after = None
    if cursor is not None:
        if not cursor.isdigit():
            raise InvalidInput(
                "cursor is not one this server issued",
                [Detail(field="cursor", reason="invalid cursor")],
            )
        after = int(cursor)
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
        rows = store_evaluations.list_records(
            conn,
            model_id=found.id,
            since_us=_instant("since", since),
            until_us=_instant("until", until),
            after_id=after,
            limit=limit + 1,
        )
    page = rows[:limit]
    next_cursor = str(page[-1][0]) if len(rows) > limit else None
    return JsonResponse({"evaluations": [r for _, r in page], "next_cursor": next_cursor})


@router.get("/{model}/metrics", responses=errors(401, 403, 404, 422))
def get_metrics(
    model: str,
    engine: EngineDep,
    principal: PrincipalDep,
    start: Annotated[str, Query(description="cohorts predicted at or after (RFC 3339)")],
    end: Annotated[str, Query(description="cohorts predicted before (RFC 3339)")],
    slice: Annotated[str, Query(description="overall, key:value or a cross")] = OVERALL,
    version: Annotated[str | None, Query()] = None,
) -> JsonResponse:
    """Metrics of matured cohorts in any range, as of the latest evaluation."""
    principal.require("read", model)
    start_us, end_us = _instant("start", start), _instant("end", end)
    assert start_us is not None and end_us is not None
    if start_us >= end_us:
        raise InvalidInput(
            "start must be before end", [Detail(field="start", reason="not before end")]
        )
    try:
        parse_slice(slice)
    except ValueError as exc:
        raise InvalidInput("invalid slice", [Detail(field="slice", reason=str(exc))]) from None
    with engine.connect() as conn:
        found = store_models.get_or_raise(conn=conn, name=model, include_archived=True)
        as_of_us, metrics, reasons = range_metrics(
            conn, found, start_us=start_us, end_us=end_us, slice_name=slice, version=version
        )
    return JsonResponse(
        {
            "model": model,
            "as_of": format_instant(as_of_us),
            "start": format_instant(start_us),
            "end": format_instant(end_us),
            "slice": slice,
            "version": version,
            "metrics": metrics,
            "reasons": reasons,
        }
    )
