"""Aggregates and digest: write speed, database size per day, digest build and render time.

Run: ``python -m bench.bench_digest [--days 3] [--rate 1800]`` (about half a minute with the defaults).

One characteristic at ``--rate`` readings per hour for ``--days`` days, recorded in
batches of 20 readings (one transaction each, as the daemon does), then the digest of
the last 24 h built and rendered.  Prints readings per second of ``record_values``,
the database bytes and rows per day, and the build / render seconds.  The rows per
day do not depend on the rate: 1440 minute rows (kept 31 days), 24 hour rows and 24
samples of at most 64 readings (kept ``retention_days``).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=3)
    ap.add_argument("--rate", type=float, default=1800.0, help="readings per hour")
    args = ap.parse_args(argv)

    from watcher import aggregates as agg
    from watcher.config import parse_config
    from watcher.digest import Period, build_digest
    from watcher.digest_render import render_html, render_period_chart, render_text
    from watcher.store import Store

    tmp = Path(tempfile.mkdtemp(prefix="lw-bench-digest-"))
    cfg = parse_config("sources: [{name: s, path: a.csv}]\ncharacteristics: [{name: m, source: s, column: v, "
                       "lsl: 495, usl: 510}]\n", str(tmp / "c.yaml"))
    st = Store(tmp / "state")
    before = st.path.stat().st_size
    rng = np.random.default_rng(1)
    n = int(args.days * 24 * args.rate)
    step = 3600.0 / args.rate
    t0 = datetime(2026, 12, 1, tzinfo=timezone.utc)
    x = 502 + rng.normal(0, 1.2, n)
    t = time.perf_counter()
    for i in range(0, n, 20):
        items = [(float(x[j]), (t0 + timedelta(seconds=j * step)).isoformat()) for j in range(i, min(i + 20, n))]
        with st.transaction() as c:
            agg.record_values(c, {"m": items}, items[-1][1], limits={"m": (495.0, 510.0)})
    dt = time.perf_counter() - t
    st.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    size = st.path.stat().st_size - before
    rows = agg.storage_rows(st.conn)
    print(f"record_values: {n} readings in {dt:.1f} s = {n / dt:,.0f} readings/s (batches of 20, one transaction each)")
    print(f"database: {size / args.days / 1024:,.0f} KiB per characteristic-day; rows per day: "
          + ", ".join(f"{k} {v / args.days:.0f}" for k, v in rows.items()))
    print(f"  (raw readings would be {args.rate * 24:,.0f} rows per day, growing with the rate)")
    end = t0 + timedelta(days=args.days)
    t = time.perf_counter()
    d = build_digest(st.conn, cfg, Period(end - timedelta(hours=24), end))
    t_build = time.perf_counter() - t
    t = time.perf_counter()
    page = render_html(d)
    render_text(d)
    t_render = time.perf_counter() - t
    t = time.perf_counter()
    png = render_period_chart(d["characteristics"][0], "UTC", d["period"])
    t_chart = time.perf_counter() - t
    print(f"digest of 24 h: built in {t_build:.2f} s (first use imports scipy), rendered in {t_render:.2f} s "
          f"(HTML {len(page) / 1024:,.0f} KiB; a quiet characteristic has no chart); one chart of "
          f"{len(d['characteristics'][0]['chart']['buckets'])} buckets in {t_chart:.2f} s, {len(png) / 1024:,.0f} KiB PNG")
    st.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
