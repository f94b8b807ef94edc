"""Plain records that travel along the route of a reading.

source -> RawLine -> parse -> Reading | Quarantined -> monitor -> Finding
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, NamedTuple

# The keys of the findings record, in order.  Other programs rely on them.
FINDING_KEYS = (
    "characteristic",
    "pattern",
    "detector",
    "p_value",
    "index",
    "time",
    "onset_index",
    "onset_time",
    "direction",
    "size",
    "message",
)


class Reading(NamedTuple):
    """One measured value of one characteristic.

    A named tuple rather than a frozen dataclass: one is made per value read, and a
    tuple is made about three times faster (immutable all the same)."""

    characteristic: str
    value: float
    time: str | None  # ISO 8601, or None when the source has no time column
    source: str
    file: str | None = None
    line_no: int | None = None
    offset: int | None = None


@dataclass(frozen=True)
class Quarantined:
    """A line that could not be turned into readings, and why."""

    source: str
    file: str | None
    line_no: int | None
    offset: int | None
    raw: str  # at most 1 KB of the line, decoded with replacement
    reason: str


@dataclass(frozen=True)
class Finding:
    """One detector firing on one reading: the findings record.

    ``index`` is the 0-based position of the reading within its characteristic;
    ``size`` is in the characteristic's unit; ``p_value`` is None only for rules
    that have none (out_of_spec, silence).
    """

    characteristic: str
    pattern: str
    detector: str
    p_value: float | None
    index: int
    time: str | None
    onset_index: int | None
    onset_time: str | None
    direction: str | None
    size: float | None
    message: str
    source: str = ""
    value: float | None = None
    statistic: float | None = None
    detail: dict[str, Any] = field(default_factory=dict)

    def record(self) -> dict[str, Any]:
        """The public record: the contract keys, in order."""
        d = asdict(self)
        return {k: d[k] for k in FINDING_KEYS}

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)
