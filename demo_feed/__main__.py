"""``python -m demo_feed``: the courier's history, then a live trickle, into plumbwatch.

``plumbwatch demo`` starts this for you. Run by hand against any server:

    DEMO_FEED_TOKEN=<admin token> python -m demo_feed --url http://127.0.0.1:8000

With ``DEMO_FEED_SECRET`` (``whsec_`` + base64) and ``--receiver-port`` it also
runs the webhook receiver that prints each verified alert.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
import time
from datetime import UTC, datetime
from types import FrameType

from demo_feed.receiver import Receiver
from demo_feed.replay import Feed
from demo_feed.scenario import HISTORY_DAYS, PARCELS_PER_DAY, SEED, Scenario
from plumbwatch.client import Client, ClientError


def _say(text: str) -> None:
    print(f"[feed] {text}", flush=True)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m demo_feed", description=__doc__.split("\n")[0])
    p.add_argument("--url", required=True, help="plumbwatch base URL")
    p.add_argument("--history-days", type=int, default=HISTORY_DAYS)
    p.add_argument("--parcels-per-day", type=int, default=PARCELS_PER_DAY)
    p.add_argument("--seed", type=int, default=SEED)
    p.add_argument(
        "--notify-days", type=int, default=30, help="evaluate the last N days with notify: true"
    )
    p.add_argument(
        "--claim-every-days", type=int, default=7, help="replay: evaluate damage-claim every N days"
    )
    p.add_argument("--receiver-port", type=int, help="run the webhook receiver on this port")
    p.add_argument("--tick", type=float, default=15.0, help="live: seconds between sends")
    p.add_argument("--evaluate-every", type=float, default=60.0, help="live: seconds between runs")
    p.add_argument("--no-live", action="store_true", help="stop after the replay")
    p.add_argument(
        "--started-at", type=float, help="epoch seconds the server started (for the timings)"
    )
    return p


def _stop_on_term(stop: threading.Event) -> None:
    def handler(_signum: int, _frame: FrameType | None) -> None:
        stop.set()
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, signal.default_int_handler)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    token = os.environ.get("DEMO_FEED_TOKEN")
    if not token:
        print("demo_feed: set DEMO_FEED_TOKEN to an admin token", file=sys.stderr)
        return 2
    stop = threading.Event()
    _stop_on_term(stop)
    receiver = None
    started = args.started_at or time.time()
    try:
        if args.receiver_port is not None:
            secret = os.environ.get("DEMO_FEED_SECRET", "")
            receiver = Receiver(secret, args.receiver_port, say=_say).start()
            _say(f"webhook receiver listening on {receiver.url}")
        now = datetime.now(UTC)
        scenario = Scenario.ending_today(
            now,
            history_days=args.history_days,
            seed=args.seed,
            parcels_per_day=args.parcels_per_day,
        )
        with Client(args.url, token, timeout=120.0) as client:
            feed = Feed(
                client,
                scenario,
                history_days=args.history_days,
                notify_days=args.notify_days,
                claim_every_days=args.claim_every_days,
                say=_say,
                started_at=started,
            )
            if feed.has_history():
                _say(
                    "this database already holds a demo history; a replay needs a fresh one "
                    "(`make demo` starts from a fresh ./var/demo.db). Serving what is there."
                )
                return 0
            feed.declare()
            _say(f"replaying {args.history_days} days of the courier's history ...")
            seconds = feed.replay(int(now.timestamp()))
            _say(
                f"replay done in {seconds:.1f} s ({time.time() - started:.1f} s after the server "
                f"started): {feed.progress.predictions:,} predictions, "
                f"{feed.progress.outcomes:,} outcomes, {feed.progress.evaluations} evaluations"
            )
            if not args.no_live:
                _say(f"live: new parcels every {args.tick:g} s; Ctrl-C stops")
                feed.live(
                    int(now.timestamp()),
                    stop,
                    tick=args.tick,
                    evaluate_every=args.evaluate_every,
                )
    except KeyboardInterrupt:
        pass
    except ClientError as exc:
        _say(f"stopped: {exc}")
        return 1
    finally:
        if receiver is not None:
            receiver.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
