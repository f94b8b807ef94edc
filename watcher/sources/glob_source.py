"""A source of lines from one file or a glob of files, woken by file system events.

:class:`GlobSource` keeps one :class:`~watcher.sources.follow.FileFollower` per
matching path and picks up new matches while running.  A watchdog observer
sets :attr:`GlobSource.changed_event` when something changes in the watched
directory; the consumer blocks on that event, so an idle source costs no CPU
beyond the observer's own wait:

.. code-block:: python

    src = GlobSource("checkweigher", "/data/line3/weights-*.csv")
    src.start()
    while running:
        src.wait()                              # blocks; returns on change or housekeeping timeout
        for follower, events in src.poll_ready():   # oldest file first
            log(events)
            lines = follower.read_lines()
            log(follower.take_events())
            process(lines)
        store.commit(src.checkpoints())         # only after processing

Event delivery
--------------
``poll='never'``: inotify (watchdog ``Observer``, one for the whole process, shared
by every source; see :class:`_SharedObserver`).  ``poll='always'``: stat
polling every ``poll_interval`` seconds (watchdog ``PollingObserver``).
``poll='auto'``: polling when the watched directory is on a network file
system (:mod:`watcher.sources.fsdetect`), where inotify never hears of writes
made by another machine; inotify otherwise.  Whatever the mode, ``wait()``
returns at least every ``housekeeping`` seconds so a missed event costs
latency, not data.

Ordering: ``poll_ready`` lists files oldest first (modification time, then
name), so a finished shift file is read to its end before the next one.

One file, one reader: a file renamed from one matching name to another (e.g.
``w.csv`` -> ``w.csv.1`` with the glob ``w.csv*``) stays with the follower that
was reading it until that follower has finished it; then the follower of the
new name continues from the same position.  Nothing is read twice.

Checkpoints: :meth:`checkpoints` returns plain data (per-path follower
checkpoints plus positions of finished files that were renamed to matching
names); :meth:`restore` rebuilds from it, finishing files rotated while the
daemon was stopped (see :meth:`FileFollower.resume`).
"""

from __future__ import annotations

import fnmatch
import glob as glob_mod
import os
import threading
import time
from typing import Any

from watchdog.events import (DirCreatedEvent, DirDeletedEvent, DirMovedEvent, FileClosedEvent,
                             FileCreatedEvent, FileDeletedEvent, FileModifiedEvent, FileMovedEvent,
                             FileSystemEvent, FileSystemEventHandler)
from watchdog.observers import Observer
from watchdog.observers.polling import PollingObserver

from .follow import FileFollower, FollowEvent, RawLine
from .fsdetect import filesystem_type, is_network_fstype

__all__ = ["GlobSource", "POLL_MODES", "path_matches"]

POLL_MODES = ("auto", "always", "never")
GLOB_CHARS = frozenset("*?[")
# Changes only: our own opens and reads would otherwise wake us ("opened",
# "closed_no_write" events) in an endless loop.
WAKE_EVENTS = [FileModifiedEvent, FileCreatedEvent, FileMovedEvent, FileDeletedEvent, FileClosedEvent,
               DirCreatedEvent, DirMovedEvent, DirDeletedEvent]
IGNORED_EVENT_TYPES = frozenset({"opened", "closed_no_write"})
STATE_VERSION = 1


def _has_glob(part: str) -> bool:
    return any(c in GLOB_CHARS for c in part)


def _split_pattern(pattern: str) -> tuple[str, list[str]]:
    """(base directory without glob characters, remaining components)."""
    parts = pattern.split(os.sep)
    for i, part in enumerate(parts):
        if _has_glob(part):
            base = os.sep.join(parts[:i]) or os.sep
            return base, parts[i:]
    return os.path.dirname(pattern) or os.sep, [os.path.basename(pattern)]


def path_matches(path: str, pattern: str) -> bool:
    """Glob semantics (as :func:`glob.glob` with ``recursive=True``): ``*`` stays
    within one path component, ``**`` spans any number of components.

    >>> path_matches("/d/a/w-1.csv", "/d/*/w-*.csv"), path_matches("/d/a/b/w.csv", "/d/*/w.csv")
    (True, False)
    >>> path_matches("/d/a/b/w.csv", "/d/**/w.csv")
    True
    """
    def rec(p: list[str], q: list[str]) -> bool:
        if not q:
            return not p
        if q[0] == "**":
            return any(rec(p[i:], q[1:]) for i in range(len(p) + 1))
        return bool(p) and fnmatch.fnmatchcase(p[0], q[0]) and rec(p[1:], q[1:])

    return rec(path.split(os.sep), pattern.split(os.sep))


class _SharedObserver:
    """One inotify observer for every source of the process.

    watchdog gives each watched directory one thread and each observer one more, which
    dispatches to the handlers; sources watching the same directory share its watch.  With
    an observer per source, 50 sources meant some 150 threads taking turns at the GIL with
    the reading path, one event per appended line each.  Each watch has one handler
    (:class:`_DirectoryWake`) that knows its sources; the last source to stop unschedules it.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._observer: Any = None
        self._users: dict[Any, _DirectoryWake] = {}

    def schedule(self, source: "GlobSource", path: str, recursive: bool) -> tuple[Any, Any]:
        with self._lock:
            if self._observer is None or not self._observer.is_alive():
                obs = Observer()
                obs.daemon = True
                obs.start()
                self._observer, self._users = obs, {}
            known = {(w.path, w.is_recursive): w for w in self._users}
            watch = known.get((path, recursive))
            if watch is None:
                wake = _DirectoryWake()
                watch = self._observer.schedule(wake, path, recursive=recursive, event_filter=WAKE_EVENTS)
                self._users[watch] = wake
            self._users[watch].add(source)
            return self._observer, watch

    def release(self, obs: Any, watch: Any, source: "GlobSource") -> None:
        with self._lock:
            if obs is not self._observer:
                return  # an observer since replaced (it had died): nothing of it is left to release
            wake = self._users.get(watch)
            if wake is None:
                return
            wake.remove(source)
            if wake.sources:
                return
            self._users.pop(watch, None)
            try:
                obs.unschedule(watch)
            except KeyError:  # the watch went with its directory
                pass


_SHARED = _SharedObserver()


def _wake(source: "GlobSource", event: FileSystemEvent) -> None:
    try:
        source._on_fs_event(event)
    except Exception:  # the observer thread is shared by every source: never let one stop it
        source._rescan = True
        source.changed_event.set()  # the source looks for itself on its next pass


class _DirectoryWake(FileSystemEventHandler):
    """The one handler of a watch: hands each event to the sources it may concern.

    An event on the file of a single-file source goes to that source and to the globbing
    ones only, not to every source in the directory (fifty sources in one folder, ten
    appends a second each, made 25,000 handler calls a second).  An event on any other
    file (a new file, a rotated one being drained) goes to all, each deciding for itself.
    The lists are replaced, never changed in place, so the observer thread can go through
    them while a source starts or stops."""

    def __init__(self) -> None:
        self.sources: list[GlobSource] = []
        self.globbing: list[GlobSource] = []
        self.exact: dict[str, list[GlobSource]] = {}

    def add(self, source: "GlobSource") -> None:
        self._set(self.sources + [source])

    def remove(self, source: "GlobSource") -> None:
        self._set([s for s in self.sources if s is not source])

    def _set(self, sources: list["GlobSource"]) -> None:
        exact: dict[str, list[GlobSource]] = {}
        for s in sources:
            if not s._glob:
                exact.setdefault(s.pattern, []).append(s)
        self.exact = exact
        self.globbing = [s for s in sources if s._glob]
        self.sources = sources

    def on_any_event(self, event: FileSystemEvent) -> None:
        exact = self.exact
        hit = exact.get(os.fsdecode(event.src_path))
        dest = getattr(event, "dest_path", "")
        if dest:
            also = exact.get(os.fsdecode(dest))
            if also:
                hit = (hit or []) + also
        for source in (self.globbing + hit) if hit else self.sources:
            _wake(source, event)


class GlobSource:
    """Lines from every file matching ``path`` (a file name or a glob).

    Parameters
    ----------
    name: the source's name (for messages).
    path: a file or a glob (``*``, ``?``, ``[...]``, ``**``); ``~`` is expanded.
    poll: ``'auto'`` | ``'always'`` | ``'never'`` (see module docstring).
    poll_interval: seconds between stat polls when polling.
    rotate_grace: seconds a rotated-away file is kept open after it last grew.
    start_at_end: files present at the very first start *without* checkpoint
        are read from their end instead of their start (default: start).
    housekeeping: longest wait between wake-ups without events (seconds).
    """

    def __init__(self, name: str, path: str, *, poll: str = "auto", poll_interval: float = 1.0,
                 rotate_grace: float = 2.0, start_at_end: bool = False,
                 housekeeping: float = 5.0) -> None:
        if poll not in POLL_MODES:
            raise ValueError(f"source {name!r}: poll must be one of {', '.join(POLL_MODES)}, got {poll!r}")
        if not poll_interval > 0:
            raise ValueError(f"source {name!r}: poll_interval must be > 0 seconds, got {poll_interval!r}")
        self.name = name
        self.pattern = os.path.abspath(os.path.expanduser(os.fspath(path)))
        self.poll = poll
        self.poll_interval = float(poll_interval)
        self.rotate_grace = float(rotate_grace)
        self.start_at_end = start_at_end
        self.housekeeping = float(housekeeping)
        self._glob = _has_glob(self.pattern)
        self.base_dir, rest = _split_pattern(self.pattern)
        self.recursive = len(rest) > 1 or "**" in rest
        self.changed_event = threading.Event()
        self.mode: str | None = None  # "events" | "polling" once started
        self.fstype: str | None = None
        self._followers: dict[str, FileFollower] = {}
        self._released: dict[tuple[int, int], dict[str, Any]] = {}
        self._reserved: set[tuple[int, int]] = set()
        self._observer = None
        self._watch: Any = None  # our watch on the shared observer (events mode)
        self._lock = threading.Lock()
        self._rescan = True
        self._first_scan = True
        self._last_scan = 0.0
        self._pending_events: list[FollowEvent] = []

    # -- life cycle -------------------------------------------------------

    def start(self) -> None:
        """Start the observer thread (idempotent)."""
        if self._observer is not None:
            return
        self.fstype = filesystem_type(self.base_dir)
        use_polling = self.poll == "always" or (
            self.poll == "auto" and self.fstype is not None and is_network_fstype(self.fstype))
        self.mode = "polling" if use_polling else "events"
        self._schedule()
        self.changed_event.set()  # first poll_ready reads what is there

    def _schedule(self) -> None:
        if self._observer is not None or not os.path.isdir(self.base_dir):
            return  # base directory missing: housekeeping rescans until it exists
        if self.mode == "polling":  # its own observer: the interval is this source's
            wake = _DirectoryWake()
            wake.add(self)
            obs = PollingObserver(timeout=self.poll_interval)
            obs.schedule(wake, self.base_dir, recursive=self.recursive, event_filter=WAKE_EVENTS)
            obs.daemon = True
            obs.start()
            self._watch = None
        else:
            obs, self._watch = _SHARED.schedule(self, self.base_dir, self.recursive)
        self._observer = obs

    def stop(self) -> None:
        """Stop the observer and close all files."""
        obs, self._observer = self._observer, None
        if obs is not None and self._watch is not None:
            _SHARED.release(obs, self._watch, self)
        elif obs is not None:
            obs.stop()
            obs.join(timeout=5)
        for f in self._followers.values():
            f.close()
        self._followers.clear()

    def __enter__(self) -> "GlobSource":
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- waiting ----------------------------------------------------------

    @property
    def wait_timeout(self) -> float:
        """How long a consumer may block before calling :meth:`poll_ready` anyway."""
        t = self.housekeeping
        if self.mode == "polling":
            t = min(t, max(self.poll_interval, 0.05) * 2)
        if any(f.draining for f in tuple(self._followers.values())):
            t = min(t, max(self.rotate_grace / 2, 0.05))
        if self._observer is None:
            t = min(t, self.poll_interval)
        return t

    def wait(self, timeout: float | None = None) -> bool:
        """Block until a change is signalled or ``min(timeout, wait_timeout)`` passes.
        Returns True if woken by a change."""
        t = self.wait_timeout if timeout is None else min(timeout, self.wait_timeout)
        return self.changed_event.wait(t)

    def _on_fs_event(self, event: FileSystemEvent) -> None:
        if event.event_type in IGNORED_EVENT_TYPES:
            return
        paths = [os.fsdecode(event.src_path)]
        dest = getattr(event, "dest_path", "")
        if dest:
            paths.append(os.fsdecode(dest))
        # Sources in one directory share its watch, so most events are another source's:
        # the cheap tests first.
        glob = self._glob
        relevant = any(p in self._followers or (path_matches(p, self.pattern) if glob else p == self.pattern)
                       for p in paths)
        if not relevant and not any(f.draining for f in tuple(self._followers.values())):
            return  # unrelated file in the same directory
        if event.event_type in ("created", "moved", "deleted"):
            self._rescan = True
        self.changed_event.set()

    # -- reading ----------------------------------------------------------

    def poll_ready(self) -> list[tuple[FileFollower, list[FollowEvent]]]:
        """Followers that may have data, oldest file first, with their pending events.

        Clears :attr:`changed_event` first, so a change made while the caller
        reads wakes the next :meth:`wait`.  Call ``read_lines()`` on each
        follower, then ``take_events()`` again for anything noticed while reading.
        """
        self.changed_event.clear()
        now = time.monotonic()
        with self._lock:
            if self._observer is None and self.mode is not None:
                self._schedule()
            if self._rescan or now - self._last_scan >= self.housekeeping or self._observer is None:
                self._rescan = False
                self._scan()
                self._last_scan = now
            ready: list[tuple[float, str, FileFollower, list[FollowEvent]]] = []
            self._collect_released()
            for path, f in list(self._followers.items()):
                f.refresh()
                events = f.take_events()
                if events or f.has_unread():
                    ready.append((f.mtime(), path, f, events))
                elif _has_glob(self.pattern) and not f.is_open and not os.path.exists(path):
                    f.close()
                    del self._followers[path]
            ready.sort(key=lambda r: (r[0], r[1]))
            return [(f, ev) for _, _, f, ev in ready]

    def read_available(self, max_bytes: int = 1 << 20) -> list[tuple[FileFollower, list[RawLine], list[FollowEvent]]]:
        """Convenience: ``poll_ready`` then ``read_lines`` on each; events include those
        noticed while reading.  Commit :meth:`checkpoints` after processing the lines."""
        out = []
        for f, events in self.poll_ready():
            lines = f.read_lines(max_bytes)
            events = events + f.take_events()
            self._collect_released()
            if lines or events:
                out.append((f, lines, events))
        return out

    @property
    def followers(self) -> dict[str, FileFollower]:
        return dict(self._followers)

    # -- one reader per file ----------------------------------------------

    def _held(self, ident: tuple[int, int], asker: str) -> bool:
        if ident in self._reserved:
            return True
        return any(ident in f.identities() for p, f in self._followers.items() if p != asker)

    def _collect_released(self) -> None:
        for f in tuple(self._followers.values()):
            for st in f.take_released():
                self._released[(st["dev"], st["ino"])] = st

    def _claim(self, path: str, dev: int, ino: int) -> dict[str, Any] | bool | None:
        ident = (dev, ino)
        # A follower that just finished this file must hand over its position
        # before anyone may read the file from 0.
        self._collect_released()
        if self._held(ident, path):
            return False
        return self._released.pop(ident, None)

    def _matches(self) -> list[str]:
        found = glob_mod.glob(self.pattern, recursive=True) if _has_glob(self.pattern) else (
            [self.pattern] if os.path.exists(self.pattern) else [])
        return sorted(p for p in found if os.path.isfile(p))

    def _scan(self) -> None:
        matches = self._matches()
        if not _has_glob(self.pattern) and self.pattern not in self._followers:
            matches = [self.pattern]  # a single path is followed even before it exists
        for path in matches:
            if path in self._followers:
                continue
            f = FileFollower(path, rotate_grace=self.rotate_grace, claim=self._claim,
                             start_at_end=self.start_at_end and self._first_scan)
            self._followers[path] = f
        self._first_scan = False
        # Forget finished-file positions whose file is gone or changed.
        for ident, st in list(self._released.items()):
            if not any(self._ident_of(p) == ident for p in matches):
                del self._released[ident]

    @staticmethod
    def _ident_of(path: str) -> tuple[int, int] | None:
        try:
            st = os.stat(path)
        except OSError:
            return None
        return st.st_dev, st.st_ino

    # -- checkpoints ------------------------------------------------------

    def checkpoints(self) -> dict[str, Any]:
        """Plain data to commit after the lines read so far were processed."""
        with self._lock:
            self._collect_released()
            return {
                "version": STATE_VERSION,
                "source": self.name,
                "files": {p: f.checkpoint() for p, f in self._followers.items()},
                "finished": list(self._released.values()),
            }

    def restore(self, state: dict[str, Any]) -> list[FollowEvent]:
        """Rebuild followers from :meth:`checkpoints` data; call before :meth:`start`
        or before the first :meth:`poll_ready`.  Returns the resume events.

        Files matching the pattern that have no checkpoint are new since the
        stop and are read from their start.  Checkpoints of paths the pattern
        no longer matches are ignored."""
        if state.get("version") != STATE_VERSION:
            raise ValueError(f"source {self.name!r}: unknown checkpoint version {state.get('version')!r}")
        events: list[FollowEvent] = []
        with self._lock:
            for f in self._followers.values():
                f.close()
            self._followers.clear()
            self._released = {(st["dev"], st["ino"]): st for st in state.get("finished", [])}
            # Positions of paths the (possibly edited) pattern no longer covers are dropped.
            cks = {p: ck for p, ck in state.get("files", {}).items()
                   if (path_matches(p, self.pattern) if _has_glob(self.pattern) else p == self.pattern)}
            # Files named in any checkpoint are reserved while the followers are
            # rebuilt, so a file renamed to another matching name while we were
            # stopped is finished by its own follower, not read again from 0.
            def idents(ck: dict[str, Any]) -> set[tuple[int, int]]:
                out = {(ck["dev"], ck["ino"])} if ck.get("ino") is not None else set()
                if ck.get("previous"):
                    out.add((ck["previous"]["dev"], ck["previous"]["ino"]))
                return out

            self._reserved = set().union(*(idents(ck) for ck in cks.values()))
            candidates = self._matches()
            for path, ck in cks.items():
                mine = idents(ck)
                self._reserved -= mine
                f = FileFollower.resume(ck, candidates=candidates, rotate_grace=self.rotate_grace,
                                        claim=self._claim)
                self._reserved |= mine
                self._followers[path] = f
                events.extend(f.take_events())
            self._reserved.clear()
            self._first_scan = False
            self._rescan = True
        return events
