"""Calibrating a detector set to a false-alarm budget, with known or estimated baselines.

The budget
----------
A characteristic's budget is a number of false episodes per stretch of time
or readings (:class:`FalseAlarmBudget`).  With the characteristic's nominal
reading rate it becomes a target in-control ARL0 in readings
(:func:`budget_to_arl0`).  When no rate is known, or no budget is stated, the
default is one false episode per ``DEFAULT_ARL0 = 10_000`` readings.

How the budget is split, and why
--------------------------------
Every detector restarts after its own signal, so the set's false findings
are a superposition of renewal processes whose rates add up:
``rate_set = sum_i 1/ARL0_i``, whatever the dependence between detectors
(expectations add).  Calibration therefore splits the *rate* ``1/ARL0``:

1. Each detector gets a weight ``w_i`` (:data:`DEFAULT_WEIGHTS`, normalised).
   The shift detectors get the larger weights because they carry most of the
   detection power for steps and drifts and because a detector's delay grows
   only with the logarithm of its ARL0 (CUSUM: ``h`` grows by about ``ln 2``
   when its ARL0 doubles, Siegmund 1985), so a small share costs the pattern
   tests little while a large share for CUSUM/EWMA buys the most speed.
2. The windowed tests (runs about the median, runs up and down, longest
   runs, Mann-Kendall) have discrete statistics, so their rate is a step
   function of ``alpha``.  Each gets the largest attainable ``alpha`` whose
   simulated rate (restarts included) does not exceed ``w_i / ARL0`` -- from
   the shipped table :mod:`rules.window_rates` when it covers the window,
   otherwise by a seeded simulation at calibration time.  Detectors without
   a tunable threshold (e.g. zone rules) keep their parameters and their rate
   is simulated.
3. What these leave of the budget goes to the chain-calibrated detectors
   (CUSUM ``h``, EWMA ``L``, Shewhart ``limit``) in proportion to their
   weights; each threshold is solved exactly on its Markov chain
   (:mod:`rules.runlength`).  So the set's rate meets the budget up to the
   Monte Carlo error of step 2, which the report gives.

This budget counts every signal of every detector.  When the watcher merges
near-simultaneous findings into one episode the episode rate is lower, so the
budget is met conservatively.

Estimated baselines (Gandy & Kvaloy 2013)
-----------------------------------------
With centre and sigma estimated from ``n`` readings, the chart's conditional
false-alarm rate given the estimates is random and on average much larger
than nominal (a CUSUM k = 0.5, h = 5 with n = 50: about 2.4 times, which
this module reproduces).  :func:`calibrate` with ``baseline_n`` applies the
bootstrap adjustment of Gandy & Kvaloy (2013, *Scand. J. Statist.* 40(4):647-668,
"Guaranteed conditional performance of control charts via bootstrap
methods"), parametric version, percentile form: draw ``n_boot`` baselines of
``n`` normal readings from the estimated in-control model, estimate centre
and sigma from each as the watcher does (mean; ``MR-bar/1.128`` or the sd),
and compute on the chains the conditional rate of the set when the chart
built from the bootstrap estimates watches data from the fitted model.  The
thresholds of the chain-calibrated detectors are moved together along a
one-parameter family (each set for ``g`` times its nominal ARL0) and ``g`` is
the smallest value for which the ``guarantee`` quantile (default 0.9) of the
bootstrap conditional rate is within the budget: the budget then holds with
probability about ``guarantee`` for the baseline actually observed.  For
normal readings with these estimators the bootstrap distribution does not
depend on the estimates (location-scale pivot), so it is the exact sampling
distribution.  The windowed tests use the window's own median, differences
or ranks and are unaffected by the baseline.  Whether the printed paper
states the percentile form exactly this way is from memory; the tests check
the guarantee by simulation.

>>> res = calibrate([("cusum", {"k": 0.5}), ("shewhart", {})], 500.0)
>>> round(1.0 / res["report"]["set"]["rate"], 1)
500.0
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from scipy.special import ndtr

from rules.registry import DETECTORS
from rules.runlength import (
    WINDOW_KEYS,
    WindowNull,
    cusum_chain_arl,
    cusum_h_for_arl0,
    ewma_chain_arl,
    ewma_L_for_arl0,
    normalise_set,
    shewhart_arl,
    shewhart_limit_for_arl0,
    simulate_false_finding_rate,
    single_blas_thread,
)

__all__ = [
    "CALIBRATION_VERSION",
    "DEFAULT_ARL0",
    "DEFAULT_WEIGHTS",
    "FalseAlarmBudget",
    "THRESHOLDS",
    "budget_to_arl0",
    "calibrate",
    "calibration_key",
    "config_key",
    "default_detector_set",
    "estimated_baseline_inflation",
]

CALIBRATION_VERSION = 1
DEFAULT_ARL0 = 10_000.0
CHAIN_KEYS = ("cusum", "ewma", "shewhart")
# The parameter calibration sets, by detector key; a set that gives it keeps it (``keep``).
THRESHOLDS: dict[str, str] = {"cusum": "h", "ewma": "L", "shewhart": "limit", **{k: "alpha" for k in WINDOW_KEYS}}
# Weights of the budget split (normalised over the detectors present; keys not
# listed get the mean weight).  Rationale in the module docstring; the figures
# themselves are our choice, no source.
DEFAULT_WEIGHTS: dict[str, float] = {
    "cusum": 0.40,
    "ewma": 0.15,
    "shewhart": 0.10,
    "mann_kendall": 0.10,
    "longest_median_run": 0.10,
    "median_runs": 0.08,
    "updown_runs": 0.07,
}
MIN_BASELINE_N = 20
# Simulated readings for a window the shipped table does not cover: a share of 1e-5 per
# reading then rests on ~10 signals (+-30 % of that share, a few % of the budget).
WINDOW_SIM_READINGS = 1_000_000
UNTUNABLE_READINGS = 100_000  # at most this many simulated readings for a detector calibration cannot tune
INFLATION_WARN = 3.0
G_MAX = 1000.0  # largest ARL0 multiplier the adjustment may use  # thresholds set for > 3x their nominal ARL0: the baseline costs real power


def default_detector_set() -> list[tuple[str, dict[str, Any]]]:
    """linewatch's default detectors for one characteristic (thresholds are set by :func:`calibrate`).

    * ``cusum`` k = 0.5: steps of about 1 sigma (CUSUM is optimal for the step it
      is tuned to, Moustakides 1986);
    * ``ewma`` lam = 0.1, asymptotic limits (the Lucas & Saccucci convention the
      chain computes): smaller steps and slow drifts;
    * ``shewhart``: single spikes and large steps;
    * ``mann_kendall`` (window 50): drift;
    * ``longest_median_run`` (window 50): a sustained shift within the window;
    * ``median_runs`` (window 50): grouping (too few runs) and mixture (too many);
    * ``updown_runs`` (window 50): sawtooth (too many turns) and drift.

    >>> [k for k, _ in default_detector_set()]
    ['cusum', 'ewma', 'shewhart', 'mann_kendall', 'longest_median_run', 'median_runs', 'updown_runs']
    """
    return [
        ("cusum", {"k": 0.5}),
        ("ewma", {"lam": 0.1, "limits": "asymptotic"}),
        ("shewhart", {}),
        ("mann_kendall", {"window": 50}),
        ("longest_median_run", {"window": 50}),
        ("median_runs", {"window": 50}),
        ("updown_runs", {"window": 50}),
    ]


# ------------------------------------------------------------------ budget


@dataclass(frozen=True)
class FalseAlarmBudget:
    """``episodes`` false episodes per ``per_readings`` readings, or per ``per_days`` days.

    >>> FalseAlarmBudget().per_readings
    10000.0
    """

    episodes: float = 1.0
    per_readings: float | None = DEFAULT_ARL0
    per_days: float | None = None

    def __post_init__(self) -> None:
        if not (self.episodes > 0 and math.isfinite(self.episodes)):
            raise ValueError(f"episodes must be a positive number, got {self.episodes!r}")
        for name in ("per_readings", "per_days"):
            v = getattr(self, name)
            if v is not None and not (v > 0 and math.isfinite(v)):
                raise ValueError(f"{name} must be a positive number, got {v!r}")
        if self.per_days is not None and self.per_readings not in (None, DEFAULT_ARL0):
            raise ValueError("give the budget per readings or per days, not both")


def budget_to_arl0(budget: FalseAlarmBudget | None = None, readings_per_day: float | None = None) -> tuple[float, list[str]]:
    """The target in-control ARL0 (readings per false episode) and notes on how it was reached.

    >>> budget_to_arl0(FalseAlarmBudget(episodes=1, per_days=7), readings_per_day=2880)[0]
    20160.0
    >>> budget_to_arl0()[0]
    10000.0
    """
    notes: list[str] = []
    b = budget or FalseAlarmBudget()
    if b.per_days is not None:
        if readings_per_day is None or not readings_per_day > 0:
            notes.append(
                f"budget of {b.episodes:g} per {b.per_days:g} days needs a reading rate; none is known, "
                f"so the default of one false episode per {DEFAULT_ARL0:g} readings applies"
            )
            return DEFAULT_ARL0, notes
        arl0 = float(readings_per_day) * b.per_days / b.episodes
        notes.append(f"{b.episodes:g} per {b.per_days:g} days at {readings_per_day:g} readings/day = one per {arl0:g} readings")
        return arl0, notes
    per = DEFAULT_ARL0 if b.per_readings is None else float(b.per_readings)
    return per / b.episodes, notes


def config_key(detector_set: Sequence, arl0_target: float, baseline_n: int | None = None, seed: int = 0, **options: Any) -> str:
    """Stable hash (sha256 hex) of everything a calibration depends on, for the watcher's cache.

    >>> config_key([("cusum", {"k": 0.5})], 500) == config_key([["cusum", {"k": 0.5}]], 500.0)
    True
    """
    items = [[key, {k: params[k] for k in sorted(params)}] for _, key, params in normalise_set(detector_set)]
    payload = {
        "version": CALIBRATION_VERSION,
        "set": items,
        "arl0": float(arl0_target),
        "baseline_n": None if baseline_n is None else int(baseline_n),
        "seed": int(seed),
        "options": {k: options[k] for k in sorted(options)},
    }
    try:
        from rules import window_rates

        payload["table_seed"] = window_rates.SEED
    except ImportError:  # pragma: no cover
        pass
    text = json.dumps(payload, sort_keys=True, default=float, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def calibration_key(detector_set: Sequence, arl0_target: float, baseline_n: int | None = None, seed: int = 0,
                    **options: Any) -> str:
    """:func:`config_key` of a :func:`calibrate` call, with its defaults filled in, so equal
    calls get equal keys however they were spelt (the ``key`` field of its result).

    >>> calibration_key([("cusum", {})], 500) == calibration_key([("cusum", {})], 500, n_boot=200)
    True
    """
    opts = {"weights": None, "guarantee": 0.9, "n_boot": 200, "sigma_method": "moving_range",
            "window_readings": None, "verify_streams": 0, **options}
    opts["keep"] = sorted(opts.get("keep") or ())
    return config_key(detector_set, arl0_target, baseline_n, seed, **opts)


# ------------------------------------------------------------ chain helpers


def _chain_defaults(key: str, params: dict[str, Any]) -> dict[str, Any]:
    """A user-set chain detector's params with its class defaults filled in (for its chain)."""
    return DETECTORS[key](**params).params()


def _chain_params(key: str, params: dict[str, Any], arl0: float, fast: bool = False) -> dict[str, Any]:
    """Params of a chain-calibrated detector whose known-parameter ARL0 is ``arl0``
    (``fast``: coarser chains, relative ARL error ~1e-4, for the bootstrap grid)."""
    p = dict(params)
    if key == "cusum":
        if p.get("headstart", 0.0):
            raise ValueError("calibration of a CUSUM with a head start is not supported (the chain is zero-state)")
        p.setdefault("k", 0.5)
        p["h"] = cusum_h_for_arl0(float(p["k"]), arl0, **({"states": 40} if fast else {}))
    elif key == "ewma":
        p.setdefault("lam", 0.1)
        if p.get("limits", "asymptotic") == "exact":
            from rules.ewma import ewma_L_for_arl

            p["L"] = float(ewma_L_for_arl(float(p["lam"]), arl0, time_varying=True))
        else:
            p["limits"] = "asymptotic"
            p["L"] = ewma_L_for_arl0(float(p["lam"]), arl0, **({"states": 41} if fast else {}))
    elif key == "shewhart":
        p["limit"] = shewhart_limit_for_arl0(arl0)
    return p


def _chain_arl(key: str, p: dict[str, Any], delta: float = 0.0) -> float:
    if key == "cusum":
        return cusum_chain_arl(float(p["k"]), float(p["h"]), delta)
    if key == "ewma":
        if p.get("limits") == "exact":
            from rules.ewma import ewma_arl

            return float(ewma_arl(float(p["lam"]), float(p["L"]), delta, time_varying=True))
        return ewma_chain_arl(float(p["lam"]), float(p["L"]), delta)
    return shewhart_arl(float(p["limit"]), delta)


def _batched_solve(Q: np.ndarray) -> np.ndarray:
    m = Q.shape[-1]
    rhs = np.ones(Q.shape[:-1] + (1,))
    return np.linalg.solve(np.eye(m)[None] - Q, rhs)[..., 0]


def _cusum_upper_batch(k: float, h: float, mu: np.ndarray, tau: np.ndarray, t: int) -> tuple[np.ndarray, float]:
    w = 2.0 * h / (2 * t - 1)
    mid = np.arange(t) * w
    hi = (np.arange(t) + 0.5) * w
    arg = (hi[None, None, :] - mid[None, :, None] + k - mu[:, None, None]) / tau[:, None, None]
    cdf = ndtr(arg)
    Q = np.diff(np.concatenate([np.zeros(cdf.shape[:2] + (1,)), cdf], axis=2), axis=2)
    return _batched_solve(Q)[:, 0], w


def _ewma_batch(lam: float, c: float, mu: np.ndarray, tau: np.ndarray, n: int) -> tuple[np.ndarray, float]:
    w = 2.0 * c / n
    mid = -c + (np.arange(n) + 0.5) * w
    edges = -c + np.arange(n + 1) * w
    arg = (((edges[None, None, :] - (1.0 - lam) * mid[None, :, None]) / lam) - mu[:, None, None]) / tau[:, None, None]
    Q = np.diff(ndtr(arg), axis=2)
    return _batched_solve(Q)[:, n // 2], w


def _conditional_rate(key: str, p: dict[str, Any], e: np.ndarray, r: np.ndarray) -> np.ndarray:
    """False-alarm rate (1/ARL) of one chain detector given baseline errors e (mean, in sigma)
    and r (sigma ratio), per bootstrap draw; readings in control."""
    rate = _conditional_rate_raw(key, p, e, r)
    # Where a chain's ARL is too large for its linear solve the result is noise (negative,
    # NaN): such a draw's rate is negligible, so it counts as zero.
    return np.where(np.isfinite(rate) & (rate > 0), rate, 0.0)


def _conditional_rate_raw(key: str, p: dict[str, Any], e: np.ndarray, r: np.ndarray) -> np.ndarray:
    mu = -e / r
    tau = 1.0 / r
    if key == "cusum":
        k, h = float(p["k"]), float(p["h"])
        rate = 0.0
        for sgn in (1.0, -1.0):  # upper side on z, lower side = upper side on -z
            a1, w1 = _cusum_upper_batch(k, h, sgn * mu, tau, 30)
            a2, w2 = _cusum_upper_batch(k, h, sgn * mu, tau, 60)
            rate = rate + 1.0 / ((a2 * w1 * w1 - a1 * w2 * w2) / (w1 * w1 - w2 * w2))
        return rate
    if key == "ewma":
        lam, L = float(p["lam"]), float(p["L"])
        c = L * math.sqrt(lam / (2.0 - lam))  # exact-limit EWMAs are approximated by their asymptotic limits here
        a1, w1 = _ewma_batch(lam, c, mu, tau, 31)
        a2, w2 = _ewma_batch(lam, c, mu, tau, 93)
        return 1.0 / ((a2 * w1 * w1 - a1 * w2 * w2) / (w1 * w1 - w2 * w2))
    c = float(p["limit"])
    return ndtr((-c - mu) / tau) + ndtr((mu - c) / tau)


def _bootstrap_errors(n: int, n_boot: int, seed: int, sigma_method: str) -> tuple[np.ndarray, np.ndarray]:
    """(e, r) of ``n_boot`` parametric-bootstrap baselines of ``n`` N(0,1) readings."""
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 8013, int(n)]))
    base = rng.standard_normal((n_boot, n))
    e = base.mean(axis=1)
    if sigma_method == "moving_range":
        r = np.abs(np.diff(base, axis=1)).mean(axis=1) / 1.128
    elif sigma_method == "sd":
        r = base.std(axis=1, ddof=1)
    else:
        raise ValueError(f"sigma_method must be 'moving_range' or 'sd', got {sigma_method!r}")
    return e, r


@single_blas_thread
def estimated_baseline_inflation(
    detector: tuple[str, dict[str, Any]], baseline_n: int, *, n_boot: int = 1000, seed: int = 0, sigma_method: str = "sd"
) -> dict[str, float]:
    """How much an estimated baseline of ``baseline_n`` readings inflates one chain detector's
    false-alarm rate: mean and quantiles of ``rate(estimated) / rate(known)``, and the
    probability that the conditional ARL0 is below the nominal one.

    >>> out = estimated_baseline_inflation(("cusum", {"k": 0.5, "h": 5.0}), 50, n_boot=200)
    >>> 1.8 < out["mean_ratio"] < 3.2
    True
    """
    key, p = detector
    e, r = _bootstrap_errors(int(baseline_n), int(n_boot), seed, sigma_method)
    nominal = 1.0 / _chain_arl(key, p)
    ratio = _conditional_rate(key, p, e, r) / nominal
    return {
        "mean_ratio": float(ratio.mean()),
        "mean_ratio_se": float(ratio.std(ddof=1) / math.sqrt(ratio.size)),
        "median_ratio": float(np.median(ratio)),
        "q90_ratio": float(np.quantile(ratio, 0.9)),
        "p_arl0_below_nominal": float(np.mean(ratio > 1.0)),
        "n_boot": int(n_boot),
    }


# ------------------------------------------------------------- calibration


def _weights(items: list[tuple[str, str, dict[str, Any]]], weights: dict[str, float] | None) -> dict[str, float]:
    user = weights or {}
    mean_default = sum(DEFAULT_WEIGHTS.values()) / len(DEFAULT_WEIGHTS)
    raw = {}
    for label, key, _ in items:
        v = user.get(label, user.get(key, DEFAULT_WEIGHTS.get(key, mean_default)))
        if not (v > 0 and math.isfinite(v)):
            raise ValueError(f"weight of {label!r} must be a positive number, got {v!r}")
        raw[label] = float(v)
    tot = sum(raw.values())
    return {k: v / tot for k, v in raw.items()}


def _rate_table(key: str, params: dict[str, Any], readings: int | None) -> dict[str, Any] | None:
    """The shipped simulated rates of a windowed test (rules.window_rates), where they apply."""
    default_side = all(params.get(name, "both") == "both" for name in ("side", "direction"))
    if readings is not None or not default_side:
        return None
    try:
        from rules.window_rates import TABLE
    except ImportError:  # pragma: no cover
        return None
    return TABLE.get(f"{key}/{DETECTORS[key](**params).window}")


def _window_rate(key: str, params: dict[str, Any], seed: int, readings: int | None) -> dict[str, Any]:
    """False-signal rate of a windowed test at the alpha the user set (restarts included)."""
    alpha = float(DETECTORS[key](**params).alpha)
    table = _rate_table(key, params, readings)
    if table is not None and table["alpha"] and alpha <= table["alpha"][-1]:
        # the rate is a step function of alpha: the count at the largest tabulated alpha not above it
        below = [i for i, a in enumerate(table["alpha"]) if a <= alpha]
        K = table["signals"][below[-1]] if below else 0
        N = table["readings"]
        source = f"threshold set by the user: kept; rate from table rules.window_rates ({N} simulated readings)"
    else:
        null = WindowNull(key, params, readings or 400_000, 20, seed)
        K, N = null.count(alpha), null.n_readings
        source = f"threshold set by the user: kept; rate by seeded simulation ({N} readings, seed {seed})"
    return {"alpha": alpha, "rate": K / N, "rate_se": math.sqrt(max(K, 1)) / N, "signals": int(K), "readings": int(N), "source": source}


def _window_calibration(key: str, params: dict[str, Any], share_rate: float, seed: int, readings: int | None) -> dict[str, Any]:
    det = DETECTORS[key](**params)
    table = _rate_table(key, params, readings)
    if table is not None and share_rate * table["readings"] >= 5:
        N = table["readings"]
        alphas = table["alpha"]
        sigs = table["signals"]
        ok = [i for i, k in enumerate(sigs) if k <= share_rate * N]
        if ok:
            i = ok[-1]
            alpha, K = alphas[i], sigs[i]
        else:
            alpha, K = alphas[0] * 0.5, 0
        source = f"table rules.window_rates ({N} simulated readings)"
    else:
        N = readings or int(min(max(300.0 / share_rate, 2e5), WINDOW_SIM_READINGS))
        null = WindowNull(key, {**params, "alpha": min(0.01, det.alpha)}, N, 20, seed)
        alpha, K = null.alpha_for_rate(share_rate)
        N = null.n_readings
        if alpha == 0.0:
            alpha = float(null.candidates()[0]) * 0.5 if null.candidates().size else 1e-9
        source = f"seeded simulation at calibration time ({N} readings, seed {seed})"
    alpha = float(min(alpha, 0.49))
    return {"alpha": alpha, "rate": K / N, "rate_se": math.sqrt(max(K, 1)) / N, "signals": int(K), "readings": int(N), "source": source}


@single_blas_thread
def calibrate(
    detector_set: Sequence,
    arl0_target: float,
    baseline_n: int | None = None,
    seed: int = 0,
    *,
    weights: dict[str, float] | None = None,
    guarantee: float = 0.9,
    n_boot: int = 200,
    sigma_method: str = "moving_range",
    window_readings: int | None = None,
    verify_streams: int = 0,
    keep: Sequence[str] = (),
) -> dict[str, Any]:
    """Set every threshold of ``detector_set`` so that the set's false-finding rate is ``1/arl0_target``.

    ``detector_set``: ``[(key, params), ...]``.  ``baseline_n``: size of the
    estimated baseline (None = parameters treated as known); with it the
    chain-calibrated thresholds get the Gandy & Kvaloy bootstrap adjustment so the
    budget holds with probability ``guarantee`` given the baseline.
    ``window_readings`` forces an on-the-fly simulation of that size for the
    windowed tests instead of the shipped table.  ``verify_streams`` > 0 runs the
    calibrated set (the detectors' own ``scan``) on that many seeded in-control
    streams of ``20 * arl0_target / verify_streams`` readings each (so about 20
    false findings expected in total per stream group... see ``report["verify"]``).
    ``keep``: labels (or keys) whose threshold (:data:`THRESHOLDS`) was set by the
    user: their parameters are kept, their rate is computed (chain detectors
    exactly, windowed tests by simulation) and the rest of the budget is shared by
    the others.

    Returns a JSON-able dict: ``params`` (label -> params), ``detector_set``
    (``[[key, params], ...]``), ``arl0_target``, ``key`` (:func:`config_key`) and
    ``report`` with ``split``, ``per_detector`` (ARL0, rate, SE, method), ``set``
    (rate, SE, ARL0), ``baseline`` (the adjustment, or None) and ``warnings``.
    Deterministic for a given ``seed``.
    """
    if not (arl0_target > 1 and math.isfinite(arl0_target)):
        raise ValueError(f"arl0_target must be a number above 1, got {arl0_target!r}")
    if not 0.5 <= guarantee < 1:
        raise ValueError(f"guarantee must be in [0.5, 1), got {guarantee!r}")
    items = normalise_set(detector_set)
    for _, key, _ in items:
        if key not in DETECTORS and key not in CHAIN_KEYS:
            raise ValueError(f"unknown detector key {key!r}; registered: {sorted(DETECTORS)}")
    split = _weights(items, weights)
    kept = {label for label, key, _ in items if label in keep or key in keep}
    # user-set chain detectors, with their class defaults filled in for the chains
    kept_chain = {label: (key, _chain_defaults(key, params)) for label, key, params in items
                  if key in CHAIN_KEYS and label in kept}
    target = 1.0 / float(arl0_target)
    warnings: list[str] = []
    per: dict[str, dict[str, Any]] = {}
    params_out: dict[str, dict[str, Any]] = {}

    # 1. windowed tests and fixed detectors
    fixed_rate, fixed_var = 0.0, 0.0
    few: list[str] = []  # windowed tests whose rate rests on fewer than 20 simulated signals
    for label, key, params in items:
        if label in kept_chain:
            rate = 1.0 / _chain_arl(*kept_chain[label])
            params_out[label] = dict(params)
            per[label] = {"arl0": 1.0 / rate, "rate": rate, "rate_se": 0.0, "share_target": split[label],
                          "method": "threshold set by the user: kept; ARL0 from its exact chain"}
            fixed_rate += rate
        elif key in WINDOW_KEYS:
            if label in kept:
                c = _window_rate(key, params, seed, window_readings)
            else:
                c = _window_calibration(key, params, split[label] * target, seed, window_readings)
            params_out[label] = {**params, "alpha": c["alpha"]}
            rate = c["rate"]
            per[label] = {
                "arl0": math.inf if rate == 0 else 1.0 / rate,
                "rate": rate,
                "rate_se": c["rate_se"],
                "share_target": split[label],
                "method": c["source"],
                "signals": c["signals"],
            }
            if c["signals"] < 20:
                few.append(f"{label} {c['signals']}")
            fixed_rate += rate
            fixed_var += c["rate_se"] ** 2
        elif key not in CHAIN_KEYS:
            # Signals per reading over a bounded stretch (restarts included): a detector far rarer
            # than the budget costs a bounded simulation and a rate known to be small, not hours.
            n_read = int(min(max(20.0 * arl0_target, 20_000), UNTUNABLE_READINGS))
            sim = simulate_false_finding_rate([(key, params)], n_streams=20, n_readings=n_read // 20, seed=seed)
            rate = sim.signals / sim.readings
            se = math.sqrt(max(sim.signals, 1)) / sim.readings
            params_out[label] = dict(params)
            why = "threshold set by the user" if label in kept else "not tunable here"
            per[label] = {
                "arl0": math.inf if rate == 0 else 1.0 / rate,
                "rate": rate,
                "rate_se": se,
                "share_target": split[label],
                "method": f"{why}: parameters kept, rate by seeded simulation ({sim.readings} readings)",
            }
            fixed_rate += rate
            fixed_var += se * se
    if few:
        warnings.append(
            "the rates of the windowed tests rest on few simulated false signals (" + ", ".join(few) + "): "
            "each stays within its share of the budget as far as the simulation can tell, but is known only roughly"
        )
    chain = [(label, key, params) for label, key, params in items if key in CHAIN_KEYS and label not in kept]
    left = target - fixed_rate
    if chain and left <= 0.02 * target:
        raise ValueError(
            f"the windowed, fixed and user-set detectors use {fixed_rate / target:.0%} of the budget "
            f"(rate {fixed_rate:.3g} per reading against {target:.3g}); lower their weights, alpha or thresholds"
        )
    if not chain and fixed_rate > target * 1.0001:
        warnings.append(f"the set's rate {fixed_rate:.3g} exceeds the budget {target:.3g} (no chain detector to absorb it)")

    # 2. chain detectors share what is left
    wsum = sum(split[label] for label, _, _ in chain)
    nominal_arl = {label: wsum / (split[label] * left) for label, _, _ in chain}
    for label, key, params in chain:
        p = _chain_params(key, params, nominal_arl[label])
        params_out[label] = p
        per[label] = {
            "arl0": nominal_arl[label],
            "rate": 1.0 / nominal_arl[label],
            "rate_se": 0.0,
            "share_target": split[label],
            "method": "exact chain (Brook & Evans 1972 / Lucas & Saccucci 1990 / normal tail)",
        }

    # 3. estimated baseline: Gandy & Kvaloy bootstrap adjustment of the chain thresholds
    baseline_report = None
    if baseline_n is not None:
        n = int(baseline_n)
        if n < MIN_BASELINE_N:
            warnings.append(f"baseline of {n} readings is below the minimum of {MIN_BASELINE_N}; the budget cannot be trusted")
        n = max(n, 3)
        e, r = _bootstrap_errors(n, int(n_boot), seed, sigma_method)
        # The user-set chain detectors' rates given the baseline, in place of their nominal rates.
        fixed_cond = np.full(e.size, fixed_rate)
        for key, p in kept_chain.values():
            fixed_cond += _conditional_rate(key, p, e, r) - 1.0 / _chain_arl(key, p)
        # Conditional rates on a grid of g (thresholds for g x nominal ARL0), interpolated in
        # log-log between grid points, then solved for the guarantee quantile.
        grid = np.geomspace(1.0, G_MAX, 13)
        logs = np.zeros((grid.size, e.size))
        for label, key, params in chain:
            for gi, gv in enumerate(grid):
                p = _chain_params(key, params, nominal_arl[label] * gv, fast=True)
                logs[gi] += _conditional_rate(key, p, e, r)
        logs = np.log(logs + fixed_cond[None, :])

        def q_of(g: float) -> float:
            lg = math.log(g) / math.log(G_MAX) * (grid.size - 1)
            i = min(int(lg), grid.size - 2)
            f = lg - i
            rates = np.exp((1.0 - f) * logs[i] + f * logs[i + 1])
            return float(np.quantile(rates, guarantee))

        rates1 = np.exp(logs[0])
        reached = True
        if not chain or q_of(1.0) <= target:
            g = 1.0
        elif q_of(G_MAX) > target:
            g, reached = G_MAX, False
        else:
            g_lo, g_hi = 1.0, G_MAX
            while g_hi / g_lo > 1.002:
                mid = math.sqrt(g_lo * g_hi)
                if q_of(mid) > target:
                    g_lo = mid
                else:
                    g_hi = mid
            g = g_hi
        rates_g = fixed_cond.copy()
        ps = {}
        for label, key, params in chain:
            ps[label] = _chain_params(key, params, nominal_arl[label] * g)
            rates_g = rates_g + _conditional_rate(key, ps[label], e, r)
        known = {label: dict(params_out[label]) for label, _, _ in chain}
        if chain:
            params_out.update(ps)
            for label, key, _ in chain:
                per[label]["arl0_known_parameters"] = per[label]["arl0"]
                per[label]["arl0"] = nominal_arl[label] * g
                per[label]["rate"] = 1.0 / per[label]["arl0"]
                per[label]["method"] += "; thresholds raised by the Gandy & Kvaloy bootstrap adjustment"
        baseline_report = {
            "n": int(baseline_n),
            "sigma_method": sigma_method,
            "method": "Gandy & Kvaloy (2013) parametric bootstrap, percentile form, set-level rate",
            "guarantee": guarantee,
            "n_boot": int(n_boot),
            "arl0_inflation_g": g,
            "known_parameter_thresholds": known if chain else {},
            "unadjusted_mean_rate_ratio": float(rates1.mean() / target),
            "unadjusted_p_budget_met": float(np.mean(rates1 <= target)),
            "adjusted_mean_rate_ratio": float(rates_g.mean() / target),
            "adjusted_p_budget_met": float(np.mean(rates_g <= target * (1 + 1e-9))),
        }
        if not reached:
            warnings.append(
                f"baseline of {n} readings is too short: even thresholds set for {G_MAX:g} times the nominal ARL0 "
                f"do not meet the budget with probability {guarantee}"
            )
        elif g > INFLATION_WARN:
            warnings.append(
                f"baseline of {n} readings is too short for the budget at full power: to hold it with probability "
                f"{guarantee} the shift thresholds are set for {g:.1f} times their nominal ARL0; a longer baseline "
                "(the error of sigma falls as 1/sqrt(n)) restores the detection speed"
            )

    # 4. the set
    set_rate = sum(v["rate"] for v in per.values())
    set_se = math.sqrt(fixed_var)
    report: dict[str, Any] = {
        "method": "rate split: windowed tests at the largest alpha within their share, chain thresholds take the rest",
        "split": split,
        "per_detector": per,
        "set": {
            "rate": set_rate,
            "rate_se": set_se,
            "arl0": math.inf if set_rate == 0 else 1.0 / set_rate,
            "arl0_se": set_se / set_rate**2 if set_rate else math.inf,
        },
        "baseline": baseline_report,
        "warnings": warnings,
        "seed": int(seed),
    }
    out = {
        "arl0_target": float(arl0_target),
        "params": params_out,
        "detector_set": [[key, params_out[label]] for label, key, _ in items],
        "report": report,
        "key": calibration_key(
            detector_set, arl0_target, baseline_n, seed, weights=weights, guarantee=guarantee, n_boot=n_boot,
            sigma_method=sigma_method, window_readings=window_readings, verify_streams=verify_streams, keep=keep,
        ),
    }
    if verify_streams:
        per_stream = int(math.ceil(20.0 * arl0_target))
        v = simulate_false_finding_rate(out["detector_set"], n_streams=int(verify_streams), n_readings=per_stream, seed=seed + 7)
        report["verify"] = {**v.to_dict(), "target_rate": target, "ratio": v.rate / target}
    return _jsonable(out)


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, float) and not math.isfinite(obj):
        return None if math.isnan(obj) else ("inf" if obj > 0 else "-inf")
    return obj
