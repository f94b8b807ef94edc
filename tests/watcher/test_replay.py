"""``linewatch replay``: the JSON contract, the table, bad lines, exit codes, the SQLite log."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from watcher.records import FINDING_KEYS

PATTERNS = {"shift", "drift", "grouping", "mixture", "sawtooth", "spike", "out_of_spec"}


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "watcher", *args], capture_output=True, text=True, timeout=120, cwd=cwd)


@pytest.fixture()
def shifted_csv(tmp_path) -> Path:
    """An invented checkweigher stream: in control, then a 3-sigma step at reading 300, one bad line."""
    rng = np.random.default_rng(20)
    x = 500 + rng.normal(0, 1, 500)
    x[300:] += 3.0
    lines = ["time,mass_g,lane"]
    for i, v in enumerate(x):
        lines.append(f"2026-03-02T06:{i // 60:02d}:{i % 60:02d}Z,{v:.3f},{1 + i % 2}")
        if i == 150:
            lines.append("2026-03-02T06:02:31Z,jammed,1")
    p = tmp_path / "cw.csv"
    p.write_text("\n".join(lines) + "\n")
    return p


def test_json_contract(shifted_csv):
    out = run("replay", str(shifted_csv), "--column", "mass_g", "--json")
    assert out.returncode == 0, out.stderr
    records = [json.loads(line) for line in out.stdout.splitlines()]
    assert records, "a 3-sigma step must be found"
    for r in records:
        assert list(r) == list(FINDING_KEYS)
        assert r["pattern"] in PATTERNS
        assert r["characteristic"] == "mass_g"
        assert isinstance(r["index"], int) and isinstance(r["message"], str) and r["message"]
        assert r["p_value"] is None or 0 <= r["p_value"] <= 1
        assert r["direction"] in ("up", "down", None)
    shifts = [r for r in records if r["pattern"] == "shift"]
    assert shifts and all(r["index"] >= 300 for r in shifts)
    first = min(shifts, key=lambda r: r["index"])
    assert first["direction"] == "up" and first["time"].startswith("2026-03-02T06:")
    assert 1.5 < first["size"] < 4.5  # the step was +3 g
    # The bad line is named on stderr, with file and line number, and counted.
    assert f"{shifted_csv}:153: skipped: column 'mass_g': not a number: 'jammed'" in out.stderr
    assert "1 line(s) skipped" in out.stderr


def test_table_output_and_numeric_columns(shifted_csv):
    out = run("replay", str(shifted_csv))
    assert out.returncode == 0
    assert out.stdout.splitlines()[0].split()[:3] == ["index", "characteristic", "pattern"]
    # Without --column every numeric column is watched (mass_g and lane); time is not.
    chars = {line.split()[1] for line in out.stdout.splitlines()[2:] if line.strip()}
    assert "mass_g" in chars and "time" not in chars


def test_lane_alternation_is_a_mixture(shifted_csv):
    out = run("replay", str(shifted_csv), "--column", "lane", "--json")
    pats = {json.loads(x)["pattern"] for x in out.stdout.splitlines()}
    assert "mixture" in pats or "sawtooth" in pats


def test_replay_logs_into_a_state_folder(shifted_csv, tmp_path):
    out = run("replay", str(shifted_csv), "--column", "mass_g", "--json", "--state", str(tmp_path / "st"))
    n = len(out.stdout.splitlines())
    db = sqlite3.connect(tmp_path / "st" / "linewatch.sqlite")
    assert db.execute("SELECT count(*) FROM findings").fetchone()[0] == n
    assert db.execute("SELECT line_no, reason FROM quarantine").fetchall() == [(153, "column 'mass_g': not a number: 'jammed'")]
    assert len((tmp_path / "st" / "findings.jsonl").read_text().splitlines()) == n


def test_replay_with_config_source(shifted_csv, tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text(
        "sources:\n  - {name: cw, path: x.csv, time_column: time}\n"
        "characteristics:\n  - {name: pack_mass, source: cw, column: mass_g, unit: g, usl: 502.5, baseline: {readings: 60}}\n"
    )
    out = run("replay", str(shifted_csv), "--config", str(cfg), "--json")
    assert out.returncode == 0, out.stderr
    recs = [json.loads(x) for x in out.stdout.splitlines()]
    assert {r["characteristic"] for r in recs} == {"pack_mass"}
    assert any(r["pattern"] == "out_of_spec" and r["p_value"] is None and r["direction"] == "up" for r in recs)


@pytest.mark.parametrize("content,why", [
    (None, "no such file"),
    ("", "the file is empty"),
    ("name,comment\nx,y\n", "no numeric column to watch"),
])
def test_unusable_input_exits_2(tmp_path, content, why):
    p = tmp_path / "in.csv"
    if content is not None:
        p.write_text(content)
    out = run("replay", str(p))
    assert out.returncode == 2 and why in out.stderr and str(p) in out.stderr


def test_unknown_column_exits_2(shifted_csv):
    out = run("replay", str(shifted_csv), "--column", "weight")
    assert out.returncode == 2 and "no column(s) weight" in out.stderr


def test_jsonl_replay(tmp_path):
    rng = np.random.default_rng(5)
    x = 8.0 + 0.002 * rng.normal(size=400) + np.r_[np.zeros(200), np.linspace(0, 0.02, 200)]
    p = tmp_path / "pins.jsonl"
    p.write_text("".join(json.dumps({"t": 1767337200 + 15 * i, "pin_diameter_mm": round(v, 5)}) + "\n" for i, v in enumerate(x)))
    out = run("replay", str(p), "--time-column", "t", "--json")
    recs = [json.loads(x) for x in out.stdout.splitlines()]
    assert out.returncode == 0 and recs
    assert any(r["pattern"] in ("drift", "shift") and r["direction"] == "up" for r in recs)
