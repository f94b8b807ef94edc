"""Replay a whole file fast: bulk parsing with numpy, then every detector's vectorised ``scan``.

The result is exactly that of the live route (:func:`watcher.replay.replay_file` with
``path="live"``): the same findings, field for field and in the same order, and the same
quarantined lines with the same reasons.  ``tests/watcher/test_replay_fast.py`` checks this
on random streams with shifts, drifts, ties and malformed lines.

Parsing (CSV)
-------------
The file is read in blocks of whole lines.  Per block, numpy finds the line ends, the
delimiters and the bytes of every field.  A line is taken on the fast path only when the
live parser (:class:`watcher.parse.LineParser`) would certainly turn it into readings:

* printable ASCII only (no quote, no control byte; one trailing ``\\r`` is allowed), and
  exactly as many fields as the header;
* every watched field is empty or converts with Python's ``float`` (numpy's bytes-to-float
  cast is ``float`` itself), to a finite number, and at least one is not empty -- so the
  line is neither the header again nor a new header;
* the time field (if any) passes :func:`watcher.parse.parse_time`.

Every other line -- the first line of the file, blank lines, quoted fields, other field
counts, text or non-finite values, unparseable times -- goes to the live ``LineParser``
itself, in line order, so quarantine reasons and readings are its own.  A line that
changes the header (``LineParser`` re-reads the columns) ends the fast stretch; the rest of
the block is taken again with the new header.  JSON-lines files go through ``LineParser``
line by line (the JSON decoder is the cost there); the detectors still run vectorised.

Detectors (chunked, flat memory)
--------------------------------
Readings are gathered per characteristic and handed on every ``CHUNK`` readings.  The
baseline is learnt from the first readings exactly as :meth:`Monitor.feed` does; then each
detector's class ``scan`` is run from its last restart point.  This is exact because a
detector restarts after every signal (``rules.detector``): from the reading after a signal
on, the live detector behaves exactly as a fresh one.  So a detector's scan region starts
just after its last signal, and the data before it can be dropped.  Two kinds of detector
allow more:

* windowed detectors whose decision is a function of the values in their window
  (``WINDOWED``): a fresh start ``window - 1`` readings before the chunk end sees the
  same windows from there on, so at most ``window - 1`` readings are kept;
* memoryless detectors (``MEMORYLESS``): nothing is kept.

For those, signals found from a later start carry positions relative to that start; they
are moved back (``onset_index`` and the ``window_start`` detail).  Detectors with a
vectorised ``resume`` (CUSUM and EWMA) are *carried*: one detector object per
characteristic takes each chunk from the state the previous one left (its statistics, the
last zero or stretch start, and the readings since its restart, on which the p-values
depend), so nothing is kept or re-scanned, and the result is bit-identical to ``update``
per reading.  Detectors in none of these groups (the zone rules, Pettitt, any new one)
keep everything since their last signal and are re-scanned from there once the new data
is at least as long as the region already scanned (amortised cost at most twice one
scan); they are not in the default set.  Findings themselves need not be
kept: with ``on_finding`` each is handed over once no later reading can precede it.  The look-back for onset times and sizes is bounded by
``Monitor.keep`` exactly as the live deques are.

Not carried over from the live batch: ``Batch.values`` (the digest's per-reading values)
and ``Batch.backwards`` (times going backwards, which the daemon logs); replay uses neither.
"""

from __future__ import annotations

import sys
from collections import Counter
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable, TextIO

import numpy as np

from rules.detector import StreamDetector
from rules.runs_stream import shared_window_summaries
from watcher.config import Config, SourceConfig
from watcher.monitor import Monitor
from watcher.parse import Column, LineParser, parse_time, to_float
from watcher.records import Finding, Quarantined
from watcher.route import Batch

CHUNK = 1 << 14  # readings of one characteristic handed to the detectors at once
BLOCK_BYTES = 2 << 20  # bytes of the file parsed at once (whole lines)
MAX_VALUE_WIDTH = 48  # longer value fields go to LineParser (fixed-width gather stays small)
MAX_TIME_WIDTH = 64
SHOW_BAD = 20

# Detector keys whose decision depends only on the values in their last ``window`` readings.
WINDOWED = frozenset({"median_runs", "updown_runs", "longest_median_run", "longest_monotone_run", "mann_kendall"})
# Detector keys with no memory at all.
MEMORYLESS = frozenset({"shewhart"})
# Signal detail entries that hold a position in the detector's own index.
POSITION_DETAIL = ("window_start",)


# ----------------------------------------------------------------------------------------
# the detectors of one characteristic, chunk by chunk


class _History:
    """What a finding may look back on (the same bounds as the live deques), over a buffer
    whose first element is reading ``base``."""

    def __init__(self, keep: int):
        self.keep = keep
        self.now = 0
        self.base = 0
        self.values: np.ndarray = np.empty(0)
        self.times: np.ndarray = np.empty(0, dtype=object)

    def time_at(self, index: int) -> str | None:
        back = self.now - index
        return self.times[index - self.base] if index >= 0 and 0 <= back < self.keep else None

    def values_since(self, index: int) -> list[float] | None:
        n = self.now + 1 - index
        if index >= 0 and 0 < n <= self.keep:
            return self.values[index - self.base : self.now + 1 - self.base].tolist()
        return None


class _Track:
    """One detector's scan bookkeeping: ``start`` is the reading a fresh scan begins at."""

    __slots__ = ("key", "cls", "params", "rank", "needs_reference", "start", "scanned_to", "kind", "window", "det")

    def __init__(self, key: str, det: Any, rank: int, start: int):
        self.key, self.cls, self.params, self.rank = key, type(det), det.params(), rank
        self.needs_reference = det.needs_reference
        self.start = start
        self.scanned_to = start
        if key in WINDOWED:
            self.kind = "windowed"
        elif key in MEMORYLESS:
            self.kind = "memoryless"
        elif _resumes(type(det)):
            self.kind = "carried"
        else:
            self.kind = "full"
        self.window = int(self.params.get("window", 0))
        self.det = det if self.kind == "carried" else None


def _resumes(cls: type) -> bool:
    """Whether the class has its own vectorised ``resume`` (not the base class's loop)."""
    return getattr(cls, "resume", None) is not getattr(StreamDetector, "resume", None)


class SeriesScan:
    """All findings of one characteristic's readings, fed in chunks, as ``Monitor.feed`` gives them.

    ``add(values, times, lines)`` queues readings (float array, object array of times,
    line numbers); ``finish()`` returns ``[(line, rank, finding)]`` in reading order.
    """

    def __init__(self, monitor: Monitor, chunk: int = CHUNK):
        if monitor.count:
            raise ValueError("SeriesScan needs a fresh monitor")
        self.m = monitor
        self.chunk = chunk
        self.n = 0  # readings taken so far
        self.hist = _History(monitor.keep)
        self.lines = np.empty(0, dtype=np.int64)  # line numbers of the buffered readings
        self.fed: dict[bool, np.ndarray] = {}  # needs_reference -> values fed from reading fbase
        self.fbase = 0
        self.watch_start: int | None = None if monitor.baseline is None else 0
        self.tracks: list[_Track] = []
        if self.watch_start is not None:
            self._make_tracks()
        self.pending: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        self.pending_n = 0
        self.found: list[tuple[int, int, int, Finding, int]] = []  # (reading, rank, seq, finding, line)

    def _make_tracks(self) -> None:
        ws = self.m.watch_start
        self.watch_start = ws
        self.fbase = ws
        self.tracks = [_Track(k, d, r, ws) for r, (k, d) in enumerate(self.m.detectors.items())]
        self.m.detectors = {}

    def add(self, values: np.ndarray, times: np.ndarray, lines: np.ndarray) -> None:
        if len(values):
            self.pending.append((values, times, lines))
            self.pending_n += len(values)
            if self.pending_n >= self.chunk:
                self._step(final=False)

    def finish(self) -> list[tuple[int, int, Finding]]:
        """[(line number, rank, finding)] in the order the live monitor emits them
        (those not already taken by :meth:`take_before`)."""
        self._step(final=True)
        m = self.m
        m.count = self.n
        if len(self.hist.values):
            m.last_value = float(self.hist.values[-1])
            m.last_time = self.hist.times[-1]
        return self.take_before(None)

    def final_line(self, next_line: int) -> int:
        """The first line that may still get a finding: every finding on an earlier line is final.

        A track's later findings lie at or after the reading its last scan ended at (the scans
        are prefix-stable), the specification check and the baseline only see new readings, and
        readings still queued come from their own lines; ``next_line`` is the first line not read.
        """
        first = min([self.n] + [tr.scanned_to for tr in self.tracks])
        if first < self.n:
            return int(self.lines[first - self.hist.base])
        if self.pending:
            return int(self.pending[0][2][0])
        return next_line

    def take_before(self, line: int | None) -> list[tuple[int, int, Finding]]:
        """Remove and return, in order, the findings on lines before ``line`` (None: all)."""
        self.found.sort(key=lambda t: (t[0], t[1], t[2]))
        k = len(self.found) if line is None else next((j for j, t in enumerate(self.found) if t[4] >= line),
                                                      len(self.found))
        out = [(ln, rank, f) for (_, rank, _, f, ln) in self.found[:k]]
        del self.found[:k]
        return out

    # -- one step: the queued readings through spec limits, baseline and detectors ----------
    def _step(self, final: bool) -> None:
        m, h = self.m, self.hist
        if self.pending:
            x_new = np.concatenate([p[0] for p in self.pending]).astype(float, copy=False)
            t_new = np.concatenate([p[1] for p in self.pending])
            l_new = np.concatenate([p[2] for p in self.pending])
            self.pending, self.pending_n = [], 0
        else:
            x_new = np.empty(0)
            t_new = np.empty(0, dtype=object)
            l_new = np.empty(0, dtype=np.int64)
        e0 = self.n
        e1 = e0 + len(x_new)
        self.n = e1
        # specification limits: every reading, baseline included
        cc = m.cc
        if len(x_new) and (cc.usl is not None or cc.lsl is not None):
            out = np.zeros(len(x_new), dtype=bool)
            if cc.usl is not None:
                out |= x_new > cc.usl
            if cc.lsl is not None:
                out |= x_new < cc.lsl
            for j in np.flatnonzero(out).tolist():
                f = m._spec_finding(e0 + j, float(x_new[j]), t_new[j])
                self._keep(e0 + j, -1, f, int(l_new[j]))
        h.values = np.concatenate([h.values, x_new])
        h.times = np.concatenate([h.times, t_new])
        self.lines = np.concatenate([self.lines, l_new])
        if self.watch_start is None:  # still learning the baseline
            need = cc.baseline.readings
            if e1 < need:
                return
            m.baseline_values = h.values[:need].tolist()
            m.count = need
            m._learn_baseline(h.times[:need].tolist())
            self._make_tracks()
        ws = self.watch_start
        assert ws is not None
        lo = max(ws, e0)
        if lo < e1 and self.tracks:
            raw = h.values[lo - h.base : e1 - h.base]
            if m._lambda is not None:
                raw = np.asarray([m._transformed(v) for v in raw.tolist()], dtype=float)
            z = (raw - m.baseline.centre) / m.baseline.sigma
            for ref, new in ((False, raw), (True, z)):
                old = self.fed.get(ref)
                self.fed[ref] = new if old is None else np.concatenate([old, new])
        with shared_window_summaries():  # detectors with the same median window share its pass
            for tr in self.tracks:
                self._scan(tr, e1, final)
        self._trim(e1)

    def _keep(self, i: int, rank: int, f: Finding, line: int) -> None:
        self.found.append((i, rank, len(self.found), f, line))

    def _scan(self, tr: _Track, end: int, final: bool) -> None:
        if tr.start >= end:
            return
        if tr.kind == "carried":
            self._resume(tr, end)
            return
        if not final and tr.kind == "full" and end - tr.scanned_to < tr.scanned_to - tr.start:
            return  # a long quiet stretch: wait until the new data is as long as the old
        ws = self.watch_start
        feed = self.fed[tr.needs_reference][tr.start - self.fbase : end - self.fbase]
        shift = tr.start - ws  # position of the scan's first value in the detector's own index
        last = None
        for sig in tr.cls.scan(feed, **tr.params):
            i = tr.start + sig.index
            if shift:
                sig = _moved(sig, shift)
            self._take(tr, sig, i)
            last = i
        if last is not None:
            tr.start = last + 1
        if tr.kind == "windowed":
            tr.start = max(tr.start, end - (tr.window - 1))
        elif tr.kind == "memoryless":
            tr.start = end
        tr.scanned_to = end

    def _resume(self, tr: _Track, end: int) -> None:
        """A carried detector takes the new readings from where it stopped: nothing is re-scanned."""
        feed = self.fed[tr.needs_reference][tr.start - self.fbase : end - self.fbase]
        for sig in tr.det.resume(feed):
            self._take(tr, sig, self.watch_start + sig.index)  # created at the first watched reading
        tr.start = tr.scanned_to = end

    def _take(self, tr: _Track, sig: Any, i: int) -> None:
        """The finding of ``tr``'s signal on reading ``i``, with the live monitor's look-back."""
        h = self.hist
        h.now = i
        f = self.m._finding(tr.key, sig, i, float(h.values[i - h.base]), h.times[i - h.base], h)
        self._keep(i, tr.rank, f, int(self.lines[i - h.base]))

    def _trim(self, end: int) -> None:
        """Drop what no later finding can look back on."""
        h = self.hist
        first = min([tr.start for tr in self.tracks], default=end)
        if self.watch_start is None:
            return
        keep_from = max(0, min(first, end) - h.keep + 1)
        cut = keep_from - h.base
        if cut > 0:
            h.values = h.values[cut:].copy()
            h.times = h.times[cut:].copy()
            self.lines = self.lines[cut:].copy()
            h.base = keep_from
        fcut = min(first, end) - self.fbase
        if fcut > 0 and self.fed:
            for k in list(self.fed):
                self.fed[k] = self.fed[k][fcut:].copy()
            self.fbase += fcut


def _moved(sig: Any, shift: int) -> Any:
    """A signal found by a scan that started ``shift`` values into the detector's stream."""
    detail = sig.detail
    if any(k in detail for k in POSITION_DETAIL):
        detail = dict(detail)
        for k in POSITION_DETAIL:
            if k in detail and detail[k] is not None:
                detail[k] = detail[k] + shift
    onset = None if sig.onset_index is None else sig.onset_index + shift
    return replace(sig, index=sig.index + shift, onset_index=onset, detail=detail)


# ----------------------------------------------------------------------------------------
# reading a file


class _Sink:
    """Readings of every characteristic of one file, by characteristic, in line order."""

    def __init__(self, cfg: Config, src: SourceConfig, chunk: int, calibrator: Any = None):
        self.chars = cfg.characteristics_of(src.name)
        self.scans = {c.name: SeriesScan(Monitor(c, c.source, calibrator=calibrator), chunk) for c in self.chars}
        self.order = {c.name: j for j, c in enumerate(self.chars)}
        self.readings = 0
        self.touched: set[str] = set()

    def add(self, name: str, values: np.ndarray, times: np.ndarray, lines: np.ndarray) -> None:
        if len(values):
            self.readings += len(values)
            self.touched.add(name)
            self.scans[name].add(values, times, lines)

    def findings(self) -> list[Finding]:
        """The findings not yet taken, after the last reading, in the live route's order."""
        return self.take_final(None, finish=True)

    def take_final(self, next_line: int | None, finish: bool = False) -> list[Finding]:
        """Findings no later reading can precede (all with ``finish``), in the live route's order:
        by line, then characteristic, then the characteristic's own order."""
        if finish:
            limit = None
        else:
            limit = min((sc.final_line(next_line) for sc in self.scans.values()), default=next_line)
        got: list[tuple[int, int, int, Finding]] = []
        for name, sc in self.scans.items():
            taken = sc.finish() if finish else sc.take_before(limit)
            col = self.order[name]
            got += [(ln, col, k, f) for k, (ln, _rank, f) in enumerate(taken)]
        got.sort(key=lambda t: (t[0], t[1], t[2]))
        return [t[3] for t in got]


class _Lines:
    """The slow lines of a stretch, parsed by the live parser, kept by characteristic."""

    def __init__(self, names: list[str]):
        self.idx: dict[str, list[int]] = {n: [] for n in names}
        self.val: dict[str, list[float]] = {n: [] for n in names}
        self.time: dict[str, list[Any]] = {n: [] for n in names}
        self.bad: list[Quarantined] = []

    def take(self, j: int, readings: list[Any], bad: Quarantined | None) -> None:
        if bad is not None:
            self.bad.append(bad)
        for r in readings:
            self.idx[r.characteristic].append(j)
            self.val[r.characteristic].append(r.value)
            self.time[r.characteristic].append(r.time)


def _ascii_safe(src: SourceConfig) -> bool:
    try:
        return (len(src.delimiter) == 1 and src.delimiter not in "\"\r\n" and 0x09 <= ord(src.delimiter) <= 0x7E
                and src.decimal == "." and "t,1.5".encode(src.encoding) == b"t,1.5"
                and src.delimiter.encode(src.encoding) == src.delimiter.encode("ascii"))
    except (LookupError, UnicodeError):
        return False


class _CsvBlocks:
    """A CSV file block by block; fast lines by numpy, the rest by the live parser."""

    def __init__(self, parser: LineParser, src: SourceConfig, sink: _Sink):
        self.p = parser
        self.src = src
        self.sink = sink
        self.names = [c.characteristic for c in parser.columns]
        self.fast_ok = parser.fmt == "csv" and _ascii_safe(src)
        self.delim = ord(src.delimiter) if self.fast_ok else 0
        self.quarantined: list[Quarantined] = []

    def block(self, data: bytes, first_line: int, first_offset: int) -> int:
        """Parse the lines of ``data`` (whole lines ending in a newline; only the file's last line
        may lack one); returns the number of lines."""
        arr = np.frombuffer(data, dtype=np.uint8)
        ends = np.flatnonzero(arr == 10).astype(np.int64)
        if arr.size and arr[-1] != 10:
            ends = np.concatenate([ends, [arr.size]])
        starts = np.concatenate([[0], ends[:-1] + 1]).astype(np.int64)
        nlines = ends.size
        # one trailing carriage return is not part of the line (LineParser drops it too)
        has_cr = (ends > starts) & (arr[np.maximum(ends - 1, 0)] == 13)
        ends_eff = ends - has_cr
        if not self.fast_ok:
            self._all_slow(data, starts, ends, 0, first_line, first_offset)
            return nlines
        j = 0
        while j < nlines:
            j = self._stretch(data, arr, starts, ends, ends_eff, j, first_line, first_offset)
        return nlines

    def _all_slow(self, data: bytes, starts: np.ndarray, ends: np.ndarray, j0: int, first_line: int,
                  first_offset: int) -> None:
        """Every line by the live parser (JSON lines, or a CSV dialect the fast path does not read)."""
        p = self.p
        slow = _Lines(self.names)
        for j, (a, b) in enumerate(zip(starts[j0:].tolist(), ends[j0:].tolist())):
            readings, bad = p.parse(data[a:b], first_line + j0 + j, first_offset + a)
            slow.take(j, readings, bad)
        self.quarantined += slow.bad
        for name in self.names:
            si = slow.idx[name]
            if si:
                t = np.empty(len(si), dtype=object)
                t[:] = slow.time[name]
                self.sink.add(name, np.asarray(slow.val[name], dtype=float), t,
                              np.asarray(si, dtype=np.int64) + (first_line + j0))

    # -- one stretch of lines under one header ---------------------------------------------
    def _stretch(self, data: bytes, arr: np.ndarray, starts: np.ndarray, ends: np.ndarray,
                 ends_eff: np.ndarray, j0: int, first_line: int, first_offset: int) -> int:
        """Lines j0.. of the block up to (and including) the first that changes the header."""
        p = self.p
        n = starts.size - j0
        cand = np.zeros(n, dtype=bool)
        fast = self._fast_columns()
        st, en = starts[j0:], ends_eff[j0:]
        got: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}  # name -> (values, line idx, times)
        if fast is not None:
            cols, tpos, hlen = fast
            cand = self._candidates(arr, st, en, hlen)
            if first_line + j0 == 1:
                cand[0] = False  # a file's first line is its header: always the parser's
            ci = np.flatnonzero(cand)
            if ci.size:
                fs, fe = self._field_bounds(arr, st[ci], en[ci], hlen)
                ok = np.ones(ci.size, dtype=bool)
                any_value = np.zeros(ci.size, dtype=bool)
                vals = []
                for _name, k in cols:
                    v, good = self._values(arr, fs[k], fe[k])
                    ok &= good
                    any_value |= ~np.isnan(v)
                    vals.append(v)
                ok &= any_value  # a line with no value at all may be a header: the parser's
                if tpos is not None:
                    times, tgood = self._times(arr, fs[tpos], fe[tpos], ok)
                    ok &= tgood
                else:
                    times = np.full(ci.size, None, dtype=object)
                cand[ci[~ok]] = False
                for (name, _k), v in zip(cols, vals):
                    present = ok & ~np.isnan(v)
                    got[name] = (v[present], ci[present], times[present])
        # every other line through the live parser, in order, until one changes the header
        slow = _Lines(self.names)
        stop = n
        header = p.header
        for j in np.flatnonzero(~cand).tolist():
            g = j0 + j
            readings, bad = p.parse(data[starts[g]:ends[g]], first_line + g, first_offset + int(starts[g]))
            slow.take(j, readings, bad)
            if p.header is not header:
                stop = j + 1
                break
        self.quarantined += slow.bad
        # merge fast and slow readings in line order, up to the stop
        for name in self.names:
            fv, fi, ft = got.get(name, _EMPTY)
            if stop < n and len(fi):
                cut = int(np.searchsorted(fi, stop))
                fv, fi, ft = fv[:cut], fi[:cut], ft[:cut]
            si = slow.idx[name]
            if si:
                stimes = np.empty(len(si), dtype=object)
                stimes[:] = slow.time[name]
                alli = np.concatenate([fi, np.asarray(si, dtype=np.int64)])
                order = np.argsort(alli, kind="stable")
                fv = np.concatenate([fv, np.asarray(slow.val[name], dtype=float)])[order]
                ft = np.concatenate([ft, stimes])[order]
                fi = alli[order]
            self.sink.add(name, fv, ft, fi + (first_line + j0))
        return j0 + stop

    def _fast_columns(self) -> tuple[list[tuple[str, int]], int | None, int] | None:
        """(characteristic, field position) pairs, the time field and the field count, when
        the current header allows the fast path; else None."""
        p = self.p
        if not self.fast_ok or p.header is None:
            return None
        idx = p._index
        cols = []
        for c in p.columns:
            k = idx.get(c.column)
            if k is None:
                return None
            try:  # a header name that reads as a number could make a data line equal the header
                to_float(c.column)
                return None
            except ValueError:
                pass
            cols.append((c.characteristic, k))
        tpos = None
        if p.time_column:
            tpos = idx.get(p.time_column)
            if tpos is None:
                return None
        if not cols:
            return None
        return cols, tpos, len(p.header)

    def _candidates(self, arr: np.ndarray, st: np.ndarray, en: np.ndarray, hlen: int) -> np.ndarray:
        """Lines of printable ASCII (no quote) with exactly ``hlen - 1`` delimiters."""
        bad = (arr < 0x20) | (arr > 0x7E) | (arr == 0x22)
        isd = arr == self.delim
        if self.delim < 0x20:
            bad &= ~isd
        # per-line sums over [st, next line start): no block-long prefix sums (memory stays small)
        nxt = np.concatenate([st[1:], [arr.size]])
        nonempty = nxt > st
        nbad = np.zeros(st.size, dtype=np.int64)
        nd = np.zeros(st.size, dtype=np.int64)
        if nonempty.any():
            idx = st[nonempty]
            nbad[nonempty] = np.add.reduceat(bad, idx, dtype=np.int64)
            nd[nonempty] = np.add.reduceat(isd, idx, dtype=np.int64)
        # the newline and one trailing carriage return of a line are not part of it
        tail = nxt - en
        nbad -= tail
        return (nbad == 0) & (nd == hlen - 1) & (en > st)

    def _field_bounds(self, arr: np.ndarray, st: np.ndarray, en: np.ndarray, hlen: int):
        """Start and end of every field of the given lines (each has hlen - 1 delimiters)."""
        if hlen == 1:
            return [st], [en]
        dpos = np.flatnonzero(arr == self.delim)
        first = np.searchsorted(dpos, st)  # the delimiters of line i: dpos[first[i] : first[i] + hlen - 1]
        d = dpos[first[:, None] + np.arange(hlen - 1)[None, :]]
        fs = [st] + [d[:, k] + 1 for k in range(hlen - 1)]
        fe = [d[:, k] for k in range(hlen - 1)] + [en]
        return fs, fe

    def _values(self, arr: np.ndarray, fs: np.ndarray, fe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(values with NaN for empty fields, fast-path-ok flags)."""
        ln = fe - fs
        v = np.full(ln.size, np.nan)
        good = ln <= MAX_VALUE_WIDTH
        use = np.flatnonzero(good & (ln > 0))
        if use.size:
            s = _gather(arr, fs[use], ln[use])
            try:
                x = s.astype(np.float64)
            except ValueError:  # some field is not a number: find which, one by one
                x = np.empty(s.size)
                for q, b in enumerate(s.tolist()):
                    try:
                        x[q] = float(b)
                    except ValueError:
                        x[q] = np.inf  # marks it for the live parser below
            fin = np.isfinite(x)
            good[use[~fin]] = False
            v[use[fin]] = x[fin]
        return v, good

    def _times(self, arr: np.ndarray, fs: np.ndarray, fe: np.ndarray, ok: np.ndarray):
        ln = fe - fs
        out = np.empty(ln.size, dtype=object)
        good = ok & (ln <= MAX_TIME_WIDTH)
        use = np.flatnonzero(good)
        if use.size:
            s = _gather(arr, fs[use], ln[use])
            iso = _epoch_iso(s)
            if iso is not None:
                out[use] = iso
                return out, good
            enc = self.src.encoding
            for q, raw in zip(use.tolist(), s.tolist()):
                try:
                    out[q] = parse_time(raw.decode(enc).strip())
                except ValueError:
                    good[q] = False
        return out, good


_EPOCH_MAX = 253402300800.0  # 10000-01-01: datetime's range ends before it


def _epoch_iso(fields: np.ndarray) -> np.ndarray | None:
    """The ISO text ``parse_time`` gives for fields that are all epoch seconds, or None.

    Same arithmetic as CPython's ``datetime.fromtimestamp``: whole seconds by floor, the
    fraction to microseconds rounded half to even, carried into the seconds at 10^6;
    ``isoformat`` leaves the microseconds out when they are 0.  Anything else (a field
    that is not a number, a negative, non-finite or out-of-range time) returns None and
    the caller parses line by line, with the live parser's messages."""
    try:
        x = fields.astype(np.float64)
    except ValueError:
        return None
    if not (np.all(x >= 0.0) and np.all(x < _EPOCH_MAX)):  # NaN fails both
        return None
    sec = np.floor(x)
    us = np.rint((x - sec) * 1e6)
    carry = us >= 1e6
    us[carry] -= 1e6
    sec[carry] += 1.0
    stamp = sec.astype(np.int64).astype("datetime64[s]") + us.astype(np.int64).astype("timedelta64[us]")
    text = np.datetime_as_string(stamp, unit="us")  # YYYY-MM-DDTHH:MM:SS.ffffff
    return np.where(us == 0, np.char.add(text.astype("U19"), "+00:00"), np.char.add(text, "+00:00")).astype(object)


_EMPTY = (np.empty(0), np.empty(0, dtype=np.int64), np.empty(0, dtype=object))


def _gather(arr: np.ndarray, fs: np.ndarray, ln: np.ndarray) -> np.ndarray:
    """The bytes of fields [fs, fs + ln) as a fixed-width bytes array (NUL padded)."""
    w = int(ln.max())
    cols = np.arange(w)
    idx = fs[:, None] + cols[None, :]
    np.minimum(idx, arr.size - 1, out=idx)
    out = arr[idx]
    out[cols[None, :] >= ln[:, None]] = 0
    return np.ascontiguousarray(out).view(f"S{w}").ravel()


# ----------------------------------------------------------------------------------------
# the whole file


def replay_file_fast(path: Path, cfg: Config, src: SourceConfig, warn: TextIO | None = sys.stderr,
                     progress: Callable[[int], Any] | None = None, *, block_bytes: int = BLOCK_BYTES,
                     chunk: int = CHUNK, calibrator: Any = None, on_finding: Callable[[Finding], Any] | None = None):
    """Every line of ``path`` through bulk parsing and the detectors' vectorised scans.

    With ``on_finding``, each finding is handed over as soon as it is final (in the same
    order) and not kept, so memory stays flat however many there are; ``batch.findings``
    is then empty.

    Thresholds come from ``calibrator`` (default: the config's, with its disk cache),
    the same as the live route's.

    Returns a :class:`watcher.replay.ReplayResult` equal to the live route's (findings,
    quarantined lines, counts); ``Batch.values`` and ``Batch.backwards`` stay empty.
    """
    from watcher.replay import ReplayResult, UnusableInput, reason_kind

    if not path.exists():
        raise UnusableInput(f"{path}: no such file")
    if path.is_dir():
        raise UnusableInput(f"{path}: is a folder, not a file")
    name = str(path)
    cols = [Column(c.name, c.column) for c in cfg.characteristics_of(src.name)]
    parser = LineParser(src.name, src.format, cols, time_column=src.time_column, delimiter=src.delimiter,
                        decimal=src.decimal, encoding=src.encoding, file=name)
    if calibrator is None:
        from watcher.calibration import Calibrator

        calibrator = Calibrator.for_config(cfg)
    sink = _Sink(cfg, src, chunk, calibrator)
    reader = _CsvBlocks(parser, src, sink)
    reasons: Counter = Counter()
    shown = 0
    lines = 0
    offset = 0
    done = 0

    def report() -> None:
        nonlocal shown, done
        for q in reader.quarantined[done:]:
            reasons[reason_kind(q.reason)] += 1
            if warn is not None and shown < SHOW_BAD:
                shown += 1
                print(f"{q.file}:{q.line_no}: skipped: {q.reason}", file=warn)
        done = len(reader.quarantined)

    with open(path, "rb") as fh:
        rest = b""
        while True:
            got = fh.read(block_bytes)
            buf = rest + got if rest else got
            if not buf:
                break
            if got:
                cut = buf.rfind(b"\n") + 1
                if cut == 0:  # one line longer than a block: read on
                    rest = buf
                    continue
                data, rest = buf[:cut], buf[cut:]
            else:
                data, rest = buf, b""
            before = sink.readings
            n = reader.block(data, lines + 1, offset)
            lines += n
            offset += len(data)
            report()
            if progress is not None:
                progress(sink.readings - before)
            if on_finding is not None:
                for f in sink.take_final(lines + 1):
                    on_finding(f)
            if not got:
                break
    batch = Batch()
    batch.readings = sink.readings
    batch.findings = sink.findings()
    if on_finding is not None:
        for f in batch.findings:
            on_finding(f)
        batch.findings = []
    batch.quarantined = reader.quarantined
    batch.touched = sink.touched
    if lines:
        batch.per_file[name] = [lines, len(reader.quarantined)]
    if warn is not None and reasons:
        n = sum(reasons.values())
        detail = "; ".join(f"{r}: {c}" for r, c in reasons.most_common())
        print(f"{path}: {n} line(s) skipped ({detail})", file=warn)
    return ReplayResult(batch, lines, reasons)
