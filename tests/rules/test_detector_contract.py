"""The contract every registered streaming detector keeps (see rules/detector.py).

- settings are validated: a nonsense value raises ValueError naming the setting;
- state exported mid-stream (as JSON) and imported gives identical signals afterwards;
- no signal on a constant stream at the centre;
- ``scan`` over an array equals the streaming loop, on random streams with ties, shifts and drifts.

These are internal-consistency checks; each detector's published reference values sit in its own module's tests.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import rules
from rules import DETECTORS

KEYS = sorted(DETECTORS)


def stream(rng: np.random.Generator, n: int, kind: str) -> np.ndarray:
    x = rng.normal(size=n)
    if kind == "shift":
        x[n // 2:] += 1.5
    elif kind == "drift":
        x += np.linspace(0, 4, n)
    elif kind == "ties":
        x = np.round(x * 2) / 2
    elif kind == "alternating":
        x += np.where(np.arange(n) % 2 == 0, 1.0, -1.0)
    return x


def feed(det, xs) -> list:
    return [s for s in (det.update(float(v)) for v in xs) if s is not None]


def test_registry_is_filled():
    # The default set of the watcher needs these families.
    for key in ("median_runs", "updown_runs", "cusum", "ewma", "mann_kendall"):
        assert key in DETECTORS, key
    assert rules.DETECTORS is DETECTORS


@pytest.mark.parametrize("key", KEYS)
def test_settings_are_validated(key):
    cls = DETECTORS[key]
    assert cls.name and cls.key == key
    for p in cls.PARAMS:
        with pytest.raises((ValueError, TypeError)):
            cls(**{p: "nonsense"})


@pytest.mark.parametrize("key", KEYS)
@pytest.mark.parametrize("kind", ["plain", "shift", "drift", "ties"])
def test_state_round_trip_mid_stream(key, kind):
    rng = np.random.default_rng(hash((key, kind)) % 2**32)
    x = stream(rng, 900, kind)
    a = DETECTORS[key]()
    first = feed(a, x[:437])
    state = json.loads(json.dumps(a.export_state()))  # plain data only
    b = DETECTORS[key].from_state(state)
    assert feed(a, x[437:]) == feed(b, x[437:])
    assert first == feed(DETECTORS[key](), x[:437])


@pytest.mark.parametrize("key", KEYS)
def test_quiet_on_a_constant_stream(key):
    signals = feed(DETECTORS[key](), np.zeros(2000))
    if key == "nelson":
        # Nelson's (1984) test 7 (15 in a row within 1 sigma) is meant to fire on a stream with too little
        # spread, such as a stuck gauge; every other test must stay quiet.
        assert signals and {s.detector for s in signals} == {"Nelson test 7"}
    else:
        assert signals == []


@pytest.mark.parametrize("key", KEYS)
def test_state_of_another_detector_is_refused(key):
    other = next(k for k in KEYS if k != key)
    with pytest.raises(ValueError):
        DETECTORS[key].from_state(DETECTORS[other]().export_state())


@pytest.mark.parametrize("key", KEYS)
@pytest.mark.parametrize("kind", ["plain", "shift", "drift", "ties", "alternating"])
def test_scan_equals_stream(key, kind):
    rng = np.random.default_rng(hash((key, kind, 1)) % 2**32)
    x = stream(rng, 3000, kind)
    assert DETECTORS[key].scan(x) == feed(DETECTORS[key](), x)


@settings(max_examples=25, deadline=None)
@given(st.sampled_from(KEYS), st.integers(0, 2**32 - 1), st.sampled_from(["plain", "shift", "drift", "ties", "alternating"]),
       st.integers(50, 800))
def test_scan_equals_stream_property(key, seed, kind, n):
    x = stream(np.random.default_rng(seed), n, kind)
    assert DETECTORS[key].scan(x) == feed(DETECTORS[key](), x)


@settings(max_examples=25, deadline=None)
@given(st.sampled_from(KEYS), st.integers(0, 2**32 - 1), st.sampled_from(["plain", "shift", "drift", "ties", "alternating"]),
       st.lists(st.integers(0, 300), min_size=1, max_size=6))
def test_resume_in_chunks_equals_stream(key, seed, kind, cuts):
    """``resume`` over consecutive pieces gives the signals (and the end state) of the streaming loop."""
    x = stream(np.random.default_rng(seed), 900, kind)
    bounds = np.cumsum([0] + cuts).clip(0, x.size).tolist() + [x.size]
    det, ref = DETECTORS[key](), DETECTORS[key]()
    got = [s for a, b in zip(bounds, bounds[1:]) for s in det.resume(x[a:b])]
    assert got == feed(ref, x)
    assert det.export_state() == ref.export_state()


RECURSIONS = [("cusum", {}, "_cusum_until"), ("cusum", {"k": 0.25, "h": 8.0, "headstart": 4.0}, "_cusum_until"),
              ("ewma", {}, "_ewma_until"), ("ewma", {"lam": 0.3, "L": 2.9, "limits": "asymptotic"}, "_ewma_until")]


@settings(max_examples=30, deadline=None)
@given(st.sampled_from(RECURSIONS), st.integers(0, 2**32 - 1), st.sampled_from(["plain", "shift", "drift", "ties"]),
       st.lists(st.integers(0, 400), min_size=1, max_size=6), st.booleans())
def test_cusum_ewma_resume_both_kernels_equal_stream(case, seed, kind, cuts, numpy_kernel):
    """The compiled recursion and the numpy blocks (``numpy_kernel``) both give the
    streaming loop's signals, end state and last statistic, in any pieces."""
    import importlib

    from tests.rules.compiled import python_only

    key, params, name = case
    module = importlib.import_module(DETECTORS[key].__module__)
    x = stream(np.random.default_rng(seed), 1200, kind)
    bounds = np.cumsum([0] + cuts).clip(0, x.size).tolist() + [x.size]
    det, ref = DETECTORS[key](**params), DETECTORS[key](**params)
    want = feed(ref, x)
    with python_only(module, name, numpy_kernel):
        got = [s for a, b in zip(bounds, bounds[1:]) for s in det.resume(x[a:b])]
    assert got == want
    assert det.export_state() == ref.export_state() and det.last == ref.last
