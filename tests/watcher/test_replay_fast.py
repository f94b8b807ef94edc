"""The fast replay (watcher/replay_fast.py) against the live route, line for line.

The reference here is the live path itself (``replay_file(..., engine="live")``: every
line through ``LineParser``, ``Route.take`` and ``Monitor.feed``), which the daemon uses.
The property test builds random CSV streams -- in control, with a step shift, a linear
drift, coarse rounding (many tied readings) and malformed lines of many kinds -- and
asserts that both paths give the same findings (full ``Finding`` dicts, same order) and
the same quarantined lines (same reasons, line numbers and offsets).  Small chunks and
blocks make the chunk and block boundaries fall everywhere.
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from watcher.calibration import AsConfigured
from watcher.config import BaselineConfig, CharacteristicConfig, SourceConfig, default_config
from watcher.monitor import Monitor
from watcher.replay import replay_file
from watcher.replay_fast import SeriesScan, replay_file_fast

# Lines the live parser quarantines, skips or reads in its own way; {t} is a valid time.
ODD_LINES = [
    "{t},jammed,1.0",  # text in a value
    "{t},1.0",  # too few fields
    "{t},1.0,2.0,3.0",  # too many fields
    "",  # blank
    "   ",  # blank with spaces
    "not-a-time,500.0,1.0",  # unparseable time
    "{t},inf,1.0",  # not finite
    "{t},nan,1.0",
    "{t},1e400,1.0",  # overflows to infinity
    "{t}, 500.25 ,1.0",  # spaces around a number: LineParser strips them
    '{t},"500.5",1.0',  # quoted field
    "{t},5_00.5,1.0",  # Python's float reads underscores
    "{t},,",  # no value at all
    "{t},,2.5",  # one empty cell
    "time,mass,lane",  # the header again (files concatenated)
    "{t},--1,1.0",  # looks numeric byte-wise, is not
    "{t},+.5e1,1.0",
    "{t},1.0,2.0\r",  # a carriage return
    "{t},\xe9t\xe9,1.0",  # non-ASCII text
    "{t},50\x001,1.0",  # a NUL byte
    "\ufefftime,mass,lane",  # a byte order mark
]
NEW_HEADER = "lane,time,mass"  # columns reordered mid-file


def _times(kind: str, n: int) -> list[str]:
    base = 1767337200
    if kind == "epoch":
        return [str(base + 2 * i) for i in range(n)]
    if kind == "epoch-fraction":  # sub-second epochs, some on a half microsecond
        return [repr(base + 1.7 * i + (i % 7) * 5e-7) for i in range(n)]
    if kind == "iso-space":
        return [f"2026-01-02 {(i // 3600) % 24:02d}:{(i // 60) % 60:02d}:{i % 60:02d}" for i in range(n)]
    return [f"2026-01-02T{(i // 3600) % 24:02d}:{(i // 60) % 60:02d}:{i % 60:02d}Z" for i in range(n)]


@st.composite
def streams(draw):
    n = draw(st.integers(60, 700))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    shape = draw(st.sampled_from(["normal", "skewed"]))
    x = rng.lognormal(0, 0.6, n) + 5 if shape == "skewed" else 500 + rng.normal(0, 1, n)
    if draw(st.booleans()):  # a step shift
        at = draw(st.integers(0, n - 1))
        x[at:] += draw(st.floats(-4, 4))
    if draw(st.booleans()):  # a drift
        at = draw(st.integers(0, n - 1))
        x[at:] += draw(st.floats(-0.05, 0.05)) * np.arange(n - at)
    step = draw(st.sampled_from([0.001, 0.1, 0.5, 1.0]))  # coarse steps give many ties
    x = np.round(x / step) * step
    lane = 1.0 + (np.arange(n) % 2) if draw(st.booleans()) else np.round(rng.normal(3, 1, n), 1)
    time_kind = draw(st.sampled_from(["iso", "epoch", "epoch-fraction", "iso-space", "none"]))
    times = _times(time_kind, n)
    odd = draw(st.lists(st.tuples(st.integers(0, n), st.sampled_from(range(len(ODD_LINES)))), max_size=25))
    header_change = draw(st.one_of(st.none(), st.integers(1, n)))
    crlf = draw(st.booleans())
    final_newline = draw(st.booleans())
    return dict(x=x, lane=lane, times=times, time_kind=time_kind, odd=odd, header_change=header_change,
                crlf=crlf, final_newline=final_newline, step=step)


def _write(p: Path, s: dict) -> None:
    timed = s["time_kind"] != "none"
    odd: dict[int, list[str]] = {}
    for at, k in s["odd"]:
        odd.setdefault(at, []).append(ODD_LINES[k])
    out = ["time,mass,lane" if timed else "mass,lane"]
    reordered = False
    for i, (v, lane) in enumerate(zip(s["x"], s["lane"])):
        t = s["times"][i]
        for line in odd.get(i, []):
            out.append(line.format(t=t) if timed else line.replace("{t},", ""))
        if s["header_change"] == i and timed:
            out.append(NEW_HEADER)
            reordered = True
        vals = f"{v:.6g},{lane:g}"
        if reordered:
            out.append(f"{lane:g},{t},{v:.6g}")
        else:
            out.append(f"{t},{vals}" if timed else vals)
    nl = "\r\n" if s["crlf"] else "\n"
    text = nl.join(out) + (nl if s["final_newline"] else "")
    p.write_bytes(text.encode("utf-8", errors="surrogateescape"))


def _config(timed: bool, window: int, skewed_limits: tuple[float, float] | None):
    src = SourceConfig(name="line", path="x.csv", time_column="time" if timed else None)
    lsl, usl = skewed_limits or (None, None)
    chars = [
        CharacteristicConfig(name="mass", source="line", column="mass", window=window, lsl=lsl, usl=usl,
                             baseline=BaselineConfig(readings=40)),
        # every registered detector, on the lane column, a fixed baseline
        CharacteristicConfig(name="lane", source="line", column="lane", window=window,
                             baseline=BaselineConfig(mean=2.0, sigma=0.8),
                             detectors={k: ({"window": 30} if k == "pettitt" else {}) for k in _all_keys()}),
    ]
    return replace(default_config(), sources=[src], characteristics=chars), src


def _all_keys() -> list[str]:
    from rules import DETECTORS

    return sorted(DETECTORS)


def _same(a, b) -> None:
    fa = [f.to_dict() for f in a.findings]
    fb = [f.to_dict() for f in b.findings]
    assert len(fa) == len(fb)
    for i, (u, v) in enumerate(zip(fa, fb)):
        assert u == v, f"finding {i} differs"
    assert a.batch.quarantined == b.batch.quarantined
    assert (a.lines, a.batch.readings, a.batch.per_file, a.batch.touched) == (
        b.lines, b.batch.readings, b.batch.per_file, b.batch.touched)
    assert a.bad_by_reason == b.bad_by_reason


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(s=streams(), window=st.sampled_from([10, 12, 20]), chunk=st.sampled_from([1, 7, 64, 1 << 16]),
       block=st.sampled_from([64, 1000, 1 << 20]), limits=st.booleans())
def test_fast_replay_equals_live(tmp_path_factory, s, window, chunk, block, limits):
    p = tmp_path_factory.mktemp("fast") / "line.csv"
    _write(p, s)
    mid = float(np.median(s["x"]))
    cfg, src = _config(s["time_kind"] != "none", window, (mid - 2.5, mid + 2.5) if limits else None)
    # Thresholds as configured (class defaults): frequent signals test the engines harder than
    # calibrated ones would; tests/watcher/test_calibration.py compares them calibrated.
    live = replay_file(p, cfg, src, warn=None, engine="live", calibrator=AsConfigured())
    fast = replay_file_fast(p, cfg, src, warn=None, block_bytes=block, chunk=chunk, calibrator=AsConfigured())
    _same(live, fast)
    # handed over as they become final (flat memory): the same findings in the same order
    streamed = []
    rest = replay_file_fast(p, cfg, src, warn=None, block_bytes=block, chunk=chunk, calibrator=AsConfigured(),
                            on_finding=streamed.append)
    assert rest.findings == []
    assert [f.to_dict() for f in streamed] == [f.to_dict() for f in live.findings]


def test_epoch_times_in_bulk_read_as_the_live_parser_reads_them():
    # reference: parse_time, i.e. CPython's datetime.fromtimestamp(..., utc).isoformat()
    from watcher.parse import parse_time
    from watcher.replay_fast import _epoch_iso

    rng = np.random.default_rng(5)
    x = np.concatenate([rng.integers(0, 4_000_000_000, 3000).astype(float), rng.uniform(0, 4e9, 3000),
                        [0.0, 0.9999995, 1.0000005, 2.5e-6, 1767337200.9999996, 253402300799.0]])  # fmt: skip
    fields = np.array([repr(float(v)) for v in x] + ["1767337200"]).astype("S")
    want = [parse_time(b.decode()) for b in fields.tolist()]
    assert _epoch_iso(fields).tolist() == want
    # anything else goes line by line
    for odd in (b"2026-01-02T07:00:00Z", b"-5", b"nan", b"inf", b"1e300"):
        assert _epoch_iso(np.array([b"1767337200", odd])) is None


def test_a_known_stream_has_findings_and_bad_lines(tmp_path):
    """Guards the property test against comparing two empty results."""
    rng = np.random.default_rng(3)
    x = 500 + rng.normal(0, 1, 600)
    x[300:] += 3
    s = dict(x=x, lane=1.0 + np.arange(600) % 2, times=_times("iso", 600), time_kind="iso",
             odd=[(100, 0), (200, 1), (250, 5), (400, 14)], header_change=500, crlf=False, final_newline=True,
             step=0.001)
    p = tmp_path / "line.csv"
    _write(p, s)
    cfg, src = _config(True, 20, None)
    live = replay_file(p, cfg, src, warn=None, engine="live", calibrator=AsConfigured())
    fast = replay_file(p, cfg, src, warn=None, calibrator=AsConfigured())  # the default engine is the fast one
    _same(live, fast)
    shifts = [f for f in fast.findings if f.characteristic == "mass" and f.pattern == "shift"]
    assert shifts and min(f.index for f in shifts) >= 300
    assert [q.line_no for q in fast.batch.quarantined][:3] == [102, 203, 254]  # odd lines before push the line numbers on
    assert {f.characteristic for f in fast.findings} == {"mass", "lane"}


def test_jsonl_fast_equals_live(tmp_path):
    rng = np.random.default_rng(8)
    x = 8.0 + 0.002 * rng.normal(size=500) + np.r_[np.zeros(250), np.linspace(0, 0.02, 250)]
    lines = [json.dumps({"t": 1767337200 + 15 * i, "d": round(v, 5)}) for i, v in enumerate(x)]
    lines[40] = '{"t": 1767337800, "d": "worn"}'
    lines[41] = "{broken"
    p = tmp_path / "pins.jsonl"
    p.write_text("\n".join(lines) + "\n")
    src = SourceConfig(name="lathe", path=str(p), format="jsonl", time_column="t")
    cc = CharacteristicConfig(name="d", source="lathe", column="d", window=30, baseline=BaselineConfig(readings=50))
    cfg = replace(default_config(), sources=[src], characteristics=[cc])
    live = replay_file(p, cfg, src, warn=None, engine="live", calibrator=AsConfigured())
    fast = replay_file_fast(p, cfg, src, warn=None, block_bytes=700, chunk=33, calibrator=AsConfigured())
    _same(live, fast)
    assert any(f.pattern == "drift" for f in fast.findings)
    assert len(fast.batch.quarantined) == 2


@pytest.mark.parametrize("chunk", [1, 50, 997, 1 << 16])
def test_chunked_scan_equals_scan_all(chunk):
    """The chunked driver against Monitor.scan_all (the whole series at once)."""
    rng = np.random.default_rng(11)
    x = 10 + rng.normal(0, 1, 3000) + np.r_[np.zeros(2000), np.full(1000, 0.7)]
    cc = CharacteristicConfig(name="c", source="s", column="c", window=25, usl=13.0,
                              baseline=BaselineConfig(readings=40))
    times = np.array([f"t{i}" for i in range(x.size)], dtype=object)
    whole = Monitor(cc, "s").scan_all(x, list(times))
    sc = SeriesScan(Monitor(cc, "s"), chunk=chunk)
    for a in range(0, x.size, 613):
        sc.add(x[a:a + 613], times[a:a + 613], np.arange(a, min(a + 613, x.size)))
    got = [f for _, _, f in sc.finish()]
    assert len(whole) > 20
    assert [f.to_dict() for f in got] == [f.to_dict() for f in whole]


def test_history_kept_stays_bounded_on_a_long_quiet_series():
    """Flat memory: on an in-control series no detector holds on to the readings since its start.

    CUSUM and EWMA are carried from chunk to chunk, the windowed tests keep a window, so what
    is kept is bounded by the findings' look-back (``Monitor.keep``) plus one chunk."""
    rng = np.random.default_rng(5)
    n, chunk = 60_000, 2_000
    x = 10 + rng.normal(0, 1, n)
    cc = CharacteristicConfig(name="c", source="s", column="c", window=25, baseline=BaselineConfig(readings=100))
    m = Monitor(cc, "s", calibrator=AsConfigured())
    sc = SeriesScan(m, chunk=chunk)
    times = np.full(n, None, dtype=object)
    kept = []
    for a in range(0, n, chunk):
        sc.add(x[a:a + chunk], times[a:a + chunk], np.arange(a, a + chunk))
        kept.append(max(len(sc.hist.values), *(len(v) for v in sc.fed.values())))
    assert {tr.kind for tr in sc.tracks} >= {"carried", "windowed", "memoryless"}
    assert max(kept) <= m.keep + chunk < n // 4


def test_unusable_paths(tmp_path):
    from watcher.replay import UnusableInput

    cfg, src = _config(True, 20, None)
    with pytest.raises(UnusableInput, match="no such file"):
        replay_file_fast(tmp_path / "missing.csv", cfg, src, warn=None)
    with pytest.raises(UnusableInput, match="folder"):
        replay_file_fast(tmp_path, cfg, src, warn=None)
    with pytest.raises(ValueError, match="engine"):
        replay_file(tmp_path / "x.csv", cfg, src, warn=None, engine="quick")


def test_findings_are_handed_over_while_the_file_is_still_being_read(tmp_path):
    """Flat memory: with on_finding, a finding early in a long file arrives before the last block is read."""
    rng = np.random.default_rng(3)
    x = 10 + rng.normal(0, 1, 20_000)
    x[300:] += 2.0  # a step early in the file
    p = tmp_path / "long.csv"
    p.write_text("mass\n" + "".join(f"{v:.4f}\n" for v in x))
    cc = CharacteristicConfig(name="mass", source="line", column="mass", window=20, baseline=BaselineConfig(readings=100))
    cfg = replace(default_config(), sources=[SourceConfig(name="line", path=str(p))], characteristics=[cc])
    events = []
    rest = replay_file_fast(p, cfg, cfg.sources[0], warn=None, block_bytes=4096, chunk=1000,
                            progress=lambda n: events.append("block"),
                            on_finding=lambda f: events.append(f.index))
    first = next(j for j, e in enumerate(events) if e != "block")
    assert rest.findings == [] and "block" in events[first:]  # not all held back to the end
    found = [e for e in events if e != "block"]
    assert found == sorted(found) and found[0] >= 300
