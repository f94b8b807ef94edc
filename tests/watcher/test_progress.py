"""The replay progress bar: on a real terminal (a pseudo-terminal here) and nowhere else."""

from __future__ import annotations

import io
import os

from watcher.progress import Progress, progress_for


def test_nothing_when_not_a_terminal(tmp_path):
    r, w = os.pipe()
    with os.fdopen(w, "w") as pipe, open(tmp_path / "log.txt", "w") as f:
        assert progress_for(10_000, pipe) is None
        assert progress_for(10_000, f) is None
    os.close(r)
    assert progress_for(10_000, io.StringIO()) is None


def _read_all(fd: int) -> str:
    """Everything written to the pty so far: one read may return only part of it."""
    import select

    data = b""
    while select.select([fd], [], [], 0.5)[0]:
        chunk = os.read(fd, 10_000)
        if not chunk:
            break
        data += chunk
    return data.decode()


def test_a_bar_on_a_terminal():
    master, slave = os.openpty()
    try:
        with os.fdopen(slave, "w", closefd=False) as tty:
            p = progress_for(1_000_000, tty)
            assert isinstance(p, Progress)
            p(5_000, 250_000)
            p.close()
        out = _read_all(master)
    finally:
        os.close(master)
        os.close(slave)
    assert "25%" in out and "5,000 readings" in out
    assert out.endswith("\n")  # close() ends the line (the terminal may show it as \r\n)


def test_rate_and_time_left_from_a_known_clock():
    ticks = iter([0.0, 10.0, 10.0, 20.0, 20.0])
    buf = io.StringIO()
    p = Progress(1000, buf, clock=lambda: next(ticks))
    p(50_000, 250)  # a quarter read in 10 s: 5,000 readings/s, 30 s left
    line = buf.getvalue().split("\r")[-1]
    assert "25%" in line and "5,000/s" in line and "0:30 left" in line
    p(150_000, 1000)
    p.close()
    assert "100%" in buf.getvalue().split("\r")[-1] and buf.getvalue().endswith("\n")


def test_redraws_are_limited():
    t = [0.0]
    buf = io.StringIO()
    p = Progress(10**6, buf, clock=lambda: t[0])
    for i in range(1000):
        t[0] = i * 0.001  # 1000 updates in one second
        p(1, i * 1000)
    assert buf.getvalue().count("\r") <= 9


def test_readings_and_rate_only_without_byte_positions():
    ticks = iter([0.0, 4.0, 4.0])
    buf = io.StringIO()
    p = Progress(1000, buf, clock=lambda: next(ticks))
    p(8_000)
    line = buf.getvalue().split("\r")[-1]
    assert "8,000 readings" in line and "2,000/s" in line and "%" not in line
