"""``plumbwatch load`` against a real server: good, bad and repeated rows in every format.

Small chunks (``--batch-size 3``) put good and bad rows in the same request, so
the resend of a chunk's good rows is exercised; re-running the load shows that
the good rows were stored (they come back as duplicates).
"""

from __future__ import annotations

import csv
import json
import uuid
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from plumbwatch.cli import main
from plumbwatch.client import Client
from tests import live

pytestmark = pytest.mark.timeout(180)

T = (datetime.now(UTC) - timedelta(days=2)).replace(microsecond=0)
STAMP = T.strftime("%Y-%m-%dT%H:%M:%SZ")
LATER = (T + timedelta(days=1)).strftime("%Y-%m-%dT%H:%M:%SZ")

# (id, predicted_at, probability, version, region); the CSV line is the index + 2.
PREDICTIONS = [
    ("p-1", STAMP, "0.31", "v3", "north-coast"),  # line 2
    ("p-2", STAMP, "0.12", "v3", ""),  # line 3: no region, fine
    ("p-3", STAMP, "1.7", "v3", "metro"),  # line 4: probability out of range
    ("p-4", "yesterday", "0.2", "v3", "metro"),  # line 5: not a timestamp
    ("p-1", STAMP, "0.31", "v3", "north-coast"),  # line 6: repeat, same content
    ("p-5", STAMP, "0.44", "v3", "metro"),  # line 7
    ("p-6", STAMP, "0.05", "v3", "metro"),  # line 8
    ("stored", STAMP, "0.99", "v3", "metro"),  # line 9: stored before with 0.5
]
BAD_LINES = [4, 5, 9]
HEADER = ["id", "predicted_at", "probability", "version", "segment.region"]


@pytest.fixture
def model(live_service: tuple[live.Server, str]) -> str:
    server, token = live_service
    name = f"load-{uuid.uuid4().hex[:8]}"
    live.declare_binary_model(server.url, token, name, segment_keys=["region"])
    with Client(server.url, token) as client:
        client.send_predictions(
            name, [{"id": "stored", "predicted_at": STAMP, "probability": 0.5, "version": "v3"}]
        )
    return name


def write_file(folder: Path, fmt: str) -> Path:
    if fmt == "csv":
        path = folder / "predictions.csv"
        with path.open("w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(HEADER)
            writer.writerows(PREDICTIONS)
            handle.write("p-7,2026-11-30T08:15:00Z\n")  # line 10: two fields, not five
        return path
    if fmt == "jsonl":
        path = folder / "predictions.jsonl"
        lines = []
        for pid, at, p, version, region in PREDICTIONS:
            row: dict[str, object] = {"id": pid, "predicted_at": at, "version": version}
            row["probability"] = float(p)
            if region:
                row["segments"] = {"region": region}
            lines.append(json.dumps(row))
        lines.append('{"id": "p-7", "predicted_at": ')  # line 9 (no header): cut off
        path.write_text("\n".join(lines) + "\n")
        return path
    path = folder / "predictions.parquet"
    columns = list(zip(*PREDICTIONS, strict=True))
    table = pa.table(
        {
            "id": list(columns[0]),
            "predicted_at": list(columns[1]),
            "probability": [float(p) for p in columns[2]],
            "version": list(columns[3]),
            "segment.region": [r or None for r in columns[4]],
        }
    )
    pq.write_table(table, path)
    return path


def run_load(live_service, *args: str) -> int:
    server, token = live_service
    return main(["load", *args, "--url", server.url, "--token", token])


@pytest.mark.parametrize("fmt", ["csv", "jsonl", "parquet"])
def test_good_rows_are_stored_and_bad_rows_reported_by_line(
    live_service, model, fmt, tmp_path, capsys
) -> None:
    path = write_file(tmp_path, fmt)
    rejects = tmp_path / "rejects.csv"
    args = ["predictions", str(path), "--model", model, "--batch-size", "3"]
    assert run_load(live_service, *args, "--rejects", str(rejects)) == 1
    captured = capsys.readouterr()
    out = captured.out
    # Only CSV has a header line; Parquet counts rows, not lines.
    unit = "row" if fmt == "parquet" else "line"
    shift = 0 if fmt == "csv" else -1
    bad = [n + shift for n in BAD_LINES] + ([10 + shift] if fmt != "parquet" else [])
    assert f"{len(PREDICTIONS) + (fmt != 'parquet')} rows read" in out
    assert f"accepted 4, duplicates 1, rejected {len(bad)}" in out
    reported = [int(line.split()[1].rstrip(":")) for line in out.splitlines() if unit in line[:9]]
    assert sorted(set(reported)) == bad
    assert f"{unit} {4 + shift}: probability: required: a finite number within [0, 1]" in out
    assert f"{unit} {5 + shift}: predicted_at:" in out
    assert f"{unit} {9 + shift}: id: 'stored' is stored with different content" in out
    if fmt == "csv":
        assert "line 10: 2 fields where the header has 5" in out
    if fmt == "jsonl":
        assert "line 9: not valid JSON" in out
    assert "loading predictions [" in captured.err and "100%" in captured.err
    with rejects.open() as handle:
        assert sorted(int(r[unit]) for r in csv.DictReader(handle)) == bad

    # Everything good was stored: loading again gives duplicates only.
    assert run_load(live_service, *args) == 1
    assert "accepted 0, duplicates 5, rejected" in capsys.readouterr().out


def test_a_clean_file_exits_zero(live_service, model, tmp_path, capsys) -> None:
    path = tmp_path / "clean.csv"
    path.write_text(
        "id,predicted_at,probability,segment.region\n"
        + "".join(f"c-{i},{STAMP},0.{i + 1},metro\n" for i in range(9))
    )
    assert run_load(live_service, "predictions", str(path), "--model", model) == 0
    assert "accepted 9, duplicates 0, rejected 0" in capsys.readouterr().out


def test_outcomes_with_corrections(live_service, model, tmp_path, capsys) -> None:
    predictions = tmp_path / "p.csv"
    predictions.write_text(
        "id,predicted_at,probability\n" + "".join(f"o-{i},{STAMP},0.3\n" for i in range(4))
    )
    assert run_load(live_service, "predictions", str(predictions), "--model", model) == 0
    outcomes = tmp_path / "o.csv"
    outcomes.write_text(
        "id,outcome,observed_at\n"
        f"o-0,1,{LATER}\n"  # line 2
        f"o-1,true,{LATER}\n"  # line 3
        f"o-2,0,{LATER}\n"  # line 4
        f"o-3,2,{LATER}\n"  # line 5: not 0 or 1
        f"ahead,1,{LATER}\n"  # line 6: its prediction is not there yet
    )
    args = ["outcomes", str(outcomes), "--model", model, "--batch-size", "2"]
    assert run_load(live_service, *args) == 1
    out = capsys.readouterr().out
    assert "accepted 4, duplicates 0, rejected 1" in out
    assert "awaiting their prediction 1" in out
    assert "line 5: outcome: required: 0 or 1 (true/false accepted)" in out

    changed = tmp_path / "changed.csv"
    changed.write_text(f"id,outcome,observed_at\no-0,0,{LATER}\n")
    assert run_load(live_service, "outcomes", str(changed), "--model", model) == 1
    assert "--correction" in capsys.readouterr().out
    assert run_load(live_service, "outcomes", str(changed), "--model", model, "--correction") == 0
    assert "corrections 1" in capsys.readouterr().out


def test_unknown_columns_stop_before_sending(live_service, model, tmp_path, capsys) -> None:
    path = tmp_path / "typo.csv"
    path.write_text(f"id,predicted_at,probabilty\nx,{STAMP},0.3\n")
    assert run_load(live_service, "predictions", str(path), "--model", model) == 2
    assert "unknown columns ['probabilty']" in capsys.readouterr().err


def test_a_wrong_token_stops_the_load_and_says_so(live_service, model, tmp_path, capsys) -> None:
    server, _ = live_service
    path = write_file(tmp_path, "csv")
    code = main(["load", "predictions", str(path), "--model", model, "--url", server.url])
    assert code == 2  # no token at all
    assert "PLUMBWATCH_TOKEN" in capsys.readouterr().err
    args = ["load", "predictions", str(path), "--model", model, "--url", server.url]
    assert main([*args, "--token", "pw_wrong"]) == 2
    assert "HTTP 401" in capsys.readouterr().err
