"""``linewatch status``: what has been read and found, from the state database (read-only)."""

from __future__ import annotations

import json
from typing import Any

from watcher.config import Config
from watcher.store import Store


def read_status(cfg: Config) -> dict[str, Any]:
    """Plain data: per characteristic and per source, straight from the store."""
    store = Store(cfg.state_dir, readonly=True)
    try:
        c = store.conn
        chars: dict[str, Any] = {}
        rows = {r["characteristic"]: r for r in c.execute("SELECT * FROM characteristic_state")}
        counts = {r[0]: r[1] for r in c.execute("SELECT characteristic, count(*) FROM findings GROUP BY characteristic")}
        open_eps = _open_episodes(c)
        for cc in cfg.characteristics:
            r = rows.get(cc.name)
            state = json.loads(r["state"]) if r else None
            baseline = (state or {}).get("baseline")
            if r is None:
                phase = "no readings yet"
            elif baseline is None:
                phase = f"learning baseline ({r['readings']} of {cc.baseline.readings} readings)"
            elif baseline.get("no_spread"):
                phase = f"no spread in the baseline: {baseline.get('no_spread_reason') or 'every reading equal'}"
            else:
                phase = "watching"
            chars[cc.name] = {
                "source": cc.source,
                "readings": r["readings"] if r else 0,
                "last_time": r["last_time"] if r else None,
                "last_value": r["last_value"] if r else None,
                "phase": phase,
                "baseline": None if baseline is None else {
                    k: baseline.get(k) for k in ("centre", "sigma", "n", "transform", "distribution_free_only", "no_spread")
                },
                "warnings": list((baseline or {}).get("warnings") or [])
                + list(((state or {}).get("calibration") or {}).get("warnings") or []),
                # thresholds, budget and reading rate (measured or configured) the detectors run with
                "calibration": (state or {}).get("calibration"),
                "findings": counts.get(cc.name, 0),
                "open_episodes": open_eps.get(cc.name, []),
            }
        sources: dict[str, Any] = {}
        for s in cfg.sources:
            files = {}
            for r in c.execute("SELECT path, checkpoint, lines, quarantined, updated_at FROM files WHERE source = ?", (s.name,)):
                ck = json.loads(r["checkpoint"])
                files[r["path"]] = {"offset": ck.get("offset"), "lines": r["lines"], "quarantined": r["quarantined"],
                                    "updated_at": r["updated_at"]}
            reasons = {r[0]: r[1] for r in c.execute(
                "SELECT reason, count(*) FROM quarantine WHERE source = ? GROUP BY reason ORDER BY 2 DESC", (s.name,))}
            sources[s.name] = {"kind": s.kind, "path": s.path, "files": files, "quarantined_by_reason": reasons}
        return {"state": str(cfg.state_dir), "characteristics": chars, "sources": sources,
                "records": _records(c), "alerts": _alerts(c)}
    finally:
        store.close()


def _open_episodes(c: Any) -> dict[str, list[dict[str, Any]]]:
    """Live episodes per characteristic (none where alerting never ran in this state folder)."""
    if not _has_table(c, "episodes"):
        return {}
    out: dict[str, list[dict[str, Any]]] = {}
    for r in c.execute("SELECT * FROM episodes WHERE state != 'closed' ORDER BY first_index"):
        d = dict(r)
        out.setdefault(d["characteristic"], []).append(
            {k: d.get(k) for k in ("id", "pattern", "state", "severity", "onset_time", "min_p", "direction")})
    return out


def _has_table(c: Any, name: str) -> bool:
    return c.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?", (name,)).fetchone() is not None


def _records(c: Any) -> list[dict[str, Any]]:
    """Acknowledgements and re-baselinings, newest first (the last 20)."""
    rows = c.execute("SELECT created_at, kind, subject, note FROM events WHERE kind IN "
                     "('acknowledged', 'rebaseline_requested', 'rebaselined') ORDER BY id DESC LIMIT 20").fetchall()
    return [dict(r) for r in rows]


def _alerts(c: Any) -> dict[str, Any]:
    if not _has_table(c, "alert_delivery"):
        return {"deliveries": {}, "targets": []}
    from watcher.outbox import delivery_counts, target_health

    return {"deliveries": delivery_counts(c), "targets": target_health(c)}


def format_status(st: dict[str, Any]) -> str:
    lines = [f"state: {st['state']}", ""]
    for name, c in st["characteristics"].items():
        last = f", last at {c['last_time']}" if c["last_time"] else ""
        lines.append(f"{name}: {c['readings']} readings{last}; {c['phase']}; {c['findings']} findings")
        for w in c["warnings"]:
            lines.append(f"  warning: {w}")
        for e in c["open_episodes"]:
            p = f", smallest p {e['min_p']:.2g}" if e.get("min_p") is not None else ""
            lines.append(f"  episode {e['id']}: {e['pattern']} {e.get('direction') or ''} ({e['state']}, {e['severity']}{p})")
    lines.append("")
    for name, s in st["sources"].items():
        lines.append(f"source {name} ({s['kind']}):")
        for path, f in s["files"].items():
            lines.append(f"  {path}: offset {f['offset']}, {f['lines']} lines, {f['quarantined']} quarantined")
        for reason, n in s["quarantined_by_reason"].items():
            lines.append(f"  quarantined: {n} x {reason}")
    for target, counts in st["alerts"]["deliveries"].items():
        lines.append(f"alerts to {target}: " + ", ".join(f"{n} {k}" for k, n in sorted(counts.items())))
    if st["records"]:
        lines.append("")
        lines.append("recent acknowledgements and re-baselines:")
        for r in st["records"]:
            lines.append(f"  {r['created_at']} {r['kind']} {r['subject']}" + (f": {r['note']}" if r["note"] else ""))
    return "\n".join(lines)
