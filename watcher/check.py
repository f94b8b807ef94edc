"""What ``linewatch check`` reports about a valid configuration."""

from __future__ import annotations

from typing import Any

from watcher.config import Config

POWER_STREAMS = 1000  # simulated streams per pattern for the detection-power table


def check_report(cfg: Config, power: bool = True) -> dict[str, Any]:
    """A plain-data summary of what would be watched, and how.

    Per characteristic: the calibrated thresholds for its false-alarm budget
    (watcher.calibration, the same the daemon and replay use) and, with ``power``,
    readings to detect steps and drifts by seeded simulation (cached beside the
    calibration).
    """
    from watcher.calibration import Calibrator
    from watcher.redact import redact_url

    learnt = _learnt(cfg)
    calibrator = Calibrator.for_config(cfg)
    chars = []
    for cc in cfg.characteristics:
        budget = cc.false_alarms or cfg.false_alarms
        b = cc.baseline
        measured = ((learnt.get(cc.name) or {}).get("calibration") or {}).get("readings_per_hour")
        cal = calibrator.calibrate(cc, measured)
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
            "detectors": cal.spec,
            "calibration": {**cal.summary(), "set_arl0": _set_arl0(cal.report),
                            "baseline_adjustment": (cal.report or {}).get("baseline")},
            "detection": calibrator.detection_power(cal, POWER_STREAMS) if power else None,
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
    return {name: {"phase": c["phase"], "warnings": c["warnings"], "baseline": c["baseline"],
                   "calibration": c.get("calibration")}
            for name, c in st["characteristics"].items() if c["readings"]}


def _set_arl0(report: dict[str, Any] | None) -> float | None:
    arl0 = ((report or {}).get("set") or {}).get("arl0")
    return None if arl0 in (None, "inf") else float(arl0)


def _num(v: float) -> str:
    return f"{v:.3g}" if abs(v) < 1e-2 else f"{v:.4g}"


def _calibration_lines(c: dict[str, Any]) -> list[str]:
    cal = c["calibration"]
    out = []
    rate = cal["readings_per_hour"]
    per_day = f", about {cal['false_per_day']:.3g} false findings a day at {rate:g} readings/hour ({cal['rate_origin']})" \
        if cal["false_per_day"] is not None else ", reading rate unknown"
    arl0, adj = cal["set_arl0"], cal.get("baseline_adjustment")
    if arl0 and adj:
        got = (f"; the set's ARL0 meets it with probability {adj['guarantee']:g} given the baseline "
               f"({arl0:,.0f} if mean and sigma were known exactly)")
    else:
        got = f"; the set's ARL0 {arl0:,.0f}" if arl0 else ""
    out.append(f"    calibrated for 1 false finding per {cal['arl0']:,.0f} readings{got}{per_day}")
    th = cal["thresholds"]
    if th:
        from rules.calibrate import THRESHOLDS

        kept = set(cal["kept"])
        out.append("    thresholds: " + ", ".join(
            f"{k} {THRESHOLDS[k]} {_num(v)}{' (set in the config)' if k in kept else ''}" for k, v in th.items()))
    if adj:
        out.append(f"    estimated baseline of {adj['n']} readings: shift thresholds set for {adj['arl0_inflation_g']:.3g} x "
                   f"their nominal ARL0 so the budget holds with probability {adj['guarantee']:g} (Gandy & Kvaloy 2013)")
    d = c.get("detection")
    if d:
        shifts = ", ".join(f"{k} sigma {_delay(v)}" for k, v in d["shift"].items())
        drifts = ", ".join(f"{k} sigma/reading {_delay(v)}" for k, v in d["drift"].items())
        out.append(f"    readings to detect a step of {shifts}")
        out.append(f"    readings to detect a drift of {drifts}")
    for w in cal["warnings"]:
        out.append(f"    warning: {w}")
    return out


def _delay(v: dict[str, Any]) -> str:
    mean = v.get("mean")
    if mean in (None, "inf"):
        return "(not within the simulation)"
    return f"{float(mean):.3g}"


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
        lines += _calibration_lines(c)
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
