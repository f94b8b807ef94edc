"""The state database: one SQLite file (WAL) in the state folder.

One transaction per batch of readings holds the file offsets, the detector
state of every characteristic the batch touched, the findings it produced,
its quarantined lines and the alerts it queued, so a crash at any instant
resumes exactly where the last commit left off.

``findings.jsonl`` beside the database mirrors the findings table.  It is
written after each commit from the table itself and its committed length is
kept in ``meta``, so a crash between the commit and the write neither loses
nor repeats a line: on open, the file is cut back to its committed length and
the missing rows are written again.
"""

from __future__ import annotations

import json
import os
import sqlite3
import threading
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

from watcher.records import Finding, Quarantined

DB_NAME = "linewatch.sqlite"
JSONL_NAME = "findings.jsonl"
SCHEMA_VERSION = 1

SCHEMA = [
    "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)",
    """CREATE TABLE IF NOT EXISTS files (
        source TEXT NOT NULL, path TEXT NOT NULL, checkpoint TEXT NOT NULL,
        lines INTEGER NOT NULL DEFAULT 0, quarantined INTEGER NOT NULL DEFAULT 0,
        updated_at TEXT NOT NULL, PRIMARY KEY (source, path))""",
    """CREATE TABLE IF NOT EXISTS characteristic_state (
        characteristic TEXT PRIMARY KEY, source TEXT NOT NULL, state TEXT NOT NULL,
        readings INTEGER NOT NULL, last_time TEXT, last_value REAL, updated_at TEXT NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS findings (
        id INTEGER PRIMARY KEY AUTOINCREMENT, created_at TEXT NOT NULL, source TEXT NOT NULL,
        characteristic TEXT NOT NULL, pattern TEXT NOT NULL, detector TEXT NOT NULL, p_value REAL,
        idx INTEGER NOT NULL, time TEXT, onset_index INTEGER, onset_time TEXT, direction TEXT,
        size REAL, message TEXT NOT NULL, value REAL, detail TEXT)""",
    "CREATE INDEX IF NOT EXISTS findings_by_char ON findings (characteristic, idx)",
    """CREATE TABLE IF NOT EXISTS quarantine (
        id INTEGER PRIMARY KEY AUTOINCREMENT, created_at TEXT NOT NULL, source TEXT NOT NULL,
        file TEXT, line_no INTEGER, byte_offset INTEGER, raw TEXT NOT NULL, reason TEXT NOT NULL)""",
    "CREATE INDEX IF NOT EXISTS quarantine_by_file ON quarantine (source, file)",
    """CREATE TABLE IF NOT EXISTS commands (
        id INTEGER PRIMARY KEY AUTOINCREMENT, created_at TEXT NOT NULL, kind TEXT NOT NULL,
        subject TEXT NOT NULL, note TEXT, done_at TEXT)""",
    """CREATE TABLE IF NOT EXISTS events (
        id INTEGER PRIMARY KEY AUTOINCREMENT, created_at TEXT NOT NULL, kind TEXT NOT NULL,
        subject TEXT, note TEXT)""",
]

# Other modules add their tables by registering a function that takes a connection.
_SCHEMA_HOOKS: list[Callable[[sqlite3.Connection], None]] = []


def register_schema(fn: Callable[[sqlite3.Connection], None]) -> Callable[[sqlite3.Connection], None]:
    if fn not in _SCHEMA_HOOKS:
        _SCHEMA_HOOKS.append(fn)
    return fn


def utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


def make_state_dir(path: Path) -> Path:
    """Create the state folder readable by its owner only (it may hold secrets in alert rows)."""
    path.mkdir(parents=True, exist_ok=True)
    try:
        os.chmod(path, 0o700)
    except OSError:  # pragma: no cover - e.g. a folder owned by someone else
        pass
    return path


class Store:
    """The SQLite state of one linewatch installation (one state folder)."""

    def __init__(self, state_dir: str | Path, *, readonly: bool = False):
        self.dir = Path(state_dir)
        self.readonly = readonly
        if not readonly:
            make_state_dir(self.dir)
        self.path = self.dir / DB_NAME
        self.jsonl_path = self.dir / JSONL_NAME
        if readonly:
            if not self.path.exists():
                raise FileNotFoundError(f"{self.path}: no state database here yet (has linewatch run with this config?)")
            self.conn = sqlite3.connect(f"file:{self.path}?mode=ro", uri=True, timeout=10, check_same_thread=False)
            ready = self.conn.execute("SELECT 1 FROM sqlite_master WHERE name = 'characteristic_state'").fetchone()
            if not ready:
                self.conn.close()
                raise FileNotFoundError(f"{self.path}: the state database is not set up yet (linewatch is starting?)")
        else:
            self.conn = sqlite3.connect(self.path, timeout=30, isolation_level=None, check_same_thread=False)
            os.chmod(self.path, 0o600)
            self.conn.execute("PRAGMA journal_mode=WAL")
            self.conn.execute("PRAGMA synchronous=NORMAL")
        self.conn.row_factory = sqlite3.Row
        self._lock = threading.RLock()
        if not readonly:
            self._create()
            self.sync_jsonl()

    def close(self) -> None:
        self.conn.close()

    # -- schema ---------------------------------------------------------------
    def _create(self) -> None:
        with self.transaction() as c:
            for ddl in SCHEMA:
                c.execute(ddl)
            for hook in _SCHEMA_HOOKS:
                hook(c)
            c.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """BEGIN IMMEDIATE ... COMMIT, or ROLLBACK on an exception."""
        with self._lock:
            self.conn.execute("BEGIN IMMEDIATE")
            try:
                yield self.conn
            except BaseException:
                self.conn.execute("ROLLBACK")
                raise
            else:
                self.conn.execute("COMMIT")

    # -- meta -----------------------------------------------------------------
    def get_meta(self, key: str, default: str | None = None) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return row[0] if row else default

    @staticmethod
    def set_meta(c: sqlite3.Connection, key: str, value: str) -> None:
        c.execute("INSERT INTO meta VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET value = excluded.value", (key, value))

    # -- per-batch writes (inside a transaction) -----------------------------------------
    @staticmethod
    def add_findings(c: sqlite3.Connection, findings: Iterable[Finding]) -> list[int]:
        now = utc_now()
        ids = []
        for f in findings:
            cur = c.execute(
                "INSERT INTO findings (created_at, source, characteristic, pattern, detector, p_value, idx, time,"
                " onset_index, onset_time, direction, size, message, value, detail)"
                " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (now, f.source, f.characteristic, f.pattern, f.detector, f.p_value, f.index, f.time,
                 f.onset_index, f.onset_time, f.direction, f.size, f.message, f.value,
                 json.dumps(f.detail, default=float)),
            )
            ids.append(cur.lastrowid)
        return ids

    @staticmethod
    def add_quarantined(c: sqlite3.Connection, rows: Iterable[Quarantined]) -> int:
        now = utc_now()
        n = 0
        for q in rows:
            c.execute(
                "INSERT INTO quarantine (created_at, source, file, line_no, byte_offset, raw, reason) VALUES (?,?,?,?,?,?,?)",
                (now, q.source, q.file, q.line_no, q.offset, q.raw, q.reason),
            )
            n += 1
        return n

    @staticmethod
    def save_file(c: sqlite3.Connection, source: str, path: str, checkpoint: dict, lines: int, quarantined: int) -> None:
        c.execute(
            "INSERT INTO files VALUES (?,?,?,?,?,?) ON CONFLICT(source, path) DO UPDATE SET checkpoint = excluded.checkpoint,"
            " lines = files.lines + excluded.lines, quarantined = files.quarantined + excluded.quarantined,"
            " updated_at = excluded.updated_at",
            (source, path, json.dumps(checkpoint), lines, quarantined, utc_now()),
        )

    @staticmethod
    def save_characteristic(c: sqlite3.Connection, name: str, source: str, state: dict | str, readings: int,
                            last_time: str | None, last_value: float | None) -> None:
        """``state``: a monitor's exported state, or the same already encoded as JSON text."""
        c.execute(
            "INSERT INTO characteristic_state VALUES (?,?,?,?,?,?,?) ON CONFLICT(characteristic) DO UPDATE SET"
            " source = excluded.source, state = excluded.state, readings = excluded.readings,"
            " last_time = excluded.last_time, last_value = excluded.last_value, updated_at = excluded.updated_at",
            (name, source, state if isinstance(state, str) else json.dumps(state, separators=(",", ":")),
             readings, last_time, last_value, utc_now()),
        )

    @staticmethod
    def add_event(c: sqlite3.Connection, kind: str, subject: str | None, note: str | None) -> None:
        c.execute("INSERT INTO events (created_at, kind, subject, note) VALUES (?,?,?,?)", (utc_now(), kind, subject, note))

    @staticmethod
    def add_command(c: sqlite3.Connection, kind: str, subject: str, note: str | None) -> int:
        """A request for the running (or next) daemon, e.g. to learn a new baseline."""
        cur = c.execute("INSERT INTO commands (created_at, kind, subject, note) VALUES (?,?,?,?)",
                        (utc_now(), kind, subject, note))
        return cur.lastrowid

    # -- reads ----------------------------------------------------------------------------
    def load_characteristics(self) -> dict[str, dict[str, Any]]:
        rows = self.conn.execute("SELECT characteristic, state FROM characteristic_state").fetchall()
        return {r[0]: json.loads(r[1]) for r in rows}

    def load_files(self, source: str) -> dict[str, dict[str, Any]]:
        rows = self.conn.execute("SELECT path, checkpoint FROM files WHERE source = ?", (source,)).fetchall()
        return {r[0]: json.loads(r[1]) for r in rows}

    def findings(self, characteristic: str | None = None) -> list[dict[str, Any]]:
        q = "SELECT * FROM findings" + (" WHERE characteristic = ?" if characteristic else "") + " ORDER BY id"
        rows = self.conn.execute(q, (characteristic,) if characteristic else ()).fetchall()
        return [finding_record(r) for r in rows]

    # -- the JSON-lines mirror ---------------------------------------------------------------
    def sync_jsonl(self) -> int:
        """Bring findings.jsonl in line with the findings table; return lines written."""
        if self.readonly:
            return 0
        with self._lock:
            done_id = int(self.get_meta("jsonl_id", "0"))
            done_size = int(self.get_meta("jsonl_size", "0"))
            rows = self.conn.execute("SELECT * FROM findings WHERE id > ? ORDER BY id", (done_id,)).fetchall()
            size = self.jsonl_path.stat().st_size if self.jsonl_path.exists() else 0
            if size == done_size and not rows:
                return 0
            fd = os.open(self.jsonl_path, os.O_RDWR | os.O_CREAT, 0o600)
            try:
                if size > done_size:
                    # Written but not recorded (a crash between write and record): cut back, write again.
                    os.ftruncate(fd, done_size)
                elif size < done_size:
                    # The file lost lines (removed or edited by hand): write it again whole.
                    os.ftruncate(fd, 0)
                    rows = self.conn.execute("SELECT * FROM findings ORDER BY id").fetchall()
                data = "".join(json.dumps(finding_record(r)) + "\n" for r in rows).encode()
                os.lseek(fd, 0, os.SEEK_END)
                os.write(fd, data)
                os.fsync(fd)
                new_size = os.lseek(fd, 0, os.SEEK_END)
            finally:
                os.close(fd)
            last = rows[-1]["id"] if rows else done_id
            with self.transaction() as c:
                self.set_meta(c, "jsonl_id", str(last))
                self.set_meta(c, "jsonl_size", str(new_size))
            return len(rows)


def finding_record(row: sqlite3.Row) -> dict[str, Any]:
    """A findings-table row as the public findings record (plus source and created_at)."""
    return {
        "characteristic": row["characteristic"],
        "pattern": row["pattern"],
        "detector": row["detector"],
        "p_value": row["p_value"],
        "index": row["idx"],
        "time": row["time"],
        "onset_index": row["onset_index"],
        "onset_time": row["onset_time"],
        "direction": row["direction"],
        "size": row["size"],
        "message": row["message"],
        "source": row["source"],
        "created_at": row["created_at"],
    }
