"""GlobSource and fsdetect with real files, a writer thread and a real observer.

The reference is the set of lines written: each must come out exactly once.
The mount table samples are invented but follow the layout in proc(5)
(``/proc/[pid]/mountinfo``: fields up to the ``-`` separator, then type,
source, super options; octal escapes such as ``\\040`` for a space).
"""

from __future__ import annotations

import json
import os
import threading
import time

import pytest

from watcher.sources import glob_source as gs_mod
from watcher.sources.follow import Rotated
from watcher.sources.fsdetect import (is_network_path, mount_for, parse_mountinfo,
                                      parse_proc_mounts)
from watcher.sources.glob_source import GlobSource


def collect(src: GlobSource, want: int, timeout: float = 6.0):
    """Consumer loop as the daemon runs it: wait, read, (commit)."""
    out = []
    deadline = time.monotonic() + timeout
    while len(out) < want and time.monotonic() < deadline:
        src.wait(0.5)
        for f, lines, events in src.read_available():
            out.extend(lines)
    return out


def writer_thread(path, lines, pause=0.002, split_every=5):
    def run():
        with open(path, "ab", buffering=0) as fh:
            for i, line in enumerate(lines):
                if i % split_every == 0:
                    fh.write(line[:2])
                    time.sleep(pause)
                    fh.write(line[2:] + b"\n")
                else:
                    fh.write(line + b"\n")
                time.sleep(pause)
    t = threading.Thread(target=run)
    t.start()
    return t


def test_events_mode_picks_up_appends(tmp_path):
    p = tmp_path / "weights.csv"
    p.write_bytes(b"")
    lines = [b"%d,%.2f" % (i, 12 + i / 100) for i in range(150)]
    with GlobSource("checkweigher", str(p), poll="never") as src:
        assert src.mode == "events"
        t = writer_thread(p, lines)
        got = collect(src, len(lines))
        t.join()
    assert [ln.data for ln in got] == lines


def test_sources_in_one_directory_share_one_watch_and_wake_only_their_own(tmp_path):
    """Many sources, one inotify thread per directory: a source is woken by its own file only,
    keeps working after a neighbour stops, and the last to stop removes the watch."""
    a, b = tmp_path / "head1.csv", tmp_path / "head2.csv"
    a.write_bytes(b"")
    b.write_bytes(b"")
    sa = GlobSource("head1", str(a), poll="never", housekeeping=5.0)
    sb = GlobSource("head2", str(b), poll="never", housekeeping=5.0)
    sa.start()
    threads_with_one = threading.active_count()
    sb.start()
    try:
        assert sa._observer is sb._observer and sa._watch == sb._watch
        assert threading.active_count() == threads_with_one  # the second source adds no thread
        for src in (sa, sb):
            src.poll_ready()
        seen_by_b = []
        inner = sb._on_fs_event
        sb._on_fs_event = lambda event: (seen_by_b.append(event), inner(event))
        with open(a, "ab") as fh:
            fh.write(b"1,2.5\n")
        assert sa.wait(3.0) is True
        assert sb.wait(0.3) is False  # the neighbour's append does not wake this source
        assert seen_by_b == []  # nor is it handed to it: the watch's handler knows whose file it is
        assert [ln.data for ln in collect(sa, 1)] == [b"1,2.5"]
        sa.stop()
        sb.poll_ready()
        with open(b, "ab") as fh:
            fh.write(b"7,3.5\n")
        assert sb.wait(3.0) is True  # the shared watch outlives the first source's stop
        assert [ln.data for ln in collect(sb, 1)] == [b"7,3.5"]
    finally:
        sa.stop()
        sb.stop()
    assert sb._watch not in gs_mod._SHARED._users  # the last one unscheduled it


def test_a_single_file_source_and_a_glob_in_one_directory_each_get_their_own_events(tmp_path):
    """The watch's one handler sends an event on a single-file source's file to that source
    (and to the globbing ones, which judge for themselves) and any other event to all: the
    glob still sees its new files, the single-file source only its own appends."""
    one = tmp_path / "scale.csv"
    one.write_bytes(b"")
    (tmp_path / "shift-1.csv").write_bytes(b"")
    single = GlobSource("scale", str(one), poll="never", housekeeping=5.0)
    globbing = GlobSource("shifts", str(tmp_path / "shift-*.csv"), poll="never", housekeeping=5.0)
    single.start()
    globbing.start()
    try:
        assert single._watch == globbing._watch
        for src in (single, globbing):
            src.poll_ready()
        (tmp_path / "shift-2.csv").write_bytes(b"s2\n")  # a new file: the glob is told
        assert globbing.wait(3.0) is True
        assert [ln.data for ln in collect(globbing, 1)] == [b"s2"]
        assert single.wait(0.3) is False  # the glob's new file is not the single source's business
        globbing.poll_ready()
        with open(one, "ab") as fh:
            fh.write(b"12.5\n")
        assert single.wait(3.0) is True
        assert [ln.data for ln in collect(single, 1)] == [b"12.5"]
        assert globbing.wait(0.3) is False  # woken, it found nothing of its own: no change flagged
    finally:
        single.stop()
        globbing.stop()
    assert single._watch not in gs_mod._SHARED._users


def test_a_failing_source_handler_does_not_stop_the_shared_observer(tmp_path):
    a, b = tmp_path / "bad.csv", tmp_path / "good.csv"
    a.write_bytes(b"")
    b.write_bytes(b"")
    with GlobSource("bad", str(a), poll="never") as bad, GlobSource("good", str(b), poll="never") as good:
        def broken(event):
            raise RuntimeError("handler bug")

        bad._on_fs_event = broken
        for src in (bad, good):
            src.poll_ready()
        for _ in range(3):  # several events through the broken handler first
            with open(a, "ab") as fh:
                fh.write(b"1\n")
            time.sleep(0.05)
        with open(b, "ab") as fh:
            fh.write(b"2\n")
        assert good.wait(3.0) is True  # the shared thread survived the other source's error
        assert bad.wait(0.5) is True  # and the failing source was woken to look for itself
        assert [ln.data for ln in collect(good, 1)] == [b"2"]


def test_new_file_matching_the_glob_is_picked_up_while_running(tmp_path):
    (tmp_path / "shift-1.csv").write_bytes(b"s1-a\n")
    with GlobSource("line3", str(tmp_path / "shift-*.csv"), poll="never") as src:
        assert [ln.data for ln in collect(src, 1)] == [b"s1-a"]
        (tmp_path / "other.txt").write_bytes(b"not matched\n")
        (tmp_path / "shift-2.csv").write_bytes(b"s2-a\ns2-b\n")
        got = collect(src, 2)
    assert [(os.path.basename(ln.path), ln.data) for ln in got] == [
        ("shift-2.csv", b"s2-a"), ("shift-2.csv", b"s2-b")]


def test_polling_only_source_reads_without_inotify(tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b"")
    lines = [b"p%d" % i for i in range(40)]
    with GlobSource("lathe", str(p), poll="always", poll_interval=0.05) as src:
        assert src.mode == "polling"
        assert type(src._observer).__name__ == "PollingObserver"
        t = writer_thread(p, lines, pause=0.003)
        got = collect(src, len(lines))
        t.join()
    assert [ln.data for ln in got] == lines


def test_auto_mode_polls_on_a_network_file_system(tmp_path, monkeypatch):
    monkeypatch.setattr(gs_mod, "filesystem_type", lambda path: "nfs4")
    with GlobSource("remote", str(tmp_path / "*.csv"), poll="auto", poll_interval=0.05) as src:
        assert src.mode == "polling"
    monkeypatch.setattr(gs_mod, "filesystem_type", lambda path: "ext4")
    with GlobSource("local", str(tmp_path / "*.csv"), poll="auto") as src:
        assert src.mode == "events"


def test_rename_to_another_matching_name_is_not_read_twice(tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b"1\n2\n")
    with GlobSource("cw", str(tmp_path / "w.csv*"), poll="never", rotate_grace=0.1) as src:
        got = collect(src, 2)
        append = b"3\n"
        with open(p, "ab") as fh:
            fh.write(append)
        os.rename(p, tmp_path / "w.csv.1")   # still matches the glob
        p.write_bytes(b"a\nb\n")
        got += collect(src, 3)
        time.sleep(0.3)                       # past the grace: w.csv.1 changes hands
        with open(tmp_path / "w.csv.1", "ab") as fh:
            fh.write(b"4\n")                  # a late line in the rotated file: read once
        got += collect(src, 1)
        time.sleep(0.2)
        got += collect(src, 1, timeout=0.5)  # nothing more may come
    assert sorted(ln.data for ln in got) == sorted([b"1", b"2", b"3", b"4", b"a", b"b"])
    data = [ln.data for ln in got]
    assert data.index(b"3") < data.index(b"a")  # the old file's lines first


def test_oldest_file_first_by_mtime_then_name(tmp_path):
    for name, mtime in (("c.csv", 1000), ("a.csv", 3000), ("b.csv", 1000)):
        (tmp_path / name).write_bytes(b"x\n")
        os.utime(tmp_path / name, (mtime, mtime))
    src = GlobSource("order", str(tmp_path / "*.csv"), poll="never")
    src.start()
    try:
        ready = src.poll_ready()
        assert [os.path.basename(f.path) for f, _ in ready] == ["b.csv", "c.csv", "a.csv"]
    finally:
        src.stop()


def test_restore_after_restart_gives_exactly_the_remaining_lines(tmp_path):
    pattern = str(tmp_path / "shift*.csv")
    (tmp_path / "shift.csv").write_bytes(b"1\n2\n")
    src = GlobSource("s", pattern, poll="never", rotate_grace=0.05)
    src.start()
    first = collect(src, 2)
    state = json.loads(json.dumps(src.checkpoints()))  # committed
    src.stop()
    # While stopped: more lines, rotation to a matching name, a new file.
    with open(tmp_path / "shift.csv", "ab") as fh:
        fh.write(b"3\n4\n")
    os.rename(tmp_path / "shift.csv", tmp_path / "shift-old.csv")
    (tmp_path / "shift.csv").write_bytes(b"n1\nn2\n")
    src2 = GlobSource("s", pattern, poll="never", rotate_grace=0.05)
    src2.restore(state)
    src2.start()
    rest = collect(src2, 4)
    time.sleep(0.1)
    rest += collect(src2, 1, timeout=0.6)  # shift-old.csv must not be read again from 0
    src2.stop()
    assert [ln.data for ln in first] == [b"1", b"2"]
    assert [ln.data for ln in rest] == [b"3", b"4", b"n1", b"n2"]


def test_restore_replays_lines_read_but_not_committed(tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b"1\n2\n")
    src = GlobSource("s", str(p), poll="never")
    src.start()
    collect(src, 2)
    state = src.checkpoints()
    p.write_bytes(b"1\n2\n3\n4\n")  # same inode, appended
    collect(src, 2)                 # read, then "crash" before committing
    src.stop()
    src2 = GlobSource("s", str(p), poll="never")
    src2.restore(state)
    src2.start()
    got = collect(src2, 2)
    src2.stop()
    assert [(ln.data, ln.line_no) for ln in got] == [(b"3", 3), (b"4", 4)]


def test_rotation_event_reaches_the_caller(tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b"1\n")
    with GlobSource("s", str(p), poll="never") as src:
        collect(src, 1)
        os.rename(p, tmp_path / "w.old")
        p.write_bytes(b"2\n")
        events = []
        deadline = time.monotonic() + 3
        while not any(isinstance(e, Rotated) for e in events) and time.monotonic() < deadline:
            src.wait(0.5)
            for _f, _lines, ev in src.read_available():
                events.extend(ev)
    assert any(isinstance(e, Rotated) for e in events)


def test_idle_source_is_not_woken(tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b"1\n")
    with GlobSource("s", str(p), poll="never", housekeeping=5.0) as src:
        collect(src, 1)
        src.poll_ready()
        assert src.wait(0.3) is False  # nothing changed: no wake-up
        (tmp_path / "unrelated.log").write_bytes(b"zzz\n")
        assert src.wait(0.3) is False  # a non-matching file does not wake us either


def test_bad_poll_mode_is_refused_with_reason():
    with pytest.raises(ValueError, match="poll must be one of"):
        GlobSource("s", "/tmp/x.csv", poll="sometimes")


# ----------------------------------------------------------------- fsdetect

MOUNTINFO = (
    "22 1 8:1 / / rw,relatime shared:1 - ext4 /dev/sda1 rw\n"
    "30 22 0:30 / /mnt/line\\0403 rw,relatime - cifs //gaugepc/share rw,vers=3.0\n"
    "31 22 0:31 / /mnt/gauges rw - nfs4 plc:/export rw\n"
    "32 31 0:32 / /mnt/gauges/local rw - tmpfs tmpfs rw\n"
    "33 22 0:33 / /home/op/remote rw,nosuid - fuse.sshfs op@host: rw\n"
    "garbage line\n"
)


def test_mountinfo_longest_prefix_wins_and_escapes_are_decoded():
    mounts = parse_mountinfo(MOUNTINFO)
    assert len(mounts) == 5  # the garbage line is skipped
    assert mount_for("/mnt/line 3/w.csv", mounts).fstype == "cifs"
    assert mount_for("/mnt/gauges/a/w.csv", mounts).fstype == "nfs4"
    assert mount_for("/mnt/gauges/local/w.csv", mounts).fstype == "tmpfs"
    assert mount_for("/mnt/gaugesX/w.csv", mounts).fstype == "ext4"
    assert mount_for("/home/op/remote/x", mounts).fstype == "fuse.sshfs"


def test_proc_mounts_fallback_format():
    mounts = parse_proc_mounts("/dev/sda1 / ext4 rw 0 0\nsrv:/e /data nfs rw 0 0\n")
    assert mount_for("/data/x.csv", mounts).fstype == "nfs"


def test_is_network_path_uses_nearest_existing_ancestor(tmp_path):
    mounts = parse_mountinfo(f"1 0 0:1 / / rw - ext4 x rw\n2 1 0:2 / {tmp_path} rw - nfs s:/ rw\n")
    assert is_network_path(str(tmp_path / "not" / "yet" / "there"), mounts)
    assert not is_network_path("/usr", mounts)


def test_this_machine_mount_table_is_readable():
    # On Linux /proc is there; the detected type of the temp dir must be a name.
    from watcher.sources.fsdetect import filesystem_type, read_mounts
    if not os.path.exists("/proc/self/mountinfo"):
        pytest.skip("no /proc on this system")
    assert read_mounts()
    assert isinstance(filesystem_type("/tmp"), str)


@pytest.mark.parametrize("pattern_suffix", ["w.csv", "w.csv*"])
def test_writer_rotating_while_source_runs_loses_and_doubles_nothing(tmp_path, pattern_suffix):
    # A writer thread appends 600 lines and rotates (rename + new file) every
    # 150 lines while the consumer runs.  With the glob "w.csv*" the rotated
    # files still match, so they must not be read again by a second follower.
    p = tmp_path / "w.csv"
    p.write_bytes(b"")
    n, every = 600, 150
    expected = [b"L%04d" % i for i in range(n)]

    def writer():
        fh = open(p, "ab", buffering=0)
        for i, line in enumerate(expected):
            if i and i % every == 0:
                fh.write(b"")  # nothing pending: complete lines only
                os.rename(p, tmp_path / f"w.csv.{i // every}")
                old, fh = fh, open(p, "ab", buffering=0)
                old.close()
            fh.write(line + b"\n")
            time.sleep(0.001)
        fh.close()

    with GlobSource("rot", str(tmp_path / pattern_suffix), poll="never", rotate_grace=0.1) as src:
        t = threading.Thread(target=writer)
        t.start()
        got = collect(src, n, timeout=10)
        t.join()
        time.sleep(0.3)
        got += collect(src, 1, timeout=0.5)  # anything read twice would show up here
    data = [ln.data for ln in got]
    assert sorted(data) == expected            # each line exactly once
    if pattern_suffix == "w.csv":
        assert data == expected                # one path: strictly in write order


def test_restore_reads_files_new_since_the_stop_from_their_start(tmp_path):
    (tmp_path / "a.csv").write_bytes(b"a1\n")
    src = GlobSource("s", str(tmp_path / "*.csv"), poll="never", start_at_end=True)
    src.start()
    assert collect(src, 1, timeout=0.5) == []  # start_at_end: existing lines skipped on first start
    with open(tmp_path / "a.csv", "ab") as fh:
        fh.write(b"a2\n")
    assert [ln.data for ln in collect(src, 1)] == [b"a2"]
    state = json.loads(json.dumps(src.checkpoints()))
    src.stop()
    (tmp_path / "b.csv").write_bytes(b"b1\n")  # appeared while stopped
    state["files"][str(tmp_path / "gone" / "x.txt")] = dict(next(iter(state["files"].values())),
                                                          path=str(tmp_path / "gone" / "x.txt"))
    src2 = GlobSource("s", str(tmp_path / "*.csv"), poll="never", start_at_end=True)
    src2.restore(state)
    src2.start()
    got = collect(src2, 1)
    files = src2.checkpoints()["files"]
    src2.stop()
    assert [ln.data for ln in got] == [b"b1"]
    assert sorted(os.path.basename(p) for p in files) == ["a.csv", "b.csv"]  # the stale entry dropped
