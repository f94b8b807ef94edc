"""The shared shape of every streaming detector and of what it reports.

Every detector in ``rules`` is one small class:

* constructor parameters are stored under their own names and validated
  (``ValueError`` naming the parameter and the allowed range);
* ``update(x)`` takes one value and returns a :class:`Signal` when the
  detector fires on that value, else ``None``; the latest statistic is
  readable afterwards (``last``);
* ``export_state()`` returns versioned plain data (JSON-able dicts, lists,
  numbers) and ``from_state(data)`` rebuilds an identical detector, so a
  daemon can checkpoint it mid-stream;
* ``scan(x)`` (class method) evaluates a whole array from a fresh start and
  returns exactly the signals that feeding ``update`` one value at a time
  would give, vectorised where the method allows it; ``resume(x)`` does the
  same from the detector's current state (so a long series can be taken in
  chunks with nothing kept but the state).

Convention on firing: after a signal a detector *restarts* (windowed tests
clear their window, cumulative statistics return to zero).  The stream of
false signals is then a renewal process, so the in-control false-finding rate
is exactly 1 / ARL0, which is what calibration controls.

Values fed to a detector are whatever the caller chooses; the watcher feeds
standardised values z = (x - centre) / sigma for detectors that need a
reference (``needs_reference = True``) and raw values otherwise.  ``size`` in a
signal is in the units of the values fed.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any, ClassVar

import numpy as np

# The patterns a finding may carry (the findings record's ``pattern`` field).
PATTERNS = (
    "shift",
    "drift",
    "grouping",
    "mixture",
    "sawtooth",
    "spike",
    "out_of_spec",
    "silence",
)


@dataclass(frozen=True)
class Signal:
    """One detector firing on one value.

    ``index`` is the 0-based position, among the values this detector was fed
    since it was created, of the value on which it fired.  ``onset_index`` is
    the estimated first value of the pattern on the same scale (or ``None``).
    ``p_value`` is the probability, under the in-control model, of a result at
    least this extreme (``None`` where a rule has none).
    """

    pattern: str
    detector: str
    p_value: float | None
    index: int
    onset_index: int | None = None
    direction: str | None = None  # "up", "down" or None
    size: float | None = None  # estimated change, in the units fed
    statistic: float | None = None
    detail: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.pattern not in PATTERNS:
            raise ValueError(f"unknown pattern {self.pattern!r}; expected one of {PATTERNS}")
        if self.direction not in (None, "up", "down"):
            raise ValueError(f"direction must be 'up', 'down' or None, got {self.direction!r}")

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


class StateError(ValueError):
    """Raised when exported state does not belong to this detector or version."""


class StreamDetector:
    """Base class: parameter bookkeeping, state export and the default ``scan``.

    Subclasses set ``key`` (the short name used in configuration), ``name``
    (the method's usual name, as it appears in findings), ``STATE_VERSION``,
    list their constructor parameters in ``PARAMS`` and implement
    ``update``, ``_get_state`` and ``_set_state``.
    """

    key: ClassVar[str] = ""
    name: ClassVar[str] = ""
    STATE_VERSION: ClassVar[int] = 1
    PARAMS: ClassVar[tuple[str, ...]] = ()
    needs_reference: ClassVar[bool] = False
    # The fewest values after a (re)start before the detector can fire.
    min_values: int = 1

    def update(self, x: float) -> Signal | None:  # pragma: no cover - abstract
        raise NotImplementedError

    # -- parameters -------------------------------------------------------
    def params(self) -> dict[str, Any]:
        return {p: getattr(self, p) for p in self.PARAMS}

    def __repr__(self) -> str:
        inner = ", ".join(f"{k}={v!r}" for k, v in self.params().items())
        return f"{type(self).__name__}({inner})"

    # -- state --------------------------------------------------------------
    def _get_state(self) -> dict[str, Any]:  # pragma: no cover - abstract
        raise NotImplementedError

    def _set_state(self, state: dict[str, Any]) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    def export_state(self) -> dict[str, Any]:
        """Versioned plain data: ``{"detector", "version", "params", "state"}``."""
        return {
            "detector": self.key,
            "version": self.STATE_VERSION,
            "params": self.params(),
            "state": self._get_state(),
        }

    @classmethod
    def from_state(cls, data: dict[str, Any]) -> "StreamDetector":
        if data.get("detector") != cls.key:
            raise StateError(f"state is for detector {data.get('detector')!r}, not {cls.key!r}")
        if data.get("version") != cls.STATE_VERSION:
            raise StateError(
                f"state version {data.get('version')!r} of {cls.key!r} is not supported "
                f"(this build reads version {cls.STATE_VERSION})"
            )
        obj = cls(**data["params"])
        obj._set_state(data["state"])
        return obj

    # -- batch ----------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """All signals over ``x`` from a fresh start (reference loop; subclasses vectorise)."""
        return cls(**params).resume(x)

    def resume(self, x: Any) -> list[Signal]:
        """All signals over ``x`` continuing from this detector's current state, as ``update``
        on each value in turn gives them (reference loop; subclasses may vectorise)."""
        out = []
        for v in np.asarray(x, dtype=float):
            s = self.update(float(v))
            if s is not None:
                out.append(s)
        return out


# -- small shared validators -------------------------------------------------------


def check_int(name: str, value: Any, lo: int, hi: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be a whole number, got {value!r}")
    if value < lo or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"between {lo} and {hi}"
        raise ValueError(f"{name} must be {rng}, got {value}")
    return int(value)


def check_float(
    name: str, value: Any, lo: float | None = None, hi: float | None = None, *, open_lo: bool = False, open_hi: bool = False
) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name} must be a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    if lo is not None and (v < lo or (open_lo and v == lo)):
        raise ValueError(f"{name} must be {'>' if open_lo else '>='} {lo}, got {value}")
    if hi is not None and (v > hi or (open_hi and v == hi)):
        raise ValueError(f"{name} must be {'<' if open_hi else '<='} {hi}, got {value}")
    return v


def check_choice(name: str, value: Any, choices: tuple[str, ...]) -> str:
    if value not in choices:
        raise ValueError(f"{name} must be one of {choices}, got {value!r}")
    return value
