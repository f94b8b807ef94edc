"""The words of an alert: a short title and a plain body.

Every message names its episode id, so a reply, an acknowledgement or a
later digest line can be matched to it.  Numbers are rounded for reading
(4 significant digits for values, 2 for p-values); the findings log keeps
the full figures.

>>> facts = CharacteristicFacts(unit="g", target=500.0, lsl=495.0, usl=505.0,
...                             centre=500.1, sigma=0.5)
>>> t = alert_title("fill weight", "shift", "notice")
>>> t
'fill weight: shift [notice]'
>>> body = opening_body(episode_id="3fa9c2d1", characteristic="fill weight",
...     pattern="shift", facts=facts, onset_index=1204,
...     onset_time="2026-12-02T08:14:03", size=0.8, direction="up",
...     p_value=3.2e-7, detector="CUSUM", index=1260, value=501.2)
>>> print(body.splitlines()[0])
Episode 3fa9c2d1: shift in fill weight.
>>> "1.6 baseline sigmas" in body
True
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

CAUTION = (
    "Caution: this is a statistical signal, not a diagnosis. Check the process "
    "before adjusting it, and follow the site's procedures."
)

# Plain words for each pattern, used in "a ... was seen".
PATTERN_WORDS = {
    "shift": "a shift of the mean",
    "drift": "a steady drift",
    "grouping": "values grouping together (runs longer than chance)",
    "mixture": "values alternating more than chance allows (mixture)",
    "sawtooth": "a repeating sawtooth",
    "spike": "an isolated spike",
    "out_of_spec": "a reading beyond a specification limit",
    "silence": "no readings arriving",
}


@dataclass(frozen=True)
class CharacteristicFacts:
    """What a message needs to know about a characteristic besides the finding.

    ``centre`` and ``sigma`` are the current baseline's; ``target``, ``lsl``
    and ``usl`` the specification's.  Any may be None.
    """

    unit: str = ""
    target: float | None = None
    lsl: float | None = None
    usl: float | None = None
    centre: float | None = None
    sigma: float | None = None
    source: str = ""


_ALIASES = {
    "center": "centre",
    "mean": "centre",
    "lower": "lsl",
    "upper": "usl",
    "lower_limit": "lsl",
    "upper_limit": "usl",
    "nominal": "target",
}


def facts_from(spec: Any) -> CharacteristicFacts:
    """Build :class:`CharacteristicFacts` from None, a mapping or any object.

    Reads the field names of :class:`CharacteristicFacts` (and a few common
    aliases: center, mean, lower/upper, lower_limit/upper_limit, nominal)
    from attributes or keys; missing ones stay None.

    >>> facts_from({"unit": "mm", "lower": 9.9, "upper": 10.1}).usl
    10.1
    >>> facts_from(None).unit
    ''
    """
    if spec is None:
        return CharacteristicFacts()
    if isinstance(spec, CharacteristicFacts):
        return spec
    names = [f.name for f in fields(CharacteristicFacts)]
    got: dict[str, Any] = {}

    def read(key: str) -> Any:
        if isinstance(spec, dict):
            return spec.get(key)
        return getattr(spec, key, None)

    for key in names + list(_ALIASES):
        v = read(key)
        if v is None:
            continue
        name = _ALIASES.get(key, key)
        got.setdefault(name, v)
    if got.get("unit") is None:
        got["unit"] = ""
    if got.get("source") is None:
        got["source"] = ""
    for k in ("target", "lsl", "usl", "centre", "sigma"):
        if k in got and got[k] is not None:
            got[k] = float(got[k])
    return CharacteristicFacts(**got)


def num(x: float | None, unit: str = "") -> str:
    """A value for reading: 4 significant digits, then the unit.

    >>> num(501.23456, "g")
    '501.2 g'
    >>> num(None)
    'n/a'
    """
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    s = f"{x:.4g}"
    return f"{s} {unit}".rstrip() if unit else s


def pval(p: float | None) -> str:
    """A p-value for reading.

    >>> pval(3.21e-7), pval(0.0123), pval(None)
    ('3.2e-07', '0.012', 'none')
    """
    if p is None:
        return "none"
    if p < 0.001:
        return f"{p:.1e}"
    return f"{p:.2g}"


def hours_words(h: float) -> str:
    """A duration in hours, in words.

    >>> hours_words(0.5), hours_words(3.46), hours_words(50)
    ('30 minutes', '3.5 hours', '2.1 days')
    """
    if h < 1:
        return f"{max(1, round(h * 60))} minutes"
    if h < 48:
        return f"{h:.1f} hours"
    return f"{h / 24:.1f} days"


def alert_title(characteristic: str, pattern: str, severity: str) -> str:
    """Title line: characteristic, pattern, severity."""
    return f"{characteristic}: {pattern.replace('_', ' ')} [{severity}]"


def _when(index: int | None, time: str | None) -> str:
    if time:
        return f"{time} (reading {index})" if index is not None else time
    return f"reading {index}" if index is not None else "an unknown reading"


def _size_words(size: float | None, direction: str | None, facts: CharacteristicFacts) -> str:
    if size is None:
        return ""
    mag = abs(size)
    words = f"size {num(mag, facts.unit)}"
    if facts.sigma:
        words += f" ({mag / facts.sigma:.2g} baseline sigmas)"
    if direction in ("up", "down"):
        words += f", {'upwards' if direction == 'up' else 'downwards'}"
    return words


def _now_line(value: float | None, facts: CharacteristicFacts) -> str | None:
    bits = []
    if value is not None:
        bits.append(f"latest value {num(value, facts.unit)}")
    if facts.target is not None:
        bits.append(f"target {num(facts.target, facts.unit)}")
    if facts.lsl is not None or facts.usl is not None:
        bits.append(
            f"specification {num(facts.lsl, facts.unit) if facts.lsl is not None else '-'}"
            f" to {num(facts.usl, facts.unit) if facts.usl is not None else '-'}"
        )
    if facts.centre is not None:
        bits.append(f"baseline centre {num(facts.centre, facts.unit)}")
    return ("Now: " + "; ".join(bits) + ".") if bits else None


def _heading_line(detail: dict[str, Any] | None, direction: str | None, unit: str = "") -> str | None:
    if not detail:
        return None
    h = detail.get("hours_to_limit")
    if h is None:
        return None
    try:
        h = float(h)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(h) or h < 0:
        return None
    which = detail.get("limit")
    if which is None and direction in ("up", "down"):
        which = "upper" if direction == "up" else "lower"
    if isinstance(which, (int, float)) and not isinstance(which, bool):
        limit = f"the specification limit {num(float(which), unit)}"
    elif which:
        limit = f"the {which} specification limit"
    else:
        limit = "a specification limit"
    return f"Heading: at the present rate it reaches {limit} in about {hours_words(h)}."


def opening_body(
    *,
    episode_id: str,
    characteristic: str,
    pattern: str,
    facts: CharacteristicFacts,
    onset_index: int | None,
    onset_time: str | None,
    size: float | None,
    direction: str | None,
    p_value: float | None,
    detector: str,
    index: int,
    value: float | None = None,
    time: str | None = None,
    detail: dict[str, Any] | None = None,
    lead: str | None = None,
) -> str:
    """Body of an opening or escalation message (``lead`` is a first line of news)."""
    lines = [f"Episode {episode_id}: {pattern.replace('_', ' ')} in {characteristic}."]
    if lead:
        lines.append(lead)
    seen = f"Seen: {PATTERN_WORDS.get(pattern, pattern)}"
    if pattern == "out_of_spec":
        pass  # a single reading: the evidence line says which
    elif onset_index is not None or onset_time:
        seen += f", estimated to start at {_when(onset_index, onset_time)}"
    if pattern == "out_of_spec":
        # the monitor gives the excess over the limit as the size
        sw = f"{num(abs(size), facts.unit)} beyond the limit" if size is not None else ""
    else:
        sw = _size_words(size, direction, facts)
    if sw:
        seen += f"; {sw}"
    lines.append(seen + ".")
    if p_value is not None:
        lines.append(
            f"Evidence: p = {pval(p_value)} from {detector}, at {_when(index, time)}."
        )
    else:
        lines.append(f"Evidence: rule {detector}, at {_when(index, time)} (no p-value for this rule).")
    now = _now_line(value, facts)
    if now:
        lines.append(now)
    heading = _heading_line(detail, direction, facts.unit)
    if heading:
        lines.append(heading)
    lines.append(CAUTION)
    return "\n".join(lines)


def closing_body(
    *,
    episode_id: str,
    characteristic: str,
    pattern: str,
    reason: str,
    first_index: int | None,
    last_index: int | None,
    first_time: str | None,
    last_time: str | None,
    min_p: float | None,
) -> str:
    """Body of a closing message."""
    lines = [
        f"Episode {episode_id}: {pattern.replace('_', ' ')} in {characteristic} is closed.",
        f"Why: {reason}.",
        f"It ran from {_when(first_index, first_time)} to {_when(last_index, last_time)}; "
        f"smallest p-value {pval(min_p)}.",
    ]
    return "\n".join(lines)


def silence_body(
    *, episode_id: str, source: str, last_seen: str | None, silent_for_s: float, gap_s: float
) -> str:
    """Body of a silence message."""
    since = f"since {last_seen}" if last_seen else "since the watch started"
    return "\n".join(
        [
            f"Episode {episode_id}: no readings from source {source!r} {since}.",
            f"Silent for {hours_words(silent_for_s / 3600)}; the configured gap is {hours_words(gap_s / 3600)}.",
            "Check that the instrument, its export and the file share are working. "
            "linewatch only reports what reaches it.",
        ]
    )
