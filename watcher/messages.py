"""One plain sentence per finding, for a supervisor."""

from __future__ import annotations

from watcher.records import Finding

_WHAT = {
    "shift": "the level moved {dir}",
    "drift": "readings are drifting {dir}",
    "grouping": "readings are grouping in long runs on one side of the median",
    "mixture": "readings alternate about the median more often than chance (two levels mixed?)",
    "sawtooth": "readings flip up and down more often than chance",
    "spike": "one reading stands far {dir} of the rest",
}


def _p(p: float | None) -> str:
    if p is None:
        return ""
    if p < 1e-4:
        return f"p = {p:.1e}"
    return f"p = {p:.4f}".rstrip("0").rstrip(".")


def finding_message(f: Finding, unit: str = "") -> str:
    """E.g. 'pack_mass: the level moved up by 2.1 g since reading 340 (CUSUM, p = 0.0003).'"""
    u = f" {unit}" if unit else ""
    direction = {"up": "up", "down": "down"}.get(f.direction or "", "")
    what = _WHAT.get(f.pattern, f.pattern).format(dir=direction).replace("  ", " ").strip()
    if f.pattern == "spike" and not direction:
        what = "one reading stands far from the rest"
    parts = [f"{f.characteristic}: {what}"]
    if f.size is not None and f.pattern in ("shift", "drift", "spike"):
        parts.append(f" by {abs(f.size):.3g}{u}")
    if f.onset_index is not None and f.onset_index != f.index:
        since = f.onset_time or f"reading {f.onset_index}"
        parts.append(f" since {since}")
    tail = ", ".join(x for x in (f.detector, _p(f.p_value)) if x)
    return "".join(parts) + (f" ({tail})." if tail else ".")
