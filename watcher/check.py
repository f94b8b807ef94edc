"""What ``linewatch check`` reports about a valid configuration."""

from __future__ import annotations

from typing import Any

from watcher.config import Config
from watcher.detector_set import resolve_detectors


def check_report(cfg: Config) -> dict[str, Any]:
    """A plain-data summary of what would be watched, and how."""
    from watcher.redact import redact_url

    learnt = _learnt(cfg)
    chars = []
    for cc in cfg.characteristics:
        budget = cc.false_alarms or cfg.false_alarms
        b = cc.baseline
        chars.append({
            "name": cc.name,
            "source": cc.source,
            "column": cc.column,
            "unit": cc.unit,
            "target": cc.target,
            "lsl": cc.lsl,
            "usl": cc.usl,
            "window": cc.window,
            "baseline": ({"mean": b.mean, "sigma": b.sigma} if b.fixed else {"readings": b.readings, "file": b.file}),
            "false_alarms": budget.text(),
            "detectors": resolve_detectors(cc),
            "state": learnt.get(cc.name),
        })
    return {
        "config": cfg.file,
        "state": str(cfg.state_dir),
        "timezone": cfg.timezone,
        "sources": [
            {"name": s.name, "kind": s.kind, "path": s.path, "format": s.format, "time_column": s.time_column}
            for s in cfg.sources
        ],
        "characteristics": chars,
        "alerts": [redact_url(a.url) for a in cfg.alerts],
        "digest": None if cfg.digest is None else {"at": cfg.digest.at, "folder": cfg.digest.folder,
                                                   "to": [redact_url(u) for u in cfg.digest.to]},
    }


def _learnt(cfg: Config) -> dict[str, Any]:
    """What the state folder says of each baseline, where linewatch has run already."""
    from watcher.status import read_status

    try:
        st = read_status(cfg)
    except FileNotFoundError:
        return {}
    return {name: {"phase": c["phase"], "warnings": c["warnings"], "baseline": c["baseline"]}
            for name, c in st["characteristics"].items() if c["readings"]}


def format_check(r: dict[str, Any]) -> str:
    lines = [f"{r['config']}: valid", f"state folder: {r['state']}  (time zone {r['timezone']})", ""]
    lines.append(f"{len(r['sources'])} source(s):")
    for s in r["sources"]:
        where = s["path"] or s["kind"]
        lines.append(f"  {s['name']}: {s['format']} from {where}" + (f", time in '{s['time_column']}'" if s["time_column"] else ""))
    lines.append(f"{len(r['characteristics'])} characteristic(s):")
    for c in r["characteristics"]:
        limits = ", ".join(f"{k} {c[k]:g}" for k in ("lsl", "target", "usl") if c[k] is not None) or "no limits"
        b = c["baseline"]
        base = f"fixed mean {b['mean']:g}, sigma {b['sigma']:g}" if "mean" in b else f"first {b['readings']} readings"
        lines.append(f"  {c['name']} ({c['source']}.{c['column']}{', ' + c['unit'] if c['unit'] else ''}): {limits}")
        lines.append(f"    baseline: {base}; window {c['window']}; false-alarm budget {c['false_alarms']}")
        lines.append(f"    detectors: {', '.join(c['detectors']) or 'none'}")
        if c["state"]:
            b = c["state"]["baseline"] or {}
            how = ""
            if b.get("distribution_free_only"):
                how = " (not normal, even after Box-Cox: distribution-free detectors only)"
            elif b.get("transform"):
                how = " (watched on the Box-Cox scale)"
            lines.append(f"    learnt so far: {c['state']['phase']}{how}")
            for w in c["state"]["warnings"]:
                lines.append(f"    warning: {w}")
    lines.append(f"{len(r['alerts'])} alert target(s)" + (": " + ", ".join(r["alerts"]) if r["alerts"] else ""))
    if r["digest"]:
        lines.append(f"digest daily at {r['digest']['at']} into {r['digest']['folder']}")
    return "\n".join(lines)
