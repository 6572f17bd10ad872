"""A real webhook receiver on 127.0.0.1 for tests: it can refuse the first attempts
(HTTP 503), hold the first ones without answering (a hung peer), or answer slowly,
and it records every request with its headers and raw body."""

from __future__ import annotations

import threading
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any


@dataclass
class Request:
    headers: dict[str, str]
    body: bytes
    status: int | None  # None: held, never answered


@dataclass
class Receiver:
    refuse_first: int = 0
    hang_first: int = 0
    delay_s: float = 0.0
    requests: list[Request] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)
    got_one: threading.Event = field(default_factory=threading.Event)
    release: threading.Event = field(default_factory=threading.Event)
    url: str = ""

    def accepted(self) -> list[Request]:
        with self.lock:
            return [r for r in self.requests if r.status == 200]

    def accepted_ids(self) -> Counter[str]:
        return Counter(r.headers["webhook-id"] for r in self.accepted())

    def handle(self, handler: BaseHTTPRequestHandler) -> None:
        length = int(handler.headers.get("content-length", "0"))
        body = handler.rfile.read(length)
        headers = {k.lower(): v for k, v in handler.headers.items()}
        with self.lock:
            number = len(self.requests) + 1
            request = Request(headers, body, None)
            self.requests.append(request)
        self.got_one.set()
        if number <= self.hang_first:
            self.release.wait(60)  # hold the connection; the sender times out or dies
            handler.close_connection = True
            return
        if self.delay_s:
            self.release.wait(self.delay_s)
        status = 503 if number <= self.hang_first + self.refuse_first else 200
        request.status = status
        handler.send_response(status)
        handler.send_header("content-length", "0")
        handler.end_headers()


@contextmanager
def receiving(**options: Any) -> Iterator[Receiver]:
    receiver = Receiver(**options)

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            receiver.handle(self)

        def log_message(self, *args: Any) -> None:  # keep test output quiet
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    server.daemon_threads = True
    receiver.url = f"http://127.0.0.1:{server.server_address[1]}/hooks/plumbwatch"
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield receiver
    finally:
        receiver.release.set()
        server.shutdown()
        server.server_close()
        thread.join(10)
