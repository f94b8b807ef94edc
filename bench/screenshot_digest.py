"""Render an HTML digest in headless Chromium at phone and desktop widths (PNG screenshots).

    python bench/screenshot_digest.py DIGEST.html [--out DIR]

Without a digest file it builds a sample one first (invented data, two
characteristics, one shift episode, a name that needs escaping).  Prints the
screenshot paths and how long each render took.  Needs a ``chromium`` (or
``chromium-browser`` / ``google-chrome``) binary on PATH.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SIZES = ((390, 2000), (1280, 2000))


def find_chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


def screenshot(html_path: Path, png_path: Path, width: int, height: int, browser: str, timeout: float = 60.0) -> None:
    """One screenshot; raises RuntimeError with Chromium's stderr when no PNG came out."""
    with tempfile.TemporaryDirectory(prefix="lw-chromium-") as profile:
        cmd = [
            browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--hide-scrollbars", f"--user-data-dir={profile}", f"--screenshot={png_path}",
            f"--window-size={width},{height}", html_path.resolve().as_uri(),
        ]
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    if not png_path.exists() or png_path.stat().st_size == 0:
        raise RuntimeError(f"chromium made no screenshot (exit {proc.returncode}): {proc.stderr[-2000:]}")


def sample_digest(folder: Path) -> Path:
    """A digest of invented data, for looking at the layout."""
    from datetime import datetime, timedelta, timezone

    import numpy as np

    from watcher import aggregates as agg
    from watcher.config import parse_config
    from watcher.digest import Period, build_digest
    from watcher.digest_render import write_digest
    from watcher.episodes import EpisodeBook, EpisodeSettings
    from watcher.records import Finding, Quarantined
    from watcher.store import Store

    cfg = parse_config(
        "timezone: Europe/Berlin\n"
        "sources: [{name: checkweigher, path: x.csv, time_column: t}, {name: lathe, path: y.csv, time_column: t}]\n"
        "characteristics:\n"
        "  - {name: pack_mass, source: checkweigher, column: m, unit: g, lsl: 495, usl: 510}\n"
        "  - {name: pin_diameter, source: lathe, column: d, unit: mm, lsl: 7.985, usl: 8.015}\n"
        "  - {name: '<script>alert(1)</script>', source: lathe, column: s, unit: mm}\n",
        str(folder / "sample.yaml"))
    store = Store(folder / "state")
    rng = np.random.default_rng(7)
    t0 = datetime(2026, 12, 1, 5, 30, tzinfo=timezone.utc)
    vals: dict[str, list] = {c.name: [] for c in cfg.characteristics}
    for i in range(4000):
        t = (t0 + timedelta(seconds=21 * i)).isoformat()
        vals["pack_mass"].append((502 + rng.normal(0, 1.4) + (2.2 if i > 2600 else 0.0), t))
        vals["pin_diameter"].append((8.0 + rng.normal(0, 0.002), t))
        vals["<script>alert(1)</script>"].append((1.0 + rng.normal(0, 0.1), t))
    with store.transaction() as c:
        agg.record_values(c, vals, t0.isoformat(), limits=agg.limits_from_config(cfg))
        book = EpisodeBook(c, EpisodeSettings(clock=lambda: t0 + timedelta(hours=17)))
        on = t0 + timedelta(seconds=21 * 2601)
        book.on_finding(Finding("pack_mass", "shift", "CUSUM", 2e-8, 2650, (on + timedelta(minutes=17)).isoformat(),
                                2601, on.isoformat(), "up", 2.2, "", "checkweigher", 504.3))
        store.add_quarantined(c, [Quarantined("lathe", "y.csv", 17, 900, "8,0x1", "not a number in column 'd'")])
        c.execute("UPDATE quarantine SET created_at = ?", ((t0 + timedelta(hours=3)).isoformat(),))
    d = build_digest(store.conn, cfg, Period(t0, t0 + timedelta(hours=24), "Europe/Berlin"))
    store.close()
    return write_digest(d, folder / "out")["html"]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("html", nargs="?", help="the digest to render (default: a sample digest)")
    ap.add_argument("--out", help="folder for the PNGs (default: beside the HTML)")
    args = ap.parse_args(argv)
    browser = find_chromium()
    if browser is None:
        print("no chromium binary on PATH; install it (Debian: apt-get install chromium)", file=sys.stderr)
        return 2
    work = Path(tempfile.mkdtemp(prefix="lw-shot-"))
    html_path = Path(args.html) if args.html else sample_digest(work)
    out = Path(args.out) if args.out else html_path.parent
    out.mkdir(parents=True, exist_ok=True)
    for w, h in SIZES:
        png = out / f"{html_path.stem}-{w}x{h}.png"
        t = time.perf_counter()
        screenshot(html_path, png, w, h, browser)
        print(f"{png}  {w}x{h}  {time.perf_counter() - t:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
