"""The state database and its findings.jsonl mirror, on real SQLite files."""

from __future__ import annotations

import json
import os
import sqlite3
import stat

import pytest

from watcher.records import FINDING_KEYS, Finding, Quarantined
from watcher.store import Store


def finding(i: int) -> Finding:
    return Finding("pack_mass", "shift", "CUSUM", 1e-4, i, None, i - 5, None, "up", 1.5, f"moved {i}", "cw", 501.0)


def lines(path) -> list[dict]:
    return [json.loads(x) for x in path.read_text().splitlines()]


def test_findings_land_in_sqlite_and_jsonl(tmp_path):
    s = Store(tmp_path / "st")
    with s.transaction() as c:
        s.add_findings(c, [finding(10), finding(11)])
    s.sync_jsonl()
    rows = lines(s.jsonl_path)
    assert [r["index"] for r in rows] == [10, 11]
    assert list(rows[0])[: len(FINDING_KEYS)] == list(FINDING_KEYS)
    db = sqlite3.connect(s.path)
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert db.execute("SELECT count(*), min(source) FROM findings").fetchone() == (2, "cw")
    assert s.findings()[1]["message"] == "moved 11"


def test_state_folder_is_private(tmp_path):
    s = Store(tmp_path / "st")
    assert stat.S_IMODE(os.stat(s.dir).st_mode) == 0o700
    assert stat.S_IMODE(os.stat(s.path).st_mode) == 0o600


def test_rollback_leaves_nothing(tmp_path):
    s = Store(tmp_path / "st")
    with pytest.raises(RuntimeError):
        with s.transaction() as c:
            s.add_findings(c, [finding(1)])
            raise RuntimeError("crash in the middle of a batch")
    assert s.findings() == []


def test_jsonl_written_but_not_recorded_is_cut_back(tmp_path):
    """A crash between writing findings.jsonl and recording its length must not repeat a line."""
    s = Store(tmp_path / "st")
    with s.transaction() as c:
        s.add_findings(c, [finding(1)])
    s.sync_jsonl()
    with s.transaction() as c:
        s.add_findings(c, [finding(2)])
    # Simulate: the line for finding 2 reached the file, then the process died before meta was updated.
    with open(s.jsonl_path, "a") as fh:
        fh.write(json.dumps(finding(2).record()) + "\n")
    s.close()
    s2 = Store(tmp_path / "st")  # opening re-syncs
    assert [r["index"] for r in lines(s2.jsonl_path)] == [1, 2]


def test_jsonl_lost_is_rewritten(tmp_path):
    s = Store(tmp_path / "st")
    with s.transaction() as c:
        s.add_findings(c, [finding(1), finding(2)])
    s.sync_jsonl()
    s.jsonl_path.unlink()
    s.close()
    s2 = Store(tmp_path / "st")
    assert [r["index"] for r in lines(s2.jsonl_path)] == [1, 2]


def test_quarantine_and_file_counters(tmp_path):
    s = Store(tmp_path / "st")
    with s.transaction() as c:
        s.add_quarantined(c, [Quarantined("cw", "a.csv", 7, 120, "x,y", "wrong number of fields")])
        s.save_file(c, "cw", "a.csv", {"offset": 130}, lines=7, quarantined=1)
    with s.transaction() as c:
        s.save_file(c, "cw", "a.csv", {"offset": 200}, lines=3, quarantined=0)
    row = s.conn.execute("SELECT lines, quarantined, checkpoint FROM files").fetchone()
    assert (row[0], row[1], json.loads(row[2])) == (10, 1, {"offset": 200})
    q = s.conn.execute("SELECT file, line_no, byte_offset, reason FROM quarantine").fetchone()
    assert tuple(q) == ("a.csv", 7, 120, "wrong number of fields")


def test_readonly_store_needs_a_database(tmp_path):
    with pytest.raises(FileNotFoundError, match="no state database"):
        Store(tmp_path / "none", readonly=True)
