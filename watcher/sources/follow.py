"""Follow one growing file line by line, surviving rotation, truncation and restarts.

A :class:`FileFollower` follows one *path*.  The file currently behind the path
is tracked by an identity -- ``(st_dev, st_ino)`` plus a *fingerprint*, the
SHA-256 of the file's first ``min(size, 256)`` bytes (re-taken as the file
grows until 256 bytes exist).  The fingerprint is what tells a recycled inode
(old file deleted, new file given the same inode number) or a file rewritten
in place from the file we were reading.

Position and commit protocol
----------------------------
``read_lines()`` advances the follower's *in-memory* position past the lines it
returns.  The caller processes those lines and only then persists
``checkpoint()`` (plain, JSON-able data), ideally in the same database
transaction as whatever state the lines changed.  After a crash the caller
rebuilds the follower with :meth:`FileFollower.resume` from the last committed
checkpoint, so lines read but not committed are read again and lines committed
are not: nothing is lost or doubled.

Lines
-----
Only complete lines are returned: bytes after the last ``\\n`` stay unread until
the writer finishes the line.  ``\\n`` and ``\\r\\n`` endings are both accepted;
``RawLine.data`` excludes the ending.  ``offset`` is the byte where the line
starts, ``end_offset`` the byte just after its ending; ``line_no`` is 1-based
within the file.  The one exception to "complete lines only": when a file has
been rotated away or deleted and has stayed unchanged for ``rotate_grace``
seconds, bytes left after its last newline can never be completed; they are
returned as a final line with ``terminated=False`` (not dropped silently).

Rotation, truncation, deletion
------------------------------
* *Rotation* (a new inode at the path): the old open handle is read to its end
  first; it is kept open for ``rotate_grace`` seconds after it last grew (a
  writer may still be flushing to it) and its lines are always returned before
  the new file's.  The new file is read from offset 0.
* *Truncation* (same inode, size below our offset) or *rewrite in place* (same
  inode, fingerprint changed): reported with a :class:`Truncated` event and
  read again from the start.
* *Deletion* while open: the open handle is finished like a rotated file, then
  forgotten.  If the path appears again it is opened from offset 0 (unless it
  is the very file finished before, renamed back: then it continues).  A
  rename followed by a new file a moment later may be seen as
  :class:`Deleted` then :class:`Opened` rather than :class:`Rotated`; the
  lines read are the same.
* A fragment (bytes after the last newline) left in a rotated file does not
  hold back the new file's lines; if it is completed within the grace it is
  returned then, otherwise as an unterminated line when the grace ends.
* Lines from a rotated file carry the followed path (the name they were
  written under), not the name the file was renamed to.
* Read errors other than "not found" (permissions, stale NFS handles) keep
  the position and are reported once per distinct error (:class:`ReadFailed`).

Resume
------
``FileFollower.resume(checkpoint, candidates=...)`` checks the file now at the
path.  Same identity and size >= offset: continue at the offset.  Otherwise the
checkpointed file was rotated or replaced while we were down: it is looked for
by identity (same ``st_dev``/``st_ino`` *and* matching fingerprint) among
``candidates`` (e.g. the glob's other matches) and the path's siblings in its
directory.  Found: its remainder is read from the checkpointed offset, then the
new file from 0.  Not found: the new file is read from 0 and a
:class:`RemainderLost` event says the rest of the old file could not be found.

Example:

>>> import os, tempfile
>>> d = tempfile.mkdtemp()
>>> p = os.path.join(d, "weights.csv")
>>> with open(p, "wb") as fh:
...     _ = fh.write(b"12.1\\n12.3\\r\\n12.")
>>> f = FileFollower(p)
>>> [(ln.line_no, ln.data) for ln in f.read_lines()]
[(1, b'12.1'), (2, b'12.3')]
>>> with open(p, "ab") as fh:
...     _ = fh.write(b"0\\n")
>>> [(ln.line_no, ln.data, ln.offset) for ln in f.read_lines()]
[(3, b'12.0', 11)]
>>> ck = f.checkpoint(); (ck["offset"], ck["line_no"])
(16, 3)
>>> f.close()
"""

from __future__ import annotations

import hashlib
import os
import stat as stat_mod
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable, Iterable

__all__ = [
    "FINGERPRINT_BYTES",
    "RawLine",
    "FollowEvent",
    "Opened",
    "Rotated",
    "Truncated",
    "Deleted",
    "Resumed",
    "RemainderLost",
    "ReadFailed",
    "FileFollower",
]

#: How many leading bytes the fingerprint covers once the file is that long.
FINGERPRINT_BYTES = 256

CHECKPOINT_VERSION = 1
MAX_RELEASED = 64

#: ``claim(path, dev, ino)`` -> None (free), False (held elsewhere) or a state dict.
Claim = Callable[[str, int, int], "dict[str, Any] | bool | None"]


@dataclass(frozen=True, slots=True)
class RawLine:
    """One complete line as read from a file or stream (ending stripped)."""

    path: str
    line_no: int
    offset: int
    end_offset: int
    data: bytes
    #: False only for a final fragment of a file that can no longer grow.
    terminated: bool = True


# ----------------------------------------------------------------- events


@dataclass(frozen=True, slots=True)
class FollowEvent:
    """Something that happened to a followed file; ``message()`` is for the log."""

    path: str

    def message(self) -> str:  # pragma: no cover - overridden
        return f"{self.path}: {type(self).__name__}"


@dataclass(frozen=True, slots=True)
class Opened(FollowEvent):
    dev: int
    ino: int
    offset: int

    def message(self) -> str:
        return f"{self.path}: opened (inode {self.ino}) at byte {self.offset}"


@dataclass(frozen=True, slots=True)
class Rotated(FollowEvent):
    old_ino: int
    new_ino: int

    def message(self) -> str:
        return (f"{self.path}: replaced by a new file (inode {self.old_ino} -> "
                f"{self.new_ino}); finishing the old one, then reading the new one from the start")


@dataclass(frozen=True, slots=True)
class Truncated(FollowEvent):
    old_offset: int
    size: int
    reason: str  # "shrank" | "rewritten"

    def message(self) -> str:
        what = ("shrank below the read position" if self.reason == "shrank"
                else "was rewritten in place (first bytes changed)")
        return (f"{self.path}: file {what} (was at byte {self.old_offset}, size now "
                f"{self.size}); reading again from the start")


@dataclass(frozen=True, slots=True)
class Deleted(FollowEvent):
    ino: int

    def message(self) -> str:
        return (f"{self.path}: no longer there (deleted or renamed away); finishing what was "
                f"written to it, then waiting for the path to reappear")


@dataclass(frozen=True, slots=True)
class ReadFailed(FollowEvent):
    error: str

    def message(self) -> str:
        return f"{self.path}: cannot read ({self.error}); keeping the position and trying again"


@dataclass(frozen=True, slots=True)
class Resumed(FollowEvent):
    offset: int
    line_no: int
    how: str

    def message(self) -> str:
        return f"{self.path}: resumed at byte {self.offset} (line {self.line_no}): {self.how}"


@dataclass(frozen=True, slots=True)
class RemainderLost(FollowEvent):
    offset: int
    line_no: int
    ino: int

    def message(self) -> str:
        return (f"{self.path}: the file read before the restart (inode {self.ino}, at byte "
                f"{self.offset}, line {self.line_no}) was replaced and cannot be found; "
                f"lines written to it after that point are not read")


# ----------------------------------------------------------------- helpers


def _fingerprint(fd: int, size: int) -> tuple[str, int]:
    n = min(size, FINGERPRINT_BYTES)
    head = os.pread(fd, n, 0) if n else b""
    return hashlib.sha256(head).hexdigest(), len(head)


def _prefix_matches(fd: int, fingerprint: str, fp_len: int) -> bool:
    head = os.pread(fd, fp_len, 0) if fp_len else b""
    return len(head) == fp_len and hashlib.sha256(head).hexdigest() == fingerprint


class _Handle:
    """One open file plus the read position in it."""

    __slots__ = ("fh", "dev", "ino", "fingerprint", "fp_len", "offset", "line_no",
                 "last_growth", "last_size")

    def __init__(self, fh, offset: int = 0, line_no: int = 0) -> None:
        self.fh = fh
        st = os.fstat(fh.fileno())
        self.dev, self.ino = st.st_dev, st.st_ino
        self.fingerprint, self.fp_len = _fingerprint(fh.fileno(), st.st_size)
        self.offset, self.line_no = offset, line_no
        self.last_growth = time.monotonic()
        self.last_size = st.st_size

    @property
    def fd(self) -> int:
        return self.fh.fileno()

    def size(self) -> int:
        return os.fstat(self.fd).st_size

    def same_identity(self, st: os.stat_result) -> bool:
        return (st.st_dev, st.st_ino) == (self.dev, self.ino)

    def refresh_fingerprint(self, size: int) -> bool:
        """Re-check the prefix; extend it while under 256 bytes. False if it changed."""
        if size < self.fp_len or not _prefix_matches(self.fd, self.fingerprint, self.fp_len):
            return False
        if self.fp_len < FINGERPRINT_BYTES and size > self.fp_len:
            self.fingerprint, self.fp_len = _fingerprint(self.fd, size)
        return True

    def note_size(self, size: int) -> None:
        if size != self.last_size:
            self.last_size = size
            self.last_growth = time.monotonic()

    def state(self) -> dict[str, Any]:
        return {"dev": self.dev, "ino": self.ino, "fingerprint": self.fingerprint,
                "fingerprint_len": self.fp_len, "offset": self.offset, "line_no": self.line_no}

    def read(self, path: str, budget: int, size: int, final: bool) -> tuple[list[RawLine], int, bool]:
        """Complete lines from ``offset``, about ``budget`` bytes of them.

        Returns ``(lines, bytes_consumed, more)`` where ``more`` says complete
        lines may remain (the budget ran out).  A line longer than the budget
        is still returned whole (soft limit: a long line never blocks
        progress).  With ``final`` a trailing fragment is returned as an
        unterminated line.
        """
        out: list[RawLine] = []
        if size <= self.offset:
            return out, 0, False
        want = min(size - self.offset, max(budget, 1))
        buf = os.pread(self.fd, want, self.offset)
        last_nl = buf.rfind(b"\n")
        while last_nl < 0 and self.offset + len(buf) < size:  # one long line
            more = os.pread(self.fd, 65536, self.offset + len(buf))
            if not more:
                break
            idx = more.find(b"\n")
            if idx >= 0:
                last_nl = len(buf) + idx
                buf += more[: idx + 1]
                break
            buf += more
        start = self.offset
        pos = start
        if last_nl >= 0:
            for piece in buf[: last_nl + 1].split(b"\n")[:-1]:
                end = pos + len(piece) + 1
                if piece.endswith(b"\r"):
                    piece = piece[:-1]
                self.line_no += 1
                out.append(RawLine(path, self.line_no, pos, end, piece))
                pos = end
        self.offset = pos
        more_left = start + len(buf) < size
        if final and not more_left and pos < size:
            rest = os.pread(self.fd, size - pos, pos)
            if rest:
                data = rest[:-1] if rest.endswith(b"\r") else rest
                self.line_no += 1
                out.append(RawLine(path, self.line_no, pos, pos + len(rest), data, terminated=False))
                self.offset = pos + len(rest)
        return out, self.offset - start, more_left

    def close(self) -> None:
        try:
            self.fh.close()
        except OSError:
            pass


def _open_at(path: str) -> tuple[Any, os.stat_result] | None:
    try:
        fh = open(path, "rb", buffering=0)
    except (FileNotFoundError, NotADirectoryError, IsADirectoryError, PermissionError):
        return None
    st = os.fstat(fh.fileno())
    if not stat_mod.S_ISREG(st.st_mode):
        fh.close()
        return None
    return fh, st


def _find_by_identity(state: dict[str, Any], places: Iterable[str]) -> str | None:
    """A path among ``places`` holding the file of ``state`` (dev, ino, fingerprint)."""
    seen: set[str] = set()
    for p in places:
        if p in seen:
            continue
        seen.add(p)
        try:
            st = os.stat(p)
        except OSError:
            continue
        if (st.st_dev, st.st_ino) != (state["dev"], state["ino"]):
            continue
        try:
            with open(p, "rb", buffering=0) as fh:
                if _prefix_matches(fh.fileno(), state["fingerprint"], state["fingerprint_len"]):
                    return p
        except OSError:
            continue
    return None


def _siblings(path: str) -> list[str]:
    d = os.path.dirname(os.path.abspath(path)) or "."
    try:
        names = sorted(os.listdir(d))
    except OSError:
        return []
    return [os.path.join(d, n) for n in names]


# ----------------------------------------------------------------- follower


class FileFollower:
    """Follow one path; see the module docstring for the full contract.

    Parameters
    ----------
    path:
        The file to follow.  It need not exist yet.
    rotate_grace:
        Seconds a rotated-away or deleted file is kept open after it last grew.
    start_at_end:
        For a brand-new follower (no checkpoint) of an existing file: skip what
        is already there.  Files that appear later are always read from 0.
    claim:
        Used by a source following several paths (:class:`GlobSource`) so one
        file is never read by two followers.  Called as ``claim(path, dev, ino)``
        before a file newly found at the path is opened; returns ``None`` (free:
        read from 0), ``False`` (another follower holds it: leave it) or a
        state dict (``dev``, ``ino``, ``fingerprint``, ``fingerprint_len``,
        ``offset``, ``line_no``) to continue from, e.g. a file renamed from one
        matching name to another after its old follower finished with it.
    """

    def __init__(self, path: str | os.PathLike[str], *, rotate_grace: float = 2.0,
                 start_at_end: bool = False, claim: Claim | None = None) -> None:
        self.path = os.fspath(path)
        self.rotate_grace = float(rotate_grace)
        self._claim = claim
        self.released: list[dict[str, Any]] = []
        self._history: deque[dict[str, Any]] = deque(maxlen=8)
        self._last_error: str | None = None
        self._cur: _Handle | None = None
        self._old: _Handle | None = None   # rotated away / deleted, still draining
        self._old_path: str | None = None  # where the draining file lives (for messages)
        self._events: list[FollowEvent] = []
        self._closed = False
        self._try_open(at_end=start_at_end)

    # -- public -----------------------------------------------------------

    def read_lines(self, max_bytes: int = 1 << 20) -> list[RawLine]:
        """Complete lines available now (about ``max_bytes`` at most).

        Advances the in-memory position; commit :meth:`checkpoint` only after
        the returned lines were processed.  Events noticed on the way are
        collected for :meth:`take_events`.
        """
        if self._closed:
            return []
        out: list[RawLine] = []
        try:
            self._read_into(out, max_bytes)
        except OSError as exc:  # e.g. a stale NFS handle: keep the position, retry next time
            self._note_error(exc)
        else:
            self._last_error = None
        return out

    def _read_into(self, out: list[RawLine], max_bytes: int) -> None:
        budget = max_bytes
        self._check_path()
        old_more = False
        if self._old is not None:
            old = self._old
            size = old.size()
            old.note_size(size)
            quiet = time.monotonic() - old.last_growth >= self.rotate_grace
            lines, used, old_more = old.read(self.path, budget, size, final=quiet)
            out.extend(lines)
            budget -= used
            if quiet and not old_more and old.offset >= size:
                self._release(old)
                old.close()
                self._old = None
                self._old_path = None
        # The old file's lines always come first: read the new one only when
        # the old one has no complete line left.
        if self._cur is not None and budget > 0 and not old_more:
            cur = self._cur
            size = cur.size()
            if size < cur.offset:
                self._restart_current(size, "shrank")
            elif not cur.refresh_fingerprint(size):
                self._restart_current(size, "rewritten")
            cur.note_size(size)
            lines, _, _ = cur.read(self.path, budget, size, final=False)
            out.extend(lines)

    def _note_error(self, exc: OSError) -> None:
        text = f"{type(exc).__name__}: {exc}"
        if text != self._last_error:  # one event per distinct error, not one per poll
            self._events.append(ReadFailed(self.path, text))
        self._last_error = text

    def take_events(self) -> list[FollowEvent]:
        """Events since the last call (opened, rotated, truncated, deleted, resumed...)."""
        ev, self._events = self._events, []
        return ev

    @property
    def draining(self) -> bool:
        """True while a rotated-away or deleted file is still being finished."""
        return self._old is not None

    @property
    def is_open(self) -> bool:
        return self._cur is not None or self._old is not None

    def identities(self) -> list[tuple[int, int]]:
        """(dev, ino) of the files this follower holds open."""
        return [(h.dev, h.ino) for h in (self._cur, self._old) if h is not None]

    def mtime(self) -> float:
        """Modification time of the file being read first (old handle if draining)."""
        h = self._old or self._cur
        if h is None:
            return float("inf")
        try:
            return os.fstat(h.fd).st_mtime
        except OSError:
            return float("inf")

    def checkpoint(self) -> dict[str, Any]:
        """Plain-data position, to be committed after the lines were processed."""
        ck: dict[str, Any] = {"version": CHECKPOINT_VERSION, "path": self.path}
        if self._cur is not None:
            ck.update(self._cur.state())
        else:
            ck.update({"dev": None, "ino": None, "fingerprint": None, "fingerprint_len": 0,
                       "offset": 0, "line_no": 0})
        ck["previous"] = self._old.state() if self._old is not None else None
        return ck

    @classmethod
    def resume(cls, checkpoint: dict[str, Any], *, candidates: Iterable[str] = (),
               rotate_grace: float = 2.0, claim: Claim | None = None) -> "FileFollower":
        """Rebuild a follower from a committed :meth:`checkpoint` (see module docstring).

        ``candidates`` are extra paths where a file rotated while we were
        stopped may now be (the path's own directory is always searched).
        """
        if checkpoint.get("version", CHECKPOINT_VERSION) != CHECKPOINT_VERSION:
            raise ValueError(f"checkpoint for {checkpoint.get('path')!r}: unknown version "
                             f"{checkpoint.get('version')!r} (expected {CHECKPOINT_VERSION})")
        self = cls.__new__(cls)
        self.path = os.fspath(checkpoint["path"])
        self.rotate_grace = float(rotate_grace)
        self._claim = claim
        self.released = []
        self._history = deque(maxlen=8)
        self._last_error = None
        self._cur = self._old = None
        self._old_path = None
        self._events = []
        self._closed = False
        candidates = list(candidates)
        prev = checkpoint.get("previous")
        main = checkpoint if checkpoint.get("ino") is not None else None

        opened = _open_at(self.path)
        here: _Handle | None = None
        if opened is not None:
            here = _Handle(opened[0])

        def matches_here(state: dict[str, Any]) -> bool:
            return (here is not None and (here.dev, here.ino) == (state["dev"], state["ino"])
                    and here.size() >= state["fingerprint_len"]
                    and _prefix_matches(here.fd, state["fingerprint"], state["fingerprint_len"]))

        # The file we were draining when we stopped (rotated before the stop).
        if prev is not None:
            found = _find_by_identity(prev, [*candidates, *_siblings(self.path)])
            if found is not None:
                self._adopt_old(found, prev)
            else:
                self._events.append(RemainderLost(self.path, prev["offset"], prev["line_no"], prev["ino"]))

        if main is None:
            if here is not None and self._take(here):
                self._cur = here
                self._events.append(Opened(self.path, here.dev, here.ino, here.offset))
            return self

        if matches_here(main):
            assert here is not None
            size = here.size()
            if size >= main["offset"]:
                here.offset, here.line_no = main["offset"], main["line_no"]
                here.refresh_fingerprint(size)
                self._cur = here
                self._events.append(Resumed(self.path, main["offset"], main["line_no"], "same file"))
                return self
            self._cur = here
            self._events.append(Truncated(self.path, main["offset"], size, "shrank"))
            return self

        # The path now holds another file (or nothing): look for the old one.
        if self._old is None:
            places = [p for p in [*candidates, *_siblings(self.path)]]
            found = _find_by_identity(main, places)
        else:
            found = None  # already draining an older one; keep it simple
        if found is not None:
            self._adopt_old(found, main)
            self._events.append(Resumed(found, main["offset"], main["line_no"],
                                        f"rotated while stopped; finishing it as {found}, "
                                        f"then reading the new {self.path} from the start"))
        else:
            self._events.append(RemainderLost(self.path, main["offset"], main["line_no"], main["ino"]))
        if here is not None and self._take(here):
            self._cur = here
            self._events.append(Opened(self.path, here.dev, here.ino, here.offset))
        return self

    def refresh(self) -> None:
        """Notice rotation, deletion and truncation now (events) without reading lines."""
        if self._closed:
            return
        try:
            self._check_path()
            cur = self._cur
            if cur is not None:
                size = cur.size()
                if size < cur.offset:
                    self._restart_current(size, "shrank")
                elif not cur.refresh_fingerprint(size):
                    self._restart_current(size, "rewritten")
        except OSError as exc:
            self._note_error(exc)

    def has_unread(self) -> bool:
        """True if some bytes beyond the read position exist (maybe only a fragment),
        or a rotated/deleted file is still being finished."""
        if self._old is not None:
            return True
        if self._cur is None:
            return False
        try:
            return self._cur.size() != self._cur.offset
        except OSError:
            return True

    def take_released(self) -> list[dict[str, Any]]:
        """States of files this follower finished with after rotation/deletion."""
        r, self.released = self.released, []
        return r

    def close(self) -> None:
        for h in (self._cur, self._old):
            if h is not None:
                h.close()
        self._cur = self._old = None
        self._closed = True

    def __repr__(self) -> str:
        c = self.checkpoint()
        return f"FileFollower({self.path!r}, offset={c['offset']}, line_no={c['line_no']})"

    # -- internals --------------------------------------------------------

    def _release(self, h: _Handle) -> None:
        st = h.state()
        self.released.append(st)
        del self.released[:-MAX_RELEASED]  # bounded when nobody collects them
        self._history.append(st)

    def _take(self, h: _Handle) -> bool:
        """Whether ``h`` (a file newly found at the path) is ours, and from where.

        A file this follower finished earlier (renamed away and back) continues
        where it was; the claim callback may deny the file or give a position.
        """
        verdict = self._claim(self.path, h.dev, h.ino) if self._claim is not None else None
        if verdict is False:
            h.close()
            return False
        if not isinstance(verdict, dict):
            verdict = next((st for st in reversed(self._history)
                            if (st["dev"], st["ino"]) == (h.dev, h.ino)), None)
        if isinstance(verdict, dict):
            size = h.size()
            if (size >= verdict["offset"] and size >= verdict["fingerprint_len"]
                    and _prefix_matches(h.fd, verdict["fingerprint"], verdict["fingerprint_len"])):
                h.offset, h.line_no = verdict["offset"], verdict["line_no"]
                h.refresh_fingerprint(size)
        return True

    def _adopt_old(self, found: str, state: dict[str, Any]) -> None:
        opened = _open_at(found)
        if opened is None:
            return
        h = _Handle(opened[0], state["offset"], state["line_no"])
        h.refresh_fingerprint(h.size())
        self._old, self._old_path = h, found

    def _try_open(self, at_end: bool = False) -> None:
        opened = _open_at(self.path)
        if opened is None:
            return
        fh, st = opened
        h = _Handle(fh)
        if not self._take(h):
            return
        self._cur = h
        if at_end and h.offset == 0:
            # Skip to just after the last complete line already present.
            size = st.st_size
            tail_start = max(0, size - 65536)
            chunk = os.pread(fh.fileno(), size - tail_start, tail_start)
            idx = chunk.rfind(b"\n")
            if idx >= 0 or tail_start == 0:
                self._cur.offset = tail_start + idx + 1 if idx >= 0 else 0
                self._cur.line_no = 0  # unknown count of skipped lines; numbering restarts
        self._events.append(Opened(self.path, self._cur.dev, self._cur.ino, self._cur.offset))

    def _restart_current(self, size: int, reason: str) -> None:
        cur = self._cur
        assert cur is not None
        self._events.append(Truncated(self.path, cur.offset, size, reason))
        cur.offset = cur.line_no = 0
        cur.fingerprint, cur.fp_len = _fingerprint(cur.fd, size)

    def _retire_current(self) -> None:
        """Move the current handle to the draining slot."""
        cur = self._cur
        assert cur is not None
        if self._old is not None:
            # Two rotations within the grace: the older one is given up now
            # (its complete lines were read already; see read_lines order).
            self._release(self._old)
            self._old.close()
        cur.last_growth = time.monotonic()
        self._old, self._old_path, self._cur = cur, None, None

    def _check_path(self) -> None:
        try:
            st = os.stat(self.path)
        except (FileNotFoundError, NotADirectoryError):
            st = None
        # Other errors (permissions, stale NFS handle) say nothing about the
        # file being gone: they propagate to read_lines/refresh (ReadFailed).
        cur = self._cur
        if cur is not None:
            if st is None:
                self._events.append(Deleted(self.path, cur.ino))
                self._retire_current()
            elif not cur.same_identity(st):
                opened = _open_at(self.path)
                if opened is None:
                    return
                old_ino = cur.ino
                self._retire_current()
                h = _Handle(opened[0])
                if self._take(h):
                    self._cur = h
                self._events.append(Rotated(self.path, old_ino, h.ino))
            return
        if st is None:
            return
        if self._old is not None and self._old.same_identity(st):
            # The file we were finishing is back under its name: keep reading it.
            self._cur, self._old, self._old_path = self._old, None, None
            return
        self._try_open()
