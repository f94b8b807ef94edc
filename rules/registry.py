"""Every streaming detector by its configuration key.

The watcher builds a characteristic's detector set from this table; the
contract test in ``tests/rules/test_detector_contract.py`` runs over all of it.
"""

from __future__ import annotations

from rules.detector import StreamDetector

DETECTORS: dict[str, type[StreamDetector]] = {}


def register(cls: type[StreamDetector]) -> type[StreamDetector]:
    """Class decorator: add a detector to the table under its ``key``."""
    if not cls.key:
        raise ValueError(f"{cls.__name__} has no key")
    old = DETECTORS.get(cls.key)
    # The same class imported twice (e.g. a module run as a doctest) may register again.
    if old is not None and old is not cls and old.__qualname__ != cls.__qualname__:
        raise ValueError(f"detector key {cls.key!r} is taken by {DETECTORS[cls.key].__name__}")
    DETECTORS[cls.key] = cls
    return cls
