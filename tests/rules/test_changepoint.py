"""Pettitt's change-point test.

Sources: Pettitt A.N. (1979) Applied Statistics 28(2):126-135 (formulas); the Nile data set
shipped with statsmodels 0.15.x (annual flow at Aswan, 1871-1970), whose change after 1898
is documented by Cobb G.W. (1978) "The problem of the Nile", Biometrika 65(2) -- the year is
quoted from memory; check-values.md 7.3 for the small exact example (computed, recomputed here).
"""

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest

from rules.changepoint import pettitt_onset, pettitt_test


def _u_by_signs(x):
    """Independent U_t = sum_{i<=t} sum_{j>t} sgn(x_i - x_j), plain loops."""
    n = len(x)
    return [
        sum(int(x[i] > x[j]) - int(x[i] < x[j]) for i in range(t) for j in range(t, n))
        for t in range(1, n)
    ]


def test_small_exact_example():
    x = [3.1, 2.8, 3.4, 3.0, 4.2, 4.6, 3.9, 4.4, 4.1]
    r = pettitt_test(x)
    assert r.location == 4 and r.statistic == 20
    assert r.direction == "up"
    assert r.pvalue == pytest.approx(2 * math.exp(-6 * 400 / (729 + 81)), rel=1e-12)
    assert r.pvalue == pytest.approx(0.10333, abs=1e-5)  # computed, check-values.md 7.3
    # Exact permutation tail by enumerating all 9! orders (computed): P(K >= 20) = 1/35.
    n = 9
    perms = np.array(list(itertools.permutations(range(1, n + 1))), dtype=np.int16)
    t = np.arange(1, n)
    u = 2 * np.cumsum(perms, axis=1)[:, :-1] - t * (n + 1)
    k = np.abs(u).max(axis=1)
    exact = Fraction(int((k >= 20).sum()), math.factorial(n))
    assert exact == Fraction(1, 35)
    assert r.pvalue > float(exact)  # the approximation is conservative here


def test_rank_form_equals_sign_form_with_ties():
    rng = np.random.default_rng(50)
    for x in (rng.normal(size=25), rng.integers(0, 4, size=30).astype(float)):
        r = pettitt_test(x)
        assert np.allclose(r.u, _u_by_signs(list(x)))
        ref = _u_by_signs(list(x))
        assert r.statistic == max(abs(v) for v in ref)
        assert r.location == int(np.argmax(np.abs(ref))) + 1


def test_nile_change_after_1898():
    sm = pytest.importorskip("statsmodels")
    if not sm.__version__.startswith("0.15."):
        pytest.skip(f"pinned to statsmodels 0.15.x, installed {sm.__version__}")
    from statsmodels.datasets import nile

    df = nile.load_pandas().data
    assert len(df) == 100 and df["year"].iloc[0] == 1871
    r = pettitt_test(df["volume"].to_numpy())
    last_year_before = int(df["year"].iloc[r.location - 1])
    assert abs(last_year_before - 1898) <= 1  # Cobb (1978), from memory
    assert r.direction == "down"  # flow fell after the change
    assert r.pvalue < 1e-4
    assert pettitt_onset(df["volume"].to_numpy()) == r.location


def test_onset_helper_on_a_step():
    # checkweigher: the filler's set point moves up by 1.5 sigma at reading 70
    rng = np.random.default_rng(51)
    x = rng.normal(250.0, 1.0, size=120)
    x[70:] += 1.5
    loc = pettitt_onset(x)
    assert abs(loc - 70) <= 3
    assert pettitt_onset([1.0, 1.0, 1.0, 1.0]) is None
    assert pettitt_onset([1.0, 2.0]) is None


def test_no_change_is_not_significant_on_average():
    # p is conservative: under no change P(p < 0.05) <= 0.05 (Monte Carlo, 2000 series of 50,
    # SE 0.005; tolerance 3 SE above).
    rng = np.random.default_rng(52)
    rej = np.mean([pettitt_test(rng.normal(size=50)).pvalue < 0.05 for _ in range(2000)])
    assert rej <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / 2000)


def test_bad_input():
    with pytest.raises(ValueError, match="at least 3"):
        pettitt_test([1.0, 2.0])
    with pytest.raises(ValueError, match="NaN"):
        pettitt_test([1.0, float("nan"), 2.0])


# -- rolling detector ----------------------------------------------------------------------------

import json  # noqa: E402

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from rules.changepoint import PettittDetector  # noqa: E402
from rules.detector import StateError  # noqa: E402
from rules.registry import DETECTORS  # noqa: E402


def _reference_first(x, w, alpha):
    """First window end whose batch Pettitt p is <= alpha."""
    for end in range(w - 1, len(x)):
        r = pettitt_test(x[end - w + 1 : end + 1])
        if r.pvalue <= alpha:
            return end, r
    return None


@pytest.mark.parametrize("w,seed,step", [(50, 1, 1.5), (30, 2, -2.0), (80, 3, 1.5)])
def test_detector_golden_index_on_step(w, seed, step):
    rng = np.random.default_rng(seed)
    x = np.round(rng.normal(0, 1, 400), 2)
    x[200:] += step
    end, ref = _reference_first(x, w, 0.001)
    sig = PettittDetector.scan(x, window=w, alpha=0.001)[0]
    det = PettittDetector(window=w, alpha=0.001)
    first = next(s for s in (det.update(v) for v in x) if s is not None)
    assert first == sig
    assert first.index == end and first.index >= 200
    assert first.statistic == ref.statistic
    assert first.p_value == pytest.approx(ref.pvalue, rel=1e-12)
    assert first.onset_index == end - w + 1 + ref.location
    assert abs(first.onset_index - 200) <= 5
    assert first.direction == ("up" if step > 0 else "down")
    win = x[end - w + 1 : end + 1]
    assert first.size == pytest.approx(win[ref.location :].mean() - win[: ref.location].mean())


def test_detector_quiet_on_constant_and_short():
    det = PettittDetector(window=30, alpha=0.01)
    assert all(det.update(4.2) is None for _ in range(300))
    assert PettittDetector.scan(np.r_[np.zeros(20), np.ones(19)], window=40) == []
    with pytest.raises(ValueError, match="never reach alpha"):
        PettittDetector(window=10, alpha=0.01)  # best p at w = 10 is 0.066


@settings(max_examples=30, deadline=None)
@given(
    st.lists(st.sampled_from([0.0, 1.0, 2.0]) | st.floats(-3, 3), min_size=40, max_size=200),
    st.integers(12, 40),
    st.sampled_from([0.05, 0.01]),
    st.floats(-3, 3),
)
def test_detector_scan_equals_streaming(values, w, alpha, step):
    x = np.asarray(values, dtype=float)
    x[len(x) // 2 :] += step
    try:
        det = PettittDetector(window=w, alpha=alpha)
    except ValueError:
        return  # window too short for this alpha
    stream = [s for s in (det.update(v) for v in x) if s is not None]
    assert PettittDetector.scan(x, window=w, alpha=alpha) == stream


def test_detector_state_round_trip():
    rng = np.random.default_rng(53)
    x = np.round(rng.normal(size=500) + np.r_[np.zeros(250), np.ones(250)], 1)
    ref = PettittDetector.scan(x, window=40, alpha=0.01)
    part = PettittDetector(window=40, alpha=0.01)
    got = [s for s in (part.update(v) for v in x[:271]) if s is not None]
    again = PettittDetector.from_state(json.loads(json.dumps(part.export_state())))
    assert again.last == part.last
    got += [s for s in (again.update(v) for v in x[271:]) if s is not None]
    assert got == ref and len(ref) >= 1
    with pytest.raises(StateError):
        PettittDetector.from_state({**part.export_state(), "version": 9})


def test_detector_registered():
    assert DETECTORS["pettitt"] is PettittDetector
    d = PettittDetector()
    assert (d.window, d.alpha) == (50, 0.001)
    with pytest.raises(ValueError, match="finite"):
        d.update(float("inf"))
