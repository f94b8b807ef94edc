"""Run-length engine: chains against published/recomputed ARLs, simulation against the chains.

Sources of the reference values (see also /work/shared/references/check-values.md §3-5):

* CUSUM k = 0.5: Brook & Evans (1972, Biometrika 59(3):539-549) chain; the table
  "ARL performance of the tabular CUSUM with k = 1/2, h = 4 or 5" in Montgomery,
  *Introduction to Statistical Quality Control* (6th ed., Table 9.3): 168 / 465 in
  control, 8.38 / 10.4 at 1 sigma -- quoted from memory.  The 4-5 digit values
  (167.68, 465.44, 8.383, 10.38) are computed, not published: each test recomputes
  them here with an independent Nystrom solution of Page's integral equation.
* EWMA: Lucas & Saccucci (1990, Technometrics 32(1):1-12) table as reproduced in
  Montgomery (Table 9.11), from memory: lam = 0.1, L = 2.814: ARL0 ~ 500, 31.3 at 0.5
  sigma, 10.3 at 1, 4.4 at 2; lam = 0.25, L = 2.998: 48.2 at 0.5 (the exact 48.29
  is recomputed here by Crowder's 1987 integral equation).
* Shewhart 3-sigma: 1 / (2 Phi(-3)) = 370.40 (scipy.stats.norm).
* Western Electric rules 1-4 together: ARL0 91.75, Champ & Woodall (1987,
  Technometrics 29(4):393-399).

Simulation tolerances are 3 Monte Carlo standard errors (sd / sqrt(streams)),
seeded, so each test gives the same answer on every run; a 3-SE band would
fail by chance in ~0.3 % of seeds, and the seed is fixed.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import rules.cusum  # noqa: F401  (registers)
import rules.ewma  # noqa: F401
import rules.runs_stream  # noqa: F401
import rules.trend  # noqa: F401
import rules.zones  # noqa: F401
from rules.registry import DETECTORS
from rules.runlength import (
    cusum_chain_arl,
    cusum_h_for_arl0,
    dead_time_count,
    detection_power,
    ewma_chain_arl,
    ewma_L_for_arl0,
    shewhart_arl,
    shewhart_limit_for_arl0,
    simulate_false_finding_rate,
    simulate_run_lengths,
    standardised_moments,
    window_pvalues,
)

# ------------------------------------------------------------- independent recomputation


def nystrom_cusum_upper(k: float, h: float, delta: float, nodes: int = 80) -> float:
    """Page's integral equation L(u) = 1 + L(0) Phi(k-u-d) + int_0^h L(y) phi(y-u+k-d) dy,
    Gauss-Legendre Nystrom (an independent method from the Brook-Evans chain under test)."""
    g, w = np.polynomial.legendre.leggauss(nodes)
    y = h * (g + 1) / 2
    w = w * h / 2
    pts = np.concatenate([[0.0], y])
    A = np.empty((nodes + 1, nodes + 1))
    A[:, 0] = stats.norm.cdf(k - pts - delta)
    A[:, 1:] = w[None, :] * stats.norm.pdf(y[None, :] - pts[:, None] + k - delta)
    return float(np.linalg.solve(np.eye(nodes + 1) - A, np.ones(nodes + 1))[0])


def nystrom_cusum(k: float, h: float, delta: float) -> float:
    return 1.0 / (1.0 / nystrom_cusum_upper(k, h, delta) + 1.0 / nystrom_cusum_upper(k, h, -delta))


def nystrom_ewma(lam: float, L: float, delta: float, nodes: int = 120) -> float:
    """Crowder (1987) integral equation for the EWMA with asymptotic limits."""
    c = L * math.sqrt(lam / (2 - lam))
    g, w = np.polynomial.legendre.leggauss(nodes)
    y = c * g
    w = w * c
    K = w[None, :] / lam * stats.norm.pdf((y[None, :] - (1 - lam) * y[:, None]) / lam - delta)
    Ly = np.linalg.solve(np.eye(nodes) - K, np.ones(nodes))
    return float(1 + np.sum(w / lam * stats.norm.pdf(y / lam - delta) * Ly))


# ------------------------------------------------------------------------------ chains


@pytest.mark.parametrize(
    "h, delta, printed",
    [(4.0, 0.0, 168), (5.0, 0.0, 465), (4.0, 1.0, 8.38), (5.0, 1.0, 10.4), (4.0, 0.5, 26.6), (5.0, 2.0, 4.01)],
)
def test_cusum_chain_against_integral_equation_and_printed_table(h, delta, printed):
    arl = cusum_chain_arl(0.5, h, delta)
    assert arl == pytest.approx(nystrom_cusum(0.5, h, delta), rel=1e-4)  # computed, not a published value
    # Montgomery Table 9.3 (Brook-Evans ARLs), from memory, at its printed precision
    digits = 3 - int(math.floor(math.log10(printed)))
    assert round(arl, digits - 1) == pytest.approx(printed, abs=0.51 * 10 ** -(digits - 1))


def test_cusum_one_sided_is_twice_two_sided_in_control():
    # symmetric sides at delta = 0: 1/ARL = 2/ARL+ exactly
    assert cusum_chain_arl(0.5, 4.0, sides=1) == pytest.approx(2 * cusum_chain_arl(0.5, 4.0), rel=1e-12)


def test_cusum_h_for_arl0_matches_hawkins_table():
    # Hawkins (1993) / Montgomery Table 9.4: k = 0.5 -> h = 4.77 for ARL0 = 370 (from memory);
    # the exact 4.7738 is recomputed with the independent Nystrom solution.
    h = cusum_h_for_arl0(0.5, 370.0)
    assert round(h, 2) == 4.77
    assert nystrom_cusum(0.5, h, 0.0) == pytest.approx(370.0, rel=2e-4)


@pytest.mark.parametrize(
    "lam, L, delta, printed",
    [(0.1, 2.814, 0.0, 500), (0.1, 2.814, 0.5, 31.3), (0.1, 2.814, 1.0, 10.3), (0.1, 2.814, 2.0, 4.4),
     (0.05, 2.615, 1.0, 11.4), (0.4, 3.054, 1.0, 14.3)],
)
def test_ewma_chain_against_lucas_saccucci(lam, L, delta, printed):
    arl = ewma_chain_arl(lam, L, delta)
    assert arl == pytest.approx(nystrom_ewma(lam, L, delta), rel=5e-4)  # computed, not published
    # Lucas & Saccucci (1990) via Montgomery Table 9.11, from memory, printed precision
    tol = 1.0 if printed == 500 else 0.051 if printed < 10 else 0.051 * (10 if printed >= 100 else 1)
    assert arl == pytest.approx(printed, abs=tol)


def test_ewma_lambda_025_half_sigma_exact():
    # check-values §4.2: exact 48.29 (recalled print 48.2); recomputed here independently
    assert ewma_chain_arl(0.25, 2.998, 0.5) == pytest.approx(nystrom_ewma(0.25, 2.998, 0.5), rel=5e-4)
    assert ewma_chain_arl(0.25, 2.998, 0.5) == pytest.approx(48.29, abs=0.01)


def test_ewma_L_for_arl0():
    # Lucas & Saccucci design lam = 0.1 -> L = 2.814 for ARL0 ~ 500 (from memory)
    assert ewma_L_for_arl0(0.1, 500.0) == pytest.approx(2.814, abs=5e-4)


def test_shewhart_arl_and_limit():
    p = 2 * stats.norm.sf(3.0)
    assert shewhart_arl(3.0) == pytest.approx(1 / p, rel=1e-12)
    assert shewhart_arl(3.0) == pytest.approx(370.4, abs=0.01)
    assert shewhart_limit_for_arl0(1 / p) == pytest.approx(3.0, abs=1e-7)
    # shifted: 1 / (Phi(-3 - d) + Phi(d - 3)), d = 1 -> 43.89 (check-values §5.2 rule-1 row)
    assert shewhart_arl(3.0, 1.0) == pytest.approx(43.89, abs=0.01)


def test_estimated_parameters_enter_as_mean_and_scale():
    mu, tau = standardised_moments(0.0, 0.2, 1.1)
    # CUSUM on N(mu, tau^2) readings: a chain with known moments against the Nystrom
    # solution of the rescaled problem (k' = (k - mu)/tau, h' = h/tau for the upper side)
    up = cusum_chain_arl(0.5, 5.0, mu=mu, tau=tau, sides=1)
    assert up == pytest.approx(nystrom_cusum_upper((0.5 - mu) / tau, 5.0 / tau, 0.0), rel=1e-4)


# --------------------------------------------------------------------------- simulation


@pytest.mark.parametrize("h, published", [(4.0, 167.68), (5.0, 465.44)])
def test_simulated_cusum_arl0_within_3se(h, published):
    # published: Montgomery Table 9.3 (168 / 465, from memory); 4-5 digits recomputed above
    r = simulate_run_lengths([("cusum", {"k": 0.5, "h": h})], n_streams=4000, seed=11)
    assert r.first.censored == 0
    assert abs(r.first.mean - published) < 3 * r.first.se
    assert r.first.se < 0.02 * published  # the test has power: SE about 1.6 %


def test_simulated_ewma_arl0_within_3se():
    # Lucas & Saccucci (1990) design lam = 0.1, L = 2.814: ARL0 ~ 500 (exact 499.6)
    r = simulate_run_lengths([("ewma", {"lam": 0.1, "L": 2.814, "limits": "asymptotic"})], n_streams=4000, seed=20)
    assert abs(r.first.mean - 499.6) < 3 * r.first.se


def test_simulated_ewma_half_sigma_within_3se():
    r = simulate_run_lengths([("ewma", {"lam": 0.1, "L": 2.814, "limits": "asymptotic"})], shift=0.5, n_streams=2000, seed=13)
    assert abs(r.first.mean - 31.30) < 3 * r.first.se  # Lucas & Saccucci: 31.3


def test_simulated_shewhart_arl0_within_3se():
    r = simulate_run_lengths([("shewhart", {"limit": 3.0})], n_streams=4000, seed=14)
    assert abs(r.first.mean - 370.4) < 3 * r.first.se  # 1 / 0.0027


def test_simulated_western_electric_near_champ_woodall():
    # Champ & Woodall (1987): the four Western Electric rules together, ARL0 = 91.75
    r = simulate_run_lengths([("western_electric", {})], n_streams=12000, seed=15)
    assert abs(r.first.mean - 91.75) < 3 * r.first.se
    assert r.first.se < 1.0


def test_set_run_length_is_first_of_its_detectors():
    r = simulate_run_lengths([("cusum", {"k": 0.5, "h": 4.0}), ("shewhart", {"limit": 3.0})], n_streams=300, seed=3)
    t = r.times
    assert np.array_equal(np.minimum(t[0], t[1]), np.where((t[0] > 0) & (t[1] > 0), np.minimum(t[0], t[1]), -1))
    assert r.first.mean < min(r.per_detector["cusum"].mean, r.per_detector["shewhart"].mean)


@pytest.mark.parametrize(
    "key, params",
    [("cusum", {"k": 0.5, "h": 3.0}), ("ewma", {"lam": 0.2, "L": 2.6, "limits": "asymptotic"}),
     ("shewhart", {"limit": 2.8}), ("western_electric", {})],
)
def test_kernels_equal_the_detector_classes(key, params):
    """The vectorised-over-streams kernels give run lengths identical to the classes' own scan."""
    a = simulate_run_lengths([(key, params)], n_streams=60, seed=5, use_kernels=True, shift=0.3)
    b = simulate_run_lengths([(key, params)], n_streams=60, seed=5, use_kernels=False, shift=0.3)
    assert np.array_equal(a.times, b.times)
    ra = simulate_false_finding_rate([(key, params)], n_streams=4, n_readings=3000, seed=2, use_class_scan=True)
    rb = simulate_false_finding_rate([(key, params)], n_streams=4, n_readings=3000, seed=2, use_class_scan=False)
    assert ra.per_stream == rb.per_stream and ra.signals > 0


def test_seeded_and_prefix_stable():
    a = simulate_run_lengths([("cusum", {"k": 0.5, "h": 4.0})], n_streams=200, seed=9, start_readings=64)
    b = simulate_run_lengths([("cusum", {"k": 0.5, "h": 4.0})], n_streams=200, seed=9, start_readings=4096)
    c = simulate_run_lengths([("cusum", {"k": 0.5, "h": 4.0})], n_streams=200, seed=10)
    assert np.array_equal(a.times, b.times)  # extending a stream keeps its first readings
    assert not np.array_equal(a.times, c.times)


def test_false_finding_rate_is_one_over_arl0():
    # renewal: the long-run rate of a restarting CUSUM equals 1 / ARL0 (Brook-Evans 167.68)
    r = simulate_false_finding_rate([("cusum", {"k": 0.5, "h": 4.0})], n_streams=40, n_readings=8000, seed=4)
    assert abs(r.rate - 1 / 167.68) < 3 * r.se
    assert r.se < 0.05 / 167.68


def test_drift_run_length_against_direct_simulation():
    """Drift of 0.05 sigma per reading through CUSUM h = 5: the engine against a plain loop."""
    r = simulate_run_lengths([("cusum", {"k": 0.5, "h": 5.0})], drift=0.05, n_streams=500, seed=21)
    rng = np.random.default_rng(99)
    runs = []
    for _ in range(500):
        cp = cn = 0.0
        t = 0
        while True:
            t += 1
            x = rng.standard_normal() + 0.05 * t
            cp, cn = max(0.0, cp + x - 0.5), max(0.0, cn - x - 0.5)
            if cp > 5 or cn > 5:
                break
        runs.append(t)
    se = math.hypot(r.first.se, np.std(runs, ddof=1) / math.sqrt(500))
    assert abs(r.first.mean - np.mean(runs)) < 3 * se


@pytest.mark.parametrize("key", ["median_runs", "updown_runs", "longest_median_run", "longest_monotone_run", "mann_kendall"])
def test_window_pvalues_reproduce_the_detectors(key):
    """Window p-values plus the restart rule give exactly the class's signals, for several alphas."""
    x = np.random.default_rng(31).standard_normal(20_000)
    p = window_pvalues(key, {"window": 40}, x)
    counts = []
    for alpha in (0.02, 0.003, 0.0005):
        n_cls = len(DETECTORS[key].scan(x, window=40, alpha=alpha))
        assert dead_time_count(p, alpha, 40) == n_cls
        counts.append(n_cls)
    assert counts[0] > 0


def test_detection_power_structure_and_values():
    out = detection_power([("cusum", {"k": 0.5, "h": 5.0})], shifts=(1.0,), drifts=(0.05,), n_streams=1500, seed=2,
                          arl0=465.44, readings_per_day=1440)
    one = out["shift"]["1"]
    assert abs(one["mean"] - 10.38) < 3 * one["se"]  # Montgomery Table 9.3: 10.4 (from memory)
    assert out["false_per_day"] == pytest.approx(1440 / 465.44)
    assert out["drift"]["0.05"]["mean"] < one["mean"] * 3
    assert set(one) == {"mean", "se", "median", "n", "censored"}
