"""The demo end to end: the simulated line, the real daemon on real files, the digest, the summary.

Behaviour checks of our own scenario (invented data, no published values apply):
every injected cause is caught, nothing is found while the line is in control, and
the live daemon finds exactly what the same detectors find when fed the same readings
directly (every reading read once, in order, whatever the batching).
"""

from __future__ import annotations

import argparse
import io
import json
from html.parser import HTMLParser

import numpy as np
import pytest

from watcher import demo
from watcher.config import load_config
from watcher.line_sim import simulate
from watcher.monitor import Monitor

SPEED = 4.0  # a shift in about 5 s


def test_simulated_line_is_seeded_and_places_its_causes():
    a, b = simulate(7), simulate(7)
    assert np.array_equal(a.pack, b.pack) and np.array_equal(a.pin, b.pin)
    assert not np.array_equal(simulate(8).pack, a.pack)
    causes = {c.key: c for c in a.causes}
    assert set(causes) == {"material_change", "filling_heads", "double_drop", "tool_wear"}
    base = simulate(7)
    # the injected effects, measured on the data against the in-control stretch
    ic = a.pack[: a.in_control_until("pack_mass")]
    mc = causes["material_change"]
    assert a.pack[mc.first: mc.last + 1].mean() - ic.mean() == pytest.approx(1.8, abs=0.3)
    fh = causes["filling_heads"]
    seg = a.pack[fh.first: fh.last + 1]
    heads = np.array(a.heads[fh.first: fh.last + 1])
    assert seg[heads == "B"].mean() - seg[heads == "A"].mean() == pytest.approx(3.0, abs=0.4)
    dd = causes["double_drop"]
    assert a.pack[dd.first] - ic.mean() > 6 * 1.2
    tw = causes["tool_wear"]
    assert tw.characteristic == "pin_diameter"
    slope = np.polyfit(a.pin_s[tw.first: tw.last + 1] / 3600, a.pin[tw.first: tw.last + 1], 1)[0]
    assert slope == pytest.approx(0.004, rel=0.15)
    assert base.in_control_until("pin_diameter") == tw.first >= 300  # enough for the 100-reading baseline


def _finding(c, p, i, pv=1e-6):
    return {"characteristic": c, "pattern": p, "index": i, "p_value": pv, "detector": "x"}


def test_summary_attributes_findings_to_causes():
    sim = simulate()
    mc = next(c for c in sim.causes if c.key == "material_change")
    fs = [
        _finding("pack_mass", "shift", 100, 1e-4),  # before any cause: false
        _finding("pack_mass", "shift", mc.first + 9, 2e-5),
        _finding("pack_mass", "shift", mc.first + 30, 3e-9),
        _finding("pack_mass", "mixture", mc.first + 3),  # wrong pattern for this cause: not counted as catching it
    ]
    s = demo.summarise(fs, sim, grace={"pack_mass": 100, "pin_diameter": 60})
    r = {c.key: c for c in s.causes}
    assert r["material_change"].caught and r["material_change"].readings_to_catch == 10
    assert r["material_change"].p_value == 3e-9 and r["material_change"].findings == 2
    assert not r["tool_wear"].caught and not r["filling_heads"].caught
    assert [f["index"] for f in s.false_in_control] == [100]
    assert not s.all_caught


def _offline_findings(cfg, sim):
    from watcher.calibration import Calibrator

    out = []
    for cc, vals, secs in ((cfg.characteristics[0], sim.pack, sim.pack_s), (cfg.characteristics[1], sim.pin, sim.pin_s)):
        m = Monitor(cc, cc.source, calibrator=Calibrator.for_config(cfg))
        for v in vals:
            # the files carry values rounded as the gauges write them
            v = round(float(v), 2) if cc.name == "pack_mass" else round(float(v), 5)
            out += [(f.characteristic, f.pattern, f.index, f.detector) for f in m.feed(v, None)]
    return sorted(out)


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs = 0

    def handle_starttag(self, tag, attrs):
        self.imgs += tag == "img"


def test_demo_end_to_end(tmp_path):
    out = io.StringIO()
    summary, html_path, wall = demo.run(tmp_path / "run", speed=SPEED, out=out)
    text = out.getvalue()
    # every injected cause caught, nothing found while in control
    assert summary.all_caught, [c for c in summary.causes if not c.caught]
    assert summary.false_in_control == []
    by = {c.key: c for c in summary.causes}
    assert by["double_drop"].readings_to_catch == 1
    assert all(c.p_value is not None and c.p_value < 1e-4 for c in summary.causes)
    # alerts printed as they happened
    assert "== pack_mass:" in text and "== pin_diameter:" in text
    # the daemon read every reading once, in order: the same findings as the detectors fed directly
    cfg = load_config(tmp_path / "run" / "linewatch-demo.yaml")
    from watcher.store import Store

    st = Store(cfg.state_dir)
    live = sorted((f["characteristic"], f["pattern"], f["index"], f["detector"]) for f in st.findings())
    counts = dict(st.conn.execute("SELECT characteristic, readings FROM characteristic_state").fetchall())
    q = st.conn.execute("SELECT reason FROM quarantine").fetchall()
    st.close()
    assert counts == {"pack_mass": 2880, "pin_diameter": 960}
    assert live == _offline_findings(cfg, simulate())
    assert len(q) == 1 and "ERR" in q[0][0]
    # the digest: episodes of both characteristics, charts, and the bad line under source health
    d = json.loads(html_path.with_suffix(".json").read_text())
    assert {c["name"] for c in d["characteristics"] if c["episodes"]} == {"pack_mass", "pin_diameter"}
    assert d["health"]["quarantine_total"] == 1
    p = _Tags()
    p.feed(html_path.read_text())
    assert p.imgs == 2
    # the one-screen summary
    screen = demo.format_summary(summary, html_path, wall)
    assert screen.count("caught ") == 4 and "MISSED" not in screen
    assert "no false findings while the line was in control" in screen
    assert len(screen.splitlines()) <= 24


def test_command_options(tmp_path, capsys):
    assert demo.run_demo(argparse.Namespace(keep=None, speed=0.0, seed=1)) == 2
    (tmp_path / "x").mkdir()
    (tmp_path / "x" / "f").write_text("")
    assert demo.run_demo(argparse.Namespace(keep=str(tmp_path / "x"), speed=1.0, seed=1)) == 2
    assert "not empty" in capsys.readouterr().err
