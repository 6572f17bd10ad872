"""Reading files for ``plumbwatch load``: shapes, line numbers, outcome types (no server)."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from plumbwatch.cli.load_files import FileProblem, Source, detect_format, shape_row


def test_flat_csv_columns_become_the_api_shape() -> None:
    flat = {
        "id": "p-1",
        "predicted_at": "2026-11-30T08:15:00Z",
        "probability.cat": "0.2",
        "probability.dog": "0.8",
        "version": "",
        "segment.region": "metro",
        "segment.tier": "",
    }
    assert shape_row(flat, text=True, binary=False) == {
        "id": "p-1",
        "predicted_at": "2026-11-30T08:15:00Z",
        "probabilities": {"cat": 0.2, "dog": 0.8},
        "segments": {"region": "metro"},
    }
    # Text that is not a number is passed on for the server to word the problem.
    assert shape_row({"id": "x", "probability": "high"}, text=True, binary=True) == {
        "id": "x",
        "probability": "high",
    }


@pytest.mark.parametrize(
    ("value", "binary", "sent"),
    [
        ("1", True, 1),
        ("0", None, 0),
        ("TRUE", None, True),
        ("false", True, False),
        ("cat", None, "cat"),  # an ingest-only token cannot read the kind: guess
        ("1", False, "1"),  # a multiclass model whose classes are named "0", "1", ...
    ],
)
def test_outcome_values_follow_the_models_kind(value: str, binary: bool | None, sent) -> None:
    row = shape_row({"id": "o", "outcome": value}, text=True, binary=binary)
    assert row["outcome"] == sent and type(row["outcome"]) is type(sent)


def test_csv_line_numbers_count_the_header_and_multiline_fields(tmp_path: Path) -> None:
    path = tmp_path / "p.csv"
    path.write_text(
        "id,predicted_at,probability,version\n"
        'a,2026-11-30T08:15:00Z,0.1,"v1"\n'
        "\n"
        'b,2026-11-30T08:15:00Z,0.2,"two\nlines"\n'
        "c,2026-11-30T08:15:00Z,0.3,v1\n"
    )
    lines = list(Source(path, "csv", "predictions", binary=True).lines())
    assert [(line.where, line.row["id"]) for line in lines if line.row] == [
        (2, "a"),
        (4, "b"),
        (6, "c"),
    ]


def test_parquet_naive_timestamps_are_rejected_per_row(tmp_path: Path) -> None:
    path = tmp_path / "p.parquet"
    table = pa.table(
        {
            "id": ["a", "b"],
            "predicted_at": pa.array(
                [datetime(2026, 11, 30, 8), datetime(2026, 11, 30, 9)], pa.timestamp("us")
            ),
            "probability": [0.1, 0.2],
        }
    )
    pq.write_table(table, path)
    lines = list(Source(path, "parquet", "predictions", binary=True).lines())
    assert [line.where for line in lines] == [1, 2]
    assert all(line.row is None and "time zone" in (line.problem or "") for line in lines)


def test_formats_and_columns_are_checked_up_front(tmp_path: Path) -> None:
    assert detect_format(Path("x.ndjson"), None) == "jsonl"
    with pytest.raises(FileProblem, match="--format"):
        detect_format(Path("x.txt"), None)
    path = tmp_path / "o.csv"
    path.write_text("id,outcome,predicted_at\n")
    with pytest.raises(FileProblem, match="unknown columns"):
        list(Source(path, "csv", "outcomes", binary=True).lines())
