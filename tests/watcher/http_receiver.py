"""A small real HTTP server on 127.0.0.1 for delivery tests.

It records every request (path, headers, decoded JSON body) and answers
according to ``mode``:

* ``"ok"``: 200;
* ``"error"``: 500;
* ``"hang"``: accepts the connection, reads the request and never answers
  (until the receiver is stopped);
* after ``stop()`` the port is closed, so a client gets *connection refused*;
  ``start()`` opens it again on the same port.

Use with apprise as ``json://127.0.0.1:PORT/path``.
"""

from __future__ import annotations

import json
import socket
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class HttpReceiver:
    def __init__(self, port: int | None = None, mode: str = "ok"):
        self.port = port or free_port()
        self.mode = mode
        self.requests: list[dict] = []
        self._lock = threading.Lock()
        self._release = threading.Event()
        self._server: ThreadingHTTPServer | None = None
        self._thread: threading.Thread | None = None

    # -- lifecycle ------------------------------------------------------------------
    def start(self) -> "HttpReceiver":
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args):  # keep test output clean
                pass

            def _handle(self):
                length = int(self.headers.get("Content-Length") or 0)
                raw = self.rfile.read(length) if length else b""
                try:
                    body = json.loads(raw.decode("utf-8")) if raw else None
                except ValueError:
                    body = raw.decode("utf-8", "replace")
                mode = receiver.mode
                with receiver._lock:
                    receiver.requests.append(
                        {"path": self.path, "headers": dict(self.headers), "body": body,
                         "mode": mode, "at": time.monotonic()}
                    )
                if mode == "hang":
                    receiver._release.wait(60)
                    return
                code = 500 if mode == "error" else 200
                payload = b'{"ok": false}' if code == 500 else b'{"ok": true}'
                self.send_response(code)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(payload)))
                self.end_headers()
                self.wfile.write(payload)

            do_POST = _handle
            do_GET = _handle
            do_PUT = _handle

        class Server(ThreadingHTTPServer):
            allow_reuse_address = True
            daemon_threads = True

        self._release.clear()
        self._server = Server(("127.0.0.1", self.port), Handler)
        self._thread = threading.Thread(target=self._server.serve_forever, kwargs={"poll_interval": 0.05},
                                        daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        """Close the port (later connections are refused) and release hanging requests."""
        self._release.set()
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None
        if self._thread is not None:
            self._thread.join(5)
            self._thread = None

    def __enter__(self) -> "HttpReceiver":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- helpers ---------------------------------------------------------------------
    def url(self, path: str = "/hook", **params: str) -> str:
        q = "&".join(f"{k}={v}" for k, v in params.items())
        return f"json://127.0.0.1:{self.port}{path}" + (f"?{q}" if q else "")

    def received(self, mode: str | None = "ok") -> list[dict]:
        """Requests answered in ``mode`` (None: all)."""
        with self._lock:
            return [r for r in self.requests if mode is None or r["mode"] == mode]

    def wait_for(self, n: int, timeout: float = 5.0, mode: str | None = "ok") -> list[dict]:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            got = self.received(mode)
            if len(got) >= n:
                return got
            time.sleep(0.01)
        return self.received(mode)
