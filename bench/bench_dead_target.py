"""Does a dead notification target slow the reading path?

The reading path's cost for one batch is: one SQLite transaction that stores
the batch (here: readings and a file offset, standing in for the store's own
rows), runs the episode book on every reading and finding, enqueues the
resulting alerts and commits.  That latency is measured while an
:class:`watcher.outbox.OutboxSender` delivers in the background to

* ``healthy``: a local HTTP receiver answering 200;
* ``refused``: a closed port (connection refused, retried with backoff);
* ``hanging``: a server that accepts and never answers (read timeout);
* ``none``: no sender at all (reference).

Every batch carries a finding that opens a new episode (a worst case: an
alert per batch), so the sender always has work.  Figures: median, 95th and
99th percentile of the batch latency, and the ratio to ``healthy``.  The
goal is a median and a mean within 10 % of ``healthy``.  Each scenario runs
the same number of batches on a fresh file, so table growth is the same.

Run: ``/work/venv/bin/python bench/bench_dead_target.py [--batches 2000 --rounds 3 --chart]``
"""

from __future__ import annotations

import argparse
import os
import socket
import sqlite3
import statistics
import sys
import tempfile
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from watcher.episodes import EpisodeBook, EpisodeSettings  # noqa: E402
from watcher.notify import Target  # noqa: E402
from watcher.outbox import OutboxSender, OutboxSettings, enqueue, ensure_schema  # noqa: E402
from watcher.records import Finding  # noqa: E402

READINGS_PER_BATCH = 20
SPEC = {"unit": "g", "target": 500.0, "lsl": 495.0, "usl": 505.0, "centre": 500.0, "sigma": 0.5}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def serve(mode: str):
    release = threading.Event()

    class H(BaseHTTPRequestHandler):
        def log_message(self, *a):
            pass

        def do_POST(self):
            n = int(self.headers.get("Content-Length") or 0)
            self.rfile.read(n)
            if mode == "hang":
                release.wait(120)
                return
            self.send_response(200)
            self.send_header("Content-Length", "2")
            self.end_headers()
            self.wfile.write(b"{}")

    class S(ThreadingHTTPServer):
        daemon_threads = True

    srv = S(("127.0.0.1", 0), H)
    th = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    th.start()

    def stop():
        release.set()
        srv.shutdown()
        srv.server_close()

    return srv.server_address[1], stop


def run(kind: str, batches: int, chart: bool = False) -> dict:
    tmp = tempfile.mkdtemp(prefix="lw-bench-")
    path = os.path.join(tmp, "state.sqlite")
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("CREATE TABLE readings (characteristic TEXT, idx INTEGER, value REAL)")
    conn.execute("CREATE TABLE offsets (file TEXT PRIMARY KEY, offset INTEGER)")
    ensure_schema(conn)
    book = EpisodeBook(conn, EpisodeSettings(close_after=5))
    conn.commit()

    stop_server = None
    sender = None
    if kind == "healthy":
        port, stop_server = serve("ok")
        url = f"json://127.0.0.1:{port}/hook"
    elif kind == "hanging":
        port, stop_server = serve("hang")
        url = f"json://127.0.0.1:{port}/hook"
    elif kind == "refused":
        url = f"json://127.0.0.1:{free_port()}/hook"
    else:
        url = "json://127.0.0.1:9/hook"
    target = Target(url, name=kind, chart=chart)
    if kind != "none":
        sender = OutboxSender(
            path, [target],
            OutboxSettings(poll_s=0.01, backoff_base_s=0.02, backoff_cap_s=0.1,
                           connect_timeout_s=1.0, read_timeout_s=2.0, call_timeout_s=3.0),
        )
        sender.start()

    lat = []
    idx = 0
    n_char = 0
    for _ in range(batches):
        t0 = time.perf_counter()
        # one batch: the store's rows, the episode book, the outbox, one commit
        ch = f"c{n_char % 50}"
        rows = [(ch, idx + i, 500.0 + 0.01 * i) for i in range(READINGS_PER_BATCH)]
        conn.executemany("INSERT INTO readings VALUES (?,?,?)", rows)
        conn.execute("INSERT OR REPLACE INTO offsets VALUES ('line2.csv', ?)", (idx * 40,))
        f = Finding(ch, "shift", "CUSUM", 1e-6, idx + 10, None, idx + 2, None, "up", 0.8, "",
                    source="line2", value=500.9)
        recent = ([500.0 + 0.01 * (i % 37) for i in range(200)], None, idx - 190) if chart else None
        for it in book.on_finding(f, SPEC, recent):
            enqueue(conn, it, [target])
        for i in range(READINGS_PER_BATCH):
            book.on_reading(ch, idx + i, None)
        conn.commit()
        if sender is not None:
            sender.kick()
        lat.append(time.perf_counter() - t0)
        idx += READINGS_PER_BATCH
        n_char += 1

    sent = conn.execute("SELECT COUNT(*) FROM alert_delivery WHERE status = 'sent'").fetchone()[0]
    attempts = conn.execute("SELECT COUNT(*) FROM alert_attempt").fetchone()[0]
    if sender is not None:
        if stop_server is not None and kind == "hanging":
            stop_server()
            stop_server = None
        sender.stop(timeout=5)
    if stop_server is not None:
        stop_server()
    conn.close()
    return {"kind": kind, "lat": lat, "sent": sent, "attempts": attempts}


def summarise(lat: list[float]) -> dict:
    lat = sorted(lat)
    q = lambda p: lat[min(len(lat) - 1, int(p * len(lat)))]  # noqa: E731
    return {"batches": len(lat), "median_ms": statistics.median(lat) * 1e3, "mean_ms": statistics.fmean(lat) * 1e3,
            "p95_ms": q(0.95) * 1e3, "p99_ms": q(0.99) * 1e3, "max_ms": lat[-1] * 1e3}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--batches", type=int, default=2000, help="batches per scenario and round")
    ap.add_argument("--rounds", type=int, default=3, help="rounds; the order of scenarios rotates each round")
    ap.add_argument("--chart", action="store_true",
                    help="attach charts (rendered in the sender thread; shows the cost of sharing the GIL)")
    args = ap.parse_args()
    kinds = ["none", "healthy", "refused", "hanging"]
    lat: dict[str, list[float]] = {k: [] for k in kinds}
    sent = {k: 0 for k in kinds}
    attempts = {k: 0 for k in kinds}
    for r in range(args.rounds):
        order = kinds[r % len(kinds):] + kinds[: r % len(kinds)]
        for k in order:
            res = run(k, args.batches, args.chart)
            lat[k] += res["lat"]
            sent[k] += res["sent"]
            attempts[k] += res["attempts"]
    print(f"reading-path batch latency: {READINGS_PER_BATCH} readings + 1 alert per batch, charts "
          f"{'on' if args.chart else 'off'}; {args.rounds} rounds x {args.batches} batches per scenario; "
          f"{os.cpu_count()} CPUs")
    print(f"{'target':<9} {'batches':>8} {'median ms':>10} {'mean ms':>8} {'p95 ms':>8} {'p99 ms':>8} "
          f"{'max ms':>8} {'sent':>6} {'attempts':>9} {'median/h':>9} {'mean/h':>7} {'p95/h':>6}")
    summ = {k: summarise(lat[k]) for k in kinds}
    h = summ["healthy"]
    ok = True
    for k in kinds:
        a = summ[k]
        rm, ra, rp = a["median_ms"] / h["median_ms"], a["mean_ms"] / h["mean_ms"], a["p95_ms"] / h["p95_ms"]
        if k in ("refused", "hanging"):
            ok &= rm <= 1.10 and ra <= 1.10
        print(f"{k:<9} {a['batches']:>8} {a['median_ms']:>10.3f} {a['mean_ms']:>8.3f} {a['p95_ms']:>8.3f} "
              f"{a['p99_ms']:>8.3f} {a['max_ms']:>8.2f} {sent[k]:>6} {attempts[k]:>9} {rm:>9.3f} {ra:>7.3f} {rp:>6.3f}")
    print("dead targets within 10 % of healthy (median and mean):", "yes" if ok else "NO")
    print("(p95 and above are dominated by WAL checkpoints and other load on the machine)")


if __name__ == "__main__":
    main()
