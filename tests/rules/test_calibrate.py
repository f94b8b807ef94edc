"""Calibration to a false-alarm budget: thresholds against published designs, the set's
measured false-finding rate against its budget, and the estimated-baseline adjustment.

Sources: Hawkins (1993) / Montgomery Table 9.4 (CUSUM h for ARL0 = 370, from memory);
Lucas & Saccucci (1990) EWMA designs (from memory, via Montgomery Table 9.11);
1/0.0027 for the Shewhart chart; Gandy & Kvaloy (2013, Scand. J. Statist. 40(4):647-668)
for the meaning of the guarantee that the last tests check by simulation.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import rules  # noqa: F401  (registers every detector)
from rules.calibrate import (
    DEFAULT_ARL0,
    FalseAlarmBudget,
    _bootstrap_errors,
    _conditional_rate,
    budget_to_arl0,
    calibrate,
    config_key,
    default_detector_set,
    estimated_baseline_inflation,
)
from rules.runlength import cusum_chain_arl, simulate_false_finding_rate


def test_single_cusum_gets_the_published_h():
    # Hawkins (1993) / Montgomery Table 9.4: k = 0.5, ARL0 = 370 -> h = 4.77 (from memory)
    res = calibrate([("cusum", {"k": 0.5})], 370.0)
    assert round(res["params"]["cusum"]["h"], 2) == 4.77
    assert res["report"]["set"]["arl0"] == pytest.approx(370.0, rel=1e-9)


def test_single_ewma_gets_lucas_saccucci_L():
    # Lucas & Saccucci (1990): lam = 0.1 -> L = 2.814 for ARL0 = 500 (from memory)
    res = calibrate([("ewma", {"lam": 0.1, "limits": "asymptotic"})], 500.0)
    assert res["params"]["ewma"]["L"] == pytest.approx(2.814, abs=5e-4)


def test_single_shewhart_gets_three_sigma():
    res = calibrate([("shewhart", {})], 1.0 / 0.0026997961)  # 370.40 = 1/P(|Z|>3)
    assert res["params"]["shewhart"]["limit"] == pytest.approx(3.0, abs=1e-6)


def test_rates_add_up_to_the_budget_and_windowed_tests_stay_within_their_share():
    res = calibrate(default_detector_set(), 500.0)
    rep = res["report"]
    per = rep["per_detector"]
    assert sum(v["rate"] for v in per.values()) == pytest.approx(1 / 500.0, rel=1e-9)
    for label in ("mann_kendall", "median_runs", "updown_runs", "longest_median_run"):
        assert per[label]["rate"] <= per[label]["share_target"] / 500.0 + 1e-15
        assert 0 < res["params"][label]["alpha"] < 0.01
    # the chain detectors absorbed the slack: each at or above its own share
    for label in ("cusum", "ewma", "shewhart"):
        assert per[label]["rate"] >= per[label]["share_target"] / 500.0
    json.dumps(res)  # plain JSON


def test_calibrated_set_meets_its_budget_on_50_streams():
    """Issue 8 acceptance: a set calibrated to ARL0 = 500, run (each detector's own scan,
    restarts included) on 50 independent in-control streams of 10 000 readings (20 false
    findings expected per stream, 1000 in all), has a false-finding rate within 15 % of 1/500.

    Not flaky: the streams are seeded.  Size of the tolerance: the count of ~1000 renewal
    events has a relative SE of about 1/sqrt(1000) = 3.2 % (measured SE is printed in the
    assertion), and the windowed tests' shares carry a calibration MC error below 2 % of
    the budget, so 15 % is more than 4 standard errors while a mis-calibration by a factor
    such as summing shares wrongly (or ignoring restarts) would show as > 20 %."""
    res = calibrate(default_detector_set(), 500.0)
    v = simulate_false_finding_rate(res["detector_set"], n_streams=50, n_readings=10_000, seed=2026)
    ratio = v.rate * 500.0
    assert abs(ratio - 1.0) < 0.15, (ratio, v.se * 500)
    assert v.se * 500 < 0.05
    assert all(c > 0 for c in v.per_detector.values())


def test_windowed_table_agrees_with_fresh_simulation():
    """The shipped table (rules.window_rates) against a fresh simulation with another seed,
    so a change in the runs detectors' conventions shows up here."""
    a = calibrate(default_detector_set(), 500.0)
    b = calibrate(default_detector_set(), 500.0, seed=77, window_readings=600_000)
    for label in ("mann_kendall", "median_runs", "updown_runs", "longest_median_run"):
        pa, pb = a["report"]["per_detector"][label], b["report"]["per_detector"][label]
        if a["params"][label]["alpha"] == b["params"][label]["alpha"]:
            se = math.hypot(pa["rate_se"], pb["rate_se"])
            assert abs(pa["rate"] - pb["rate"]) < 4 * se, label


def test_config_key_is_stable_and_sensitive():
    s = default_detector_set()
    k1 = config_key(s, 500.0, None, 0)
    assert k1 == config_key([list(x) for x in s], 500, None, 0)
    assert k1 != config_key(s, 501.0, None, 0)
    assert k1 != config_key(s, 500.0, 100, 0)
    assert k1 != config_key(s[:-1], 500.0, None, 0)
    res = calibrate([("cusum", {"k": 0.5})], 500.0)
    assert res["key"] == calibrate([("cusum", {"k": 0.5})], 500.0)["key"]
    assert len(res["key"]) == 64


def test_budget_to_arl0():
    assert budget_to_arl0() == (DEFAULT_ARL0, [])
    arl0, notes = budget_to_arl0(FalseAlarmBudget(episodes=2, per_days=7), readings_per_day=1440)
    assert arl0 == pytest.approx(1440 * 7 / 2)
    arl0, notes = budget_to_arl0(FalseAlarmBudget(per_days=7), None)
    assert arl0 == DEFAULT_ARL0 and "no" in notes[0] and "default" in notes[0]
    with pytest.raises(ValueError, match="episodes"):
        FalseAlarmBudget(episodes=0)


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="unknown detector key"):
        calibrate([("no_such_rule", {})], 500.0)
    with pytest.raises(ValueError, match="arl0_target"):
        calibrate([("cusum", {})], 1.0)


# ---------------------------------------------------------------- estimated baselines


def test_estimated_baseline_inflation_reproduces_issue_figure():
    """Issue 8 measured that a CUSUM k = 0.5, h = 5 with mean and sd estimated from 50
    readings raises about 2.4 times as many false findings (issue figure, not a published
    value).  The chain-based bootstrap mean ratio, 2000 draws: within 15 % of 2.4."""
    out = estimated_baseline_inflation(("cusum", {"k": 0.5, "h": 5.0}), 50, n_boot=2000, seed=1, sigma_method="sd")
    assert abs(out["mean_ratio"] / 2.4 - 1) < 0.15, out
    assert out["p_arl0_below_nominal"] > 0.5


def test_conditional_rate_matches_direct_simulation():
    """The chain's conditional CUSUM rate for one estimated baseline (e, r) against a plain
    simulation of the chart run on N(0,1) data standardised with the wrong centre/sigma."""
    e, r = np.array([0.25]), np.array([0.85])
    p = {"k": 0.5, "h": 4.0}
    chain = 1.0 / float(_conditional_rate("cusum", p, e, r)[0])
    rng = np.random.default_rng(5)
    m = 3000
    cp = np.zeros(m)
    cn = np.zeros(m)
    t_end = np.zeros(m, int)
    alive = np.ones(m, bool)
    t = 0
    while alive.any():
        t += 1
        z = (rng.standard_normal(m) - e[0]) / r[0]
        cp = np.where(alive, np.maximum(0, cp + z - 0.5), cp)
        cn = np.where(alive, np.maximum(0, cn - z - 0.5), cn)
        hit = alive & ((cp > 4) | (cn > 4))
        t_end[hit] = t
        alive &= ~hit
    se = t_end.std(ddof=1) / math.sqrt(m)
    assert abs(t_end.mean() - chain) < 3 * se


def test_gandy_kvaloy_guarantee_holds_for_fresh_baselines():
    """With baseline_n = 100 and guarantee 0.9 the set's conditional rate should be within
    the budget for about 90 % of baselines.  Checked on 400 fresh baselines (another seed):
    binomial SE 1.5 %, tolerance 0.9 +- 0.06 (4 SE).  Without the adjustment far fewer meet it."""
    s = [("cusum", {"k": 0.5}), ("ewma", {"lam": 0.1, "limits": "asymptotic"}), ("shewhart", {})]
    res = calibrate(s, 500.0, baseline_n=100, seed=3, n_boot=300)
    base = res["report"]["baseline"]
    e, r = _bootstrap_errors(100, 400, 999, "moving_range")
    total = sum(_conditional_rate(k, res["params"][k], e, r) for k, _ in s)
    met = float(np.mean(total <= 1 / 500.0))
    assert abs(met - 0.9) < 0.06, met
    known = calibrate(s, 500.0)
    total0 = sum(_conditional_rate(k, known["params"][k], e, r) for k, _ in s)
    assert float(np.mean(total0 <= 1 / 500.0)) < 0.6
    assert base["arl0_inflation_g"] > 1.0
    assert res["params"]["cusum"]["h"] > known["params"]["cusum"]["h"]


def test_short_baseline_warns_and_long_one_does_not():
    s = [("cusum", {"k": 0.5}), ("shewhart", {})]
    short = calibrate(s, 500.0, baseline_n=20, n_boot=150)
    assert any("too short" in w or "below the minimum" in w for w in short["report"]["warnings"])
    long = calibrate(s, 500.0, baseline_n=20_000, n_boot=150)
    assert not long["report"]["warnings"]
    assert long["report"]["baseline"]["arl0_inflation_g"] < 1.5


def test_known_parameter_rate_is_unchanged_by_the_chain_used():
    # the thresholds calibrate() reports reproduce the target on the chain of rules.cusum
    from rules.cusum import cusum_arl

    res = calibrate([("cusum", {"k": 0.5})], 2000.0)
    assert cusum_arl(0.5, res["params"]["cusum"]["h"]) == pytest.approx(2000.0, rel=2e-4)
    assert cusum_chain_arl(0.5, res["params"]["cusum"]["h"]) == pytest.approx(2000.0, rel=1e-6)
