"""Replay: read a whole file once, start to end, through the same route as live readings."""

from __future__ import annotations

import csv
import io
import json
import sys
from collections import Counter
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Iterator, TextIO

from watcher.config import CharacteristicConfig, BaselineConfig, Config, SourceConfig, default_config
from watcher.parse import reason_kind, to_float
from watcher.records import Finding, Quarantined
from watcher.route import Batch, Route

TIME_NAMES = ("time", "timestamp", "datetime", "date", "ts")
SNIFF_LINES = 200
SHOW_BAD = 20  # bad lines named one by one before only a count is kept


class UnusableInput(Exception):
    """The file cannot be replayed at all (missing, empty, no numeric column...)."""


@dataclass
class RawLine:
    path: str
    line_no: int
    offset: int
    data: bytes


def iter_lines(path: Path) -> Iterator[RawLine]:
    """Complete lines of a file with 1-based numbers and byte offsets; a last line without newline counts."""
    offset = 0
    with open(path, "rb") as fh:
        for n, line in enumerate(fh, start=1):
            data = line[:-1] if line.endswith(b"\n") else line
            yield RawLine(str(path), n, offset, data)
            offset += len(line)


def _guess_format(path: Path) -> str:
    return "jsonl" if path.suffix.lower() in (".jsonl", ".ndjson", ".json") else "csv"


def _sniff(path: Path, fmt: str, delimiter: str, decimal: str) -> tuple[list[str], list[str]]:
    """(header, numeric columns) of a file, from its first lines."""
    with open(path, "rb") as fh:
        head = [fh.readline() for _ in range(SNIFF_LINES + 1)]
    text = [h.decode("utf-8", errors="replace").rstrip("\r\n") for h in head if h.strip()]
    if not text:
        raise UnusableInput(f"{path}: the file is empty")
    if fmt == "jsonl":
        keys: dict[str, bool] = {}
        for t in text:
            try:
                obj = json.loads(t)
            except ValueError:
                continue
            if isinstance(obj, dict):
                for k, v in obj.items():
                    ok = isinstance(v, (int, float)) and not isinstance(v, bool)
                    keys[k] = keys.get(k, True) and ok
        return list(keys), [k for k, ok in keys.items() if ok]
    rows = list(csv.reader(io.StringIO("\n".join(text)), delimiter=delimiter))
    header = [h.strip() for h in rows[0]]
    numeric = []
    for j, name in enumerate(header):
        vals = [r[j].strip() for r in rows[1:] if len(r) == len(header) and r[j].strip()]
        good = 0
        for v in vals:
            try:
                to_float(v, decimal)
                good += 1
            except ValueError:
                pass
        if vals and good >= 0.9 * len(vals):
            numeric.append(name)
    return header, numeric


def config_for_file(
    path: Path,
    cfg: Config | None,
    *,
    source: str | None = None,
    columns: list[str] | None = None,
    time_column: str | None = None,
    baseline: int | None = None,
) -> tuple[Config, SourceConfig]:
    """The configuration a replay runs with, and the source the file is read as."""
    if cfg is not None:
        if not cfg.sources:
            raise UnusableInput(f"{cfg.file}: the configuration has no sources")
        if source is None:
            if len(cfg.sources) > 1:
                names = ", ".join(s.name for s in cfg.sources)
                raise UnusableInput(f"{cfg.file}: several sources ({names}); name one with --source")
            src = cfg.sources[0]
        else:
            try:
                src = cfg.source(source)
            except KeyError:
                raise UnusableInput(f"{cfg.file}: no source named {source!r}") from None
        chars = [c for c in cfg.characteristics_of(src.name) if not columns or c.column in columns or c.name in columns]
        if baseline is not None:
            chars = [replace(c, baseline=BaselineConfig(readings=baseline)) for c in chars]
        if time_column:
            src = replace(src, time_column=time_column)
        if not chars:
            raise UnusableInput(f"{cfg.file}: source {src.name!r} feeds no characteristic")
        return replace(cfg, sources=[src], characteristics=chars), src

    fmt = _guess_format(path)
    src = SourceConfig(name=path.stem, path=str(path), format=fmt)
    header, numeric = _sniff(path, fmt, src.delimiter, src.decimal)
    if time_column is None:
        time_column = next((h for h in header if h.strip().lower() in TIME_NAMES), None)
    elif time_column not in header:
        raise UnusableInput(f"{path}: no column {time_column!r} (columns: {', '.join(header)})")
    src.time_column = time_column
    if columns:
        missing = [c for c in columns if c not in header]
        if missing:
            raise UnusableInput(f"{path}: no column(s) {', '.join(missing)} (columns: {', '.join(header)})")
        chosen = columns
    else:
        chosen = [c for c in numeric if c != time_column]
    if not chosen:
        raise UnusableInput(f"{path}: no numeric column to watch (columns: {', '.join(header)})")
    n = baseline if baseline is not None else BaselineConfig().readings
    chars = [CharacteristicConfig(name=c, source=src.name, column=c, baseline=BaselineConfig(readings=n)) for c in chosen]
    base = default_config()
    return replace(base, sources=[src], characteristics=chars), src


@dataclass
class ReplayResult:
    batch: Batch
    lines: int
    bad_by_reason: Counter

    @property
    def findings(self) -> list[Finding]:
        return self.batch.findings


def replay_file(path: Path, cfg: Config, src: SourceConfig, warn: TextIO | None = sys.stderr,
                progress: Any = None, engine: str = "fast", calibrator: Any = None,
                on_finding: Any = None) -> ReplayResult:
    """Every line of ``path`` through a fresh route, as if it had arrived live.

    ``engine="fast"`` (default): bulk parsing and vectorised scans (watcher/replay_fast.py),
    with exactly the findings and quarantined lines of ``engine="live"``, which feeds the
    lines one by one through :class:`Route` as the daemon does.  Both take their thresholds
    from ``calibrator`` (default: the config's, :class:`watcher.calibration.Calibrator`).
    With ``on_finding`` every finding is handed over once final, in order, and not kept
    (``findings`` is then empty): memory stays flat on a long file.
    """
    if engine == "fast":
        from watcher.replay_fast import replay_file_fast

        return replay_file_fast(path, cfg, src, warn, progress, calibrator=calibrator, on_finding=on_finding)
    if engine != "live":
        raise ValueError(f"engine must be 'fast' or 'live', got {engine!r}")
    if not path.exists():
        raise UnusableInput(f"{path}: no such file")
    if path.is_dir():
        raise UnusableInput(f"{path}: is a folder, not a file")
    route = Route(cfg, calibrator=calibrator)
    total = Batch()
    lines = 0
    reasons: Counter = Counter()
    chunk: list[RawLine] = []

    def flush() -> None:
        b = route.take(src, chunk)
        if on_finding is not None:  # a batch's findings are final when it is taken
            for f in b.findings:
                on_finding(f)
            b.findings = []
        for q in b.quarantined:
            reasons[reason_kind(q.reason)] += 1
            if warn is not None and sum(reasons.values()) <= SHOW_BAD:
                print(f"{q.file}:{q.line_no}: skipped: {q.reason}", file=warn)
        total.merge(b)
        if progress is not None:
            progress(b.readings)
        chunk.clear()

    for raw in iter_lines(path):
        chunk.append(raw)
        lines += 1
        if len(chunk) >= 4096:
            flush()
    flush()
    if warn is not None and reasons:
        n = sum(reasons.values())
        detail = "; ".join(f"{r}: {c}" for r, c in reasons.most_common())
        print(f"{path}: {n} line(s) skipped ({detail})", file=warn)
    return ReplayResult(total, lines, reasons)


def format_table(findings: list[Finding]) -> str:
    """A readable table of findings for a terminal."""
    if not findings:
        return "no findings"
    head = ("index", "characteristic", "pattern", "dir", "p-value", "onset", "size", "detector")
    rows = []
    for f in findings:
        rows.append((
            str(f.index), f.characteristic, f.pattern, f.direction or "",
            "" if f.p_value is None else f"{f.p_value:.2g}",
            "" if f.onset_index is None else str(f.onset_index),
            "" if f.size is None else f"{f.size:+.4g}", f.detector,
        ))
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    out = [fmt.format(*head), fmt.format(*("-" * w for w in widths))]
    out += [fmt.format(*r) for r in rows]
    return "\n".join(out)
