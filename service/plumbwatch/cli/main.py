"""``plumbwatch``: serve, migrate, token, evaluate, rebuild, load, demo.

Every command builds the settings once and passes them down. Errors a user can
fix end with a one-line message and exit status 2; nothing prints a traceback
for a mistake in input.
"""

from __future__ import annotations

import argparse
import gc
import logging
import sys
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from datetime import UTC, datetime

from sqlalchemy.engine import Engine

from plumbwatch import __version__
from plumbwatch.cli.load import add_parser as add_load_parser
from plumbwatch.config import Settings, load_settings
from plumbwatch.errors import PlumbwatchError
from plumbwatch.store import tokens
from plumbwatch.store.engine import create_engine, writing
from plumbwatch.store.migrate import current_revision, require_current, upgrade
from plumbwatch.store.models import get_or_raise
from plumbwatch.timefmt import format_instant, parse_duration, parse_instant, to_micros


def _log_to_stderr() -> None:
    """Our own log lines (deliveries, the log sink's alerts, scheduler ticks) on stderr,
    beside uvicorn's, unless the embedding program set up logging itself."""
    root = logging.getLogger()
    if not root.handlers:
        logging.basicConfig(
            level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s"
        )


def _now_us() -> int:
    return to_micros(datetime.now(UTC))


@contextmanager
def _engine(settings: Settings) -> Iterator[Engine]:
    engine = create_engine(settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms)
    try:
        yield engine
    finally:
        engine.dispose()


def cmd_migrate(settings: Settings, _args: argparse.Namespace) -> int:
    with _engine(settings) as engine:
        return _migrate(engine)


def _migrate(engine: Engine) -> int:
    before = current_revision(engine)
    upgrade(engine)
    after = current_revision(engine)
    if before == after:
        print(f"schema already current (revision {after})")
    else:
        print(f"schema migrated from {before or 'empty'} to {after}")
    return 0


def cmd_serve(settings: Settings, args: argparse.Namespace) -> int:
    import uvicorn

    from plumbwatch.api import create_app

    host = args.host or settings.host
    port = args.port or settings.port
    _log_to_stderr()
    with _engine(settings) as engine:
        require_current(engine)  # refuse early, with the command that fixes it
        app = create_app(settings, engine=engine)
        print(f"plumbwatch {__version__} serving on http://{host}:{port}", flush=True)
        # Start-up objects live as long as the process: freezing them keeps them out of
        # the garbage collections that ingest's many short-lived rows trigger.
        gc.freeze()
        uvicorn.run(
            app,
            host=host,
            port=port,
            log_level="info",
            access_log=False,
            timeout_graceful_shutdown=10,
        )
    return 0


def cmd_token(settings: Settings, args: argparse.Namespace) -> int:
    with _engine(settings) as engine:
        require_current(engine)
        return _token(engine, args)


def _token(engine: Engine, args: argparse.Namespace) -> int:
    now_us = _now_us()
    if args.action == "create":
        expires = None
        if args.expires:
            expires = now_us + int(parse_duration(args.expires).total_seconds() * 1_000_000)
        name = args.name or f"{args.scope}-{format_instant(now_us)}"
        with writing(engine) as conn:
            model_id = None
            if args.model:
                model_id = get_or_raise(conn=conn, name=args.model).id
            token, secret = tokens.create(
                conn=conn,
                name=name,
                scope=args.scope,
                model_id=model_id,
                expires_at_us=expires,
                now_us=now_us,
            )
        bound = f", model {token.model}" if token.model else ""
        until = f", expires {format_instant(expires)}" if expires else ""
        print(
            f"created token {token.name!r} (scope {token.scope}{bound}{until}); "
            "it is shown once, keep it safe:"
        )
        print(secret)
        return 0
    if args.action == "list":
        with engine.connect() as conn:
            found = tokens.list_tokens(conn=conn)
        print(f"{'name':30} {'scope':7} {'model':20} {'created':22} state")
        for t in found:
            if t.revoked_at_us:
                state = f"revoked {format_instant(t.revoked_at_us)}"
            elif t.expires_at_us and t.expires_at_us <= now_us:
                state = "expired"
            elif t.expires_at_us:
                state = f"active until {format_instant(t.expires_at_us)}"
            else:
                state = "active"
            print(
                f"{t.name:30} {t.scope:7} {t.model or '-':20} "
                f"{format_instant(t.created_at_us):22} {state}"
            )
        return 0
    with writing(engine) as conn:
        revoked = tokens.revoke(conn=conn, name=args.name, now_us=now_us)
    print(f"revoked token {revoked.name!r}")
    return 0


def cmd_evaluate(settings: Settings, args: argparse.Namespace) -> int:
    from plumbwatch.evaluate.run import Options
    from plumbwatch.jobs.alerting import Alerting
    from plumbwatch.jobs.tick import Evaluator, holder_name

    now_us = _now_us()
    as_of_us = to_micros(parse_instant(args.as_of)) if args.as_of else now_us
    _log_to_stderr()
    with _engine(settings) as engine:
        require_current(engine)
        holder = holder_name()
        alerting = Alerting(engine, settings, holder=holder, clock_us=_now_us)
        evaluator = Evaluator(
            engine,
            holder,
            Options.from_settings(settings),
            after_record=alerting.after_record,
        )
        if args.as_of:
            if not args.model:
                raise ValueError("--as-of needs --model (a replay is per model)")
            with engine.connect() as conn:
                model = get_or_raise(conn=conn, name=args.model)
            record = evaluator.evaluate(
                model, as_of_us=as_of_us, now_us=now_us, notify=not args.no_notify
            )
            print(f"{model.name}: {record['health']} as of {record['as_of']}")
            results = {}
        else:
            results = evaluator.tick(
                now_us=now_us, model_name=args.model, notify=not args.no_notify
            )
        # One sending pass, for set-ups where no server runs (cron); what fails here
        # waits in the outbox for the next pass of a server or of this command.
        sent = alerting.run_pass()
    for name, outcome in results.items():
        print(f"{name}: {outcome}")
    if not results and not args.as_of:
        print("no active models")
    if sent:
        print(f"{sent} alert deliveries attempted")
    return 0


def cmd_rebuild(settings: Settings, args: argparse.Namespace) -> int:
    from plumbwatch.evaluate.rebuild import rebuild_model
    from plumbwatch.store.models import list_models

    with _engine(settings) as engine:
        require_current(engine)
        with engine.connect() as conn:
            models = (
                [get_or_raise(conn=conn, name=args.model)] if args.model else list_models(conn=conn)
            )
        for model in models:

            def progress(rows: int, name: str = model.name) -> None:
                print(f"  {name}: {rows:,} rows", file=sys.stderr, flush=True)

            rows = rebuild_model(
                engine, model, now_us=_now_us(), slice_cap=settings.slice_cap, progress=progress
            )
            print(f"{model.name}: rebuilt from {rows:,} matured rows")
    return 0


def cmd_demo(settings: Settings, args: argparse.Namespace) -> int:
    from plumbwatch.cli.demo import DemoOptions, run_demo

    options = DemoOptions(
        feed=not args.no_feed,
        history_days=args.history_days,
        parcels_per_day=args.parcels_per_day,
    )
    return run_demo(
        settings, host=args.host or settings.host, port=args.port or settings.port, options=options
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="plumbwatch",
        description="Watch whether a classifier's probabilities still mean what they say.",
    )
    parser.add_argument("--version", action="version", version=f"plumbwatch {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    serve = sub.add_parser("serve", help="run the HTTP server")
    serve.add_argument("--host", help="address to bind (default PLUMBWATCH_HOST or 127.0.0.1)")
    serve.add_argument("--port", type=int, help="port (default PLUMBWATCH_PORT or 8000)")
    serve.set_defaults(func=cmd_serve)

    migrate = sub.add_parser("migrate", help="create or upgrade the database schema")
    migrate.set_defaults(func=cmd_migrate)

    token = sub.add_parser("token", help="create, list or revoke API tokens")
    token_sub = token.add_subparsers(dest="action", required=True)
    create = token_sub.add_parser("create", help="create a token; prints it once")
    create.add_argument("--scope", required=True, choices=tokens.SCOPES)
    create.add_argument("--model", help="bind the token to one model")
    create.add_argument("--name", help="a name to recognise it by (default: scope and time)")
    create.add_argument("--expires", help="ISO 8601 duration until it expires, e.g. P90D")
    token_sub.add_parser("list", help="list tokens (never their secrets)")
    revoke = token_sub.add_parser("revoke", help="revoke a token by name")
    revoke.add_argument("name")
    token.set_defaults(func=cmd_token)

    evaluate = sub.add_parser("evaluate", help="evaluate models now (or replay one as of T)")
    evaluate.add_argument("--model", help="only this model")
    evaluate.add_argument("--as-of", help="RFC 3339 instant to evaluate as of (a replay)")
    evaluate.add_argument(
        "--no-notify", action="store_true", help="do not notify sinks (for backfills)"
    )
    evaluate.set_defaults(func=cmd_evaluate)

    rebuild = sub.add_parser("rebuild", help="recompute sketches from the raw rows")
    rebuild.add_argument("--model", help="only this model")
    rebuild.set_defaults(func=cmd_rebuild)

    add_load_parser(sub)

    demo = sub.add_parser(
        "demo", help="migrate, create tokens, serve, and replay the courier demo into it"
    )
    demo.add_argument("--host")
    demo.add_argument("--port", type=int)
    demo.add_argument("--no-feed", action="store_true", help="serve only, without the demo feed")
    demo.add_argument("--history-days", type=int, default=90, help="days of history to replay")
    demo.add_argument("--parcels-per-day", type=int, default=2_000, help="demo volume")
    demo.set_defaults(func=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        settings = load_settings()
        return int(args.func(settings, args))
    except PlumbwatchError as exc:
        print(f"plumbwatch: {exc.message}", file=sys.stderr)
        return 2
    except ValueError as exc:
        print(f"plumbwatch: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
