"""A one-line progress bar for long replays, on a terminal only.

``progress_for(total_bytes, stream)`` returns ``None`` when ``stream`` is
not a terminal (a pipe, a file, a CI log): nothing is written there, so
``--json`` output and logs stay clean.  On a terminal it returns a
:class:`Progress`; call it as ``p(new_readings, bytes_done)`` after each
block (readings added since the last call; bytes of the file read so far)
as often as you like -- it redraws at most ``MAX_REDRAWS_PER_S`` times a
second -- and ``p.close()`` at the end, which ends the line.

The line shows the share of the file read, the readings so far, readings
per second, and the time left, estimated as the bytes still to read over
the byte rate so far (without ``bytes_done`` only readings and rate)::

    replay [##########----------]  50%  120,000 readings  41,000/s  0:03 left

>>> import io
>>> progress_for(1000, io.StringIO()) is None
True
>>> p = Progress(1000, io.StringIO(), clock=iter([0.0, 0.0, 2.0, 2.0, 4.0]).__next__)
>>> p(2000, 500); p.close()
>>> p.stream.getvalue().split("\\r")[-1].split()[:5]
['replay', '[##########----------]', '50%', '2,000', 'readings']
"""

from __future__ import annotations

import sys
import time
from typing import Callable, TextIO

MAX_REDRAWS_PER_S = 8
BAR = 20


def _clock_text(seconds: float) -> str:
    s = int(round(seconds))
    h, rem = divmod(s, 3600)
    m, s = divmod(rem, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


class Progress:
    """A redraw-limited progress line (see the module docstring)."""

    def __init__(self, total_bytes: int, stream: TextIO, label: str = "replay",
                 clock: Callable[[], float] = time.monotonic):
        self.total = max(int(total_bytes), 1)
        self.stream = stream
        self.label = label
        self.clock = clock
        self.t0 = clock()
        self.last_draw = -1.0
        self.bytes: int | None = None
        self.readings = 0
        self.width = 0

    def line(self, now: float) -> str:
        elapsed = max(now - self.t0, 1e-9)
        rate = self.readings / elapsed
        if self.bytes is None:
            return "  ".join([self.label, f"{self.readings:,} readings", f"{rate:,.0f}/s"])
        frac = min(self.bytes / self.total, 1.0)
        fill = int(round(frac * BAR))
        parts = [self.label, "[" + "#" * fill + "-" * (BAR - fill) + "]", f"{100 * frac:3.0f}%",
                 f"{self.readings:,} readings", f"{rate:,.0f}/s"]
        if 0 < self.bytes < self.total:
            left = (self.total - self.bytes) / (self.bytes / elapsed)
            parts.append(f"{_clock_text(left)} left")
        elif self.bytes >= self.total:
            parts.append(f"{_clock_text(elapsed)} in all")
        return "  ".join(parts)

    def _draw(self, now: float) -> None:
        text = self.line(now)
        pad = max(self.width - len(text), 0)
        self.stream.write("\r" + text + " " * pad)
        self.stream.flush()
        self.width = len(text)
        self.last_draw = now

    def __call__(self, new_readings: int, bytes_done: int | None = None) -> None:
        self.readings += int(new_readings)
        if bytes_done is not None:
            self.bytes = int(bytes_done)
        now = self.clock()
        if self.last_draw < 0 or now - self.last_draw >= 1.0 / MAX_REDRAWS_PER_S:
            self._draw(now)

    def close(self) -> None:
        self._draw(self.clock())
        self.stream.write("\n")
        self.stream.flush()


def progress_for(total_bytes: int, stream: TextIO | None = None, label: str = "replay") -> Progress | None:
    """A :class:`Progress` for ``stream`` (default stderr) when it is a terminal, else None."""
    stream = sys.stderr if stream is None else stream
    try:
        tty = stream.isatty()
    except (AttributeError, ValueError):  # closed or file-like without isatty
        tty = False
    return Progress(total_bytes, stream, label) if tty else None
