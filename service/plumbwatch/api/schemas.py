"""Request and response schemas (``XCreate`` in, ``XRead`` out) for the OpenAPI document.

Ingest bodies are parsed by hand (see ``routes/predictions.py``) so that status
precedence holds (401, 403, 404, 413, 422, 409) and 10,000-row batches stay
cheap; their JSON Schema is still published here for clients and fuzzers.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict

from plumbwatch.declarations import ModelDeclaration


class ErrorDetail(BaseModel):
    index: int | None = None
    field: str
    reason: str


class ErrorInfo(BaseModel):
    code: str
    message: str
    details: list[ErrorDetail]


class ErrorRead(BaseModel):
    error: ErrorInfo


class ModelRead(ModelDeclaration):
    name: str
    created_at: str
    updated_at: str
    archived_at: str | None


class ModelListRead(BaseModel):
    models: list[ModelRead]
    next_cursor: str | None


class PredictionsRead(BaseModel):
    accepted: int
    duplicates: int


class OutcomesRead(BaseModel):
    accepted: int
    duplicates: int
    corrections: int
    awaiting_prediction: int


class HealthRead(BaseModel):
    status: str


_INSTANT = {"type": "string", "format": "date-time", "description": "RFC 3339 with an offset"}

PREDICTIONS_CREATE: dict[str, Any] = {
    "type": "object",
    "required": ["predictions"],
    "additionalProperties": False,
    "properties": {
        "predictions": {
            "type": "array",
            "items": {
                "type": "object",
                "required": ["id", "predicted_at"],
                "additionalProperties": False,
                "properties": {
                    "id": {"type": "string", "minLength": 1, "maxLength": 200},
                    "predicted_at": _INSTANT,
                    "probability": {
                        "type": "number",
                        "minimum": 0,
                        "maximum": 1,
                        "description": "binary models: P(outcome = 1)",
                    },
                    "probabilities": {
                        "type": "object",
                        "additionalProperties": {"type": "number", "minimum": 0, "maximum": 1},
                        "description": "multiclass models: class -> probability",
                    },
                    "version": {"type": "string", "minLength": 1, "maxLength": 64},
                    "segments": {
                        "type": "object",
                        "additionalProperties": {"type": ["string", "null"], "maxLength": 200},
                    },
                },
            },
        }
    },
}

OUTCOMES_CREATE: dict[str, Any] = {
    "type": "object",
    "required": ["outcomes"],
    "additionalProperties": False,
    "properties": {
        "outcomes": {
            "type": "array",
            "items": {
                "type": "object",
                "required": ["id", "outcome"],
                "additionalProperties": False,
                "properties": {
                    "id": {"type": "string", "minLength": 1, "maxLength": 200},
                    "outcome": {
                        "oneOf": [
                            {"type": "integer", "enum": [0, 1]},
                            {"type": "boolean"},
                            {"type": "string"},
                        ]
                    },
                    "observed_at": _INSTANT,
                },
            },
        }
    },
}


def inline_schema(model: type[BaseModel]) -> dict[str, Any]:
    """A model's JSON Schema with its ``$defs`` inlined, for ``openapi_extra`` bodies."""
    schema = model.model_json_schema()
    defs = schema.pop("$defs", {})

    def resolve(node: Any) -> Any:
        if isinstance(node, dict):
            ref = node.get("$ref")
            if isinstance(ref, str) and ref.startswith("#/$defs/"):
                return resolve(defs[ref.split("/")[-1]])
            return {k: resolve(v) for k, v in node.items()}
        if isinstance(node, list):
            return [resolve(v) for v in node]
        return node

    return dict(resolve(schema))


def body(schema: dict[str, Any]) -> dict[str, Any]:
    """``openapi_extra`` for a hand-parsed JSON body."""
    return {"requestBody": {"required": True, "content": {"application/json": {"schema": schema}}}}


def errors(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """Document error responses with the shared error body."""
    return {s: {"model": ErrorRead} for s in statuses}


class EvaluationCreate(BaseModel):
    as_of: str | None = None
    notify: bool = True


class EvidenceResetCreate(BaseModel):
    reason: str


class EvidenceResetRead(BaseModel):
    model: str
    reset_at: str
    reason: str
    by: str
    streams_reset: int


class RecalibrationRead(BaseModel):
    """The latest run's recalibration advice (``evaluate/advice.py``); more fields may follow."""

    model_config = ConfigDict(extra="allow")

    slice: str
    version: str
    method: str | None
    window: dict[str, str]
    gain_log_loss: float | None
    gain_interval: list[float] | None
    in_sample_gain: float | None
    knots: list[list[float]] | None
    verdict: str
    explanation: str
    auroc: float | None
    baseline_auroc: float | None
    slices: list[dict[str, Any]]
