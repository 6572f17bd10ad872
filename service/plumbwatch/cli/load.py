"""``plumbwatch load {predictions,outcomes} --model M FILE``: a file, over HTTP, in chunks.

The loader is a client like any pipeline (``plumbwatch.client``), so the server
checks every row exactly as it checks a direct call. It streams the file in
chunks of ``--batch-size`` rows; each chunk is one request, stored whole or not
at all. When the server refuses a chunk because of some rows (422 for invalid
rows, 409 for ids stored with different content), its answer names every one
of them; the loader records those rows as rejected, with their line numbers,
and sends the chunk again without them. Ids are idempotent, so the resend is
safe, and in the end every good row is stored and every bad row reported,
whatever the mix within a chunk. A problem with the request as a whole
(401, 403, 404, 413, an unreachable server) stops the load; the summary then
says how far it got, and running the same command again resumes safely
(stored rows count as duplicates).

Exit status: 0 when every row was stored (accepted or duplicate), 1 when some
rows were rejected, 2 when the load stopped early or could not start.
"""

from __future__ import annotations

import argparse
import csv
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

from plumbwatch.cli.load_files import FileProblem, Line, Source, detect_format
from plumbwatch.client import Client, ClientError, RequestRejected, RowError
from plumbwatch.config import Settings

SHOWN_REJECTS = 50


@dataclass
class Summary:
    rows: int = 0
    accepted: int = 0
    duplicates: int = 0
    corrections: int = 0
    awaiting_prediction: int = 0
    requests: int = 0
    rejected: list[tuple[int, str]] = field(default_factory=list)  # (line, reason)
    stopped: str | None = None

    @property
    def rejected_rows(self) -> int:
        return len({line for line, _ in self.rejected})


class ProgressBar:
    """A progress bar of our own on stderr: redrawn in place on a terminal, a line
    every tenth of the way otherwise (logs stay readable)."""

    def __init__(self, label: str, total: int, stream: TextIO | None = None) -> None:
        self.label = label
        self.total = max(total, 1)
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()
        self.began = time.monotonic()
        self._last_draw = 0.0
        self._last_tenth = -1

    def update(self, done: int, rows: int, *, final: bool = False) -> None:
        fraction = min(done / self.total, 1.0)
        elapsed = max(time.monotonic() - self.began, 1e-9)
        text = (
            f"{self.label} [{'#' * int(fraction * 30):<30}] {fraction:4.0%}  "
            f"{rows:,} rows  {rows / elapsed:,.0f} rows/s"
        )
        if self.tty:
            now = time.monotonic()
            if final or now - self._last_draw >= 0.1:
                self.stream.write("\r" + text + ("\n" if final else ""))
                self.stream.flush()
                self._last_draw = now
        else:
            tenth = int(fraction * 10)
            if final or tenth > self._last_tenth:
                self.stream.write(text + "\n")
                self.stream.flush()
                self._last_tenth = tenth


def _model_is_binary(client: Client, model: str) -> bool | None:
    """The model's kind when the token may read it; None for an ingest-only token."""
    try:
        return client.get_model(model).get("kind") == "binary"
    except RequestRejected as exc:
        if exc.status == 403:
            return None
        raise


def send_chunk(
    client: Client, kind: str, model: str, chunk: list[Line], summary: Summary, *, correction: bool
) -> None:
    """Send one chunk; rows the server names are rejected and the rest sent again."""
    pending = chunk
    while pending:
        rows = [line.row for line in pending]
        summary.requests += 1
        try:
            if kind == "predictions":
                result = client.send_predictions(model, rows)
            else:
                result = client.send_outcomes(model, rows, correction=correction)
        except RowError as exc:  # a row the client cannot even encode: same treatment
            if exc.problem.index is None:
                raise
            where = pending[exc.problem.index].where
            summary.rejected.append((where, f"{exc.problem.field}: {exc.problem.reason}"))
            pending = [line for i, line in enumerate(pending) if i != exc.problem.index]
            continue
        except RequestRejected as exc:
            named = {p.index for p in exc.problems if p.index is not None and p.index < len(rows)}
            if exc.status not in (409, 422) or not named:
                raise
            for p in exc.problems:
                if p.index in named:
                    reason = f"{p.field}: {p.reason}" if p.field else p.reason
                    if exc.status == 409 and kind == "outcomes":
                        reason += " (send corrections with --correction)"
                    summary.rejected.append((pending[p.index].where, reason))
            pending = [line for i, line in enumerate(pending) if i not in named]
            continue
        summary.accepted += result.accepted
        summary.duplicates += result.duplicates
        summary.corrections += result.corrections
        summary.awaiting_prediction += result.awaiting_prediction
        return


def load(
    client: Client,
    source: Source,
    model: str,
    *,
    batch_size: int,
    correction: bool = False,
    progress: ProgressBar | None = None,
) -> Summary:
    summary = Summary()
    chunk: list[Line] = []

    def flush() -> None:
        send_chunk(client, source.kind, model, chunk, summary, correction=correction)
        chunk.clear()
        if progress:
            progress.update(source.position, summary.rows)

    try:
        for line in source.lines():
            summary.rows += 1
            if line.row is None:
                summary.rejected.append((line.where, line.problem or "unreadable"))
                continue
            chunk.append(line)
            if len(chunk) >= batch_size:
                flush()
        if chunk:
            flush()
    except ClientError as exc:
        summary.stopped = str(exc)
    if progress:
        progress.update(source.size, summary.rows, final=True)
    summary.rejected.sort()
    return summary


def report(summary: Summary, *, kind: str, model: str, path: Path, rejects: Path | None) -> str:
    unit = "row" if path.suffix.lower() in (".parquet", ".pq") else "line"
    lines = [
        f"{kind} from {path} into {model}: {summary.rows:,} rows read in {summary.requests:,} "
        "requests",
        f"  accepted {summary.accepted:,}, duplicates {summary.duplicates:,}, "
        f"rejected {summary.rejected_rows:,}",
    ]
    if kind == "outcomes" and (summary.corrections or summary.awaiting_prediction):
        lines.append(
            f"  corrections {summary.corrections:,}, "
            f"awaiting their prediction {summary.awaiting_prediction:,}"
        )
    if summary.rejected:
        lines.append("  rejected rows:")
        for where, reason in summary.rejected[:SHOWN_REJECTS]:
            lines.append(f"    {unit} {where}: {reason}")
        if len(summary.rejected) > SHOWN_REJECTS:
            more = len(summary.rejected) - SHOWN_REJECTS
            hint = f"all are in {rejects}" if rejects else "--rejects FILE writes them all"
            lines.append(f"    ... and {more:,} more problems ({hint})")
    if summary.stopped:
        lines.append(f"  STOPPED before the end of the file: {summary.stopped}")
        lines.append("  (running the same command again is safe: stored rows count as duplicates)")
    return "\n".join(lines)


def cmd_load(settings: Settings, args: argparse.Namespace) -> int:
    path = Path(args.file)
    if not path.is_file():
        raise ValueError(f"no such file: {path}")
    token = args.token or _env_token()
    if not token:
        raise ValueError("give a token with --token or the PLUMBWATCH_TOKEN environment variable")
    host = "127.0.0.1" if settings.host in ("0.0.0.0", "::") else settings.host
    url = args.url or f"http://{host}:{settings.port}"
    with Client(url, token, batch_size=args.batch_size) as client:
        try:
            binary = _model_is_binary(client, args.model)
            source = Source(path, detect_format(path, args.format), args.kind, binary=binary)
            progress = ProgressBar(f"loading {args.kind}", source.size)
            summary = load(
                client,
                source,
                args.model,
                batch_size=args.batch_size,
                correction=args.correction,
                progress=progress,
            )
        except (FileProblem, ClientError) as exc:
            print(f"plumbwatch load: {exc}", file=sys.stderr)
            return 2
    if args.rejects:
        with Path(args.rejects).open("w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(["line" if source.format != "parquet" else "row", "reason"])
            writer.writerows(summary.rejected)
    print(report(summary, kind=args.kind, model=args.model, path=path, rejects=args.rejects))
    if summary.stopped:
        return 2
    return 1 if summary.rejected else 0


def _env_token() -> str | None:
    import os

    return os.environ.get("PLUMBWATCH_TOKEN")


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    load_parser = sub.add_parser(
        "load",
        help="load predictions or outcomes from a CSV, JSON lines or Parquet file over HTTP",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
    )
    load_parser.add_argument("kind", choices=("predictions", "outcomes"))
    load_parser.add_argument("file", metavar="FILE")
    load_parser.add_argument("--model", required=True, help="the monitored model's name")
    load_parser.add_argument(
        "--url", help="plumbwatch base URL (default http://PLUMBWATCH_HOST:PLUMBWATCH_PORT)"
    )
    load_parser.add_argument("--token", help="an ingest or admin token (or PLUMBWATCH_TOKEN)")
    load_parser.add_argument("--format", choices=("csv", "jsonl", "parquet"))
    load_parser.add_argument("--batch-size", type=int, default=5_000, help="rows per request")
    load_parser.add_argument(
        "--correction", action="store_true", help="outcomes: replace stored values (audited)"
    )
    load_parser.add_argument("--rejects", type=Path, help="write every rejected row to this CSV")
    load_parser.set_defaults(func=cmd_load)
