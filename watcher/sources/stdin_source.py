"""Lines from a byte stream (normally ``sys.stdin.buffer``), read in a thread.

A pipe cannot be re-read, so this source has **no resume**: after a restart it
starts counting again at line 1, byte 0, and whatever the writer sent while
the daemon was down is gone.  Offsets and line numbers count from the start of
this run's stream.  Line endings ``\\n`` and ``\\r\\n`` are stripped; a last line
without newline at end of stream is delivered with ``terminated=False``.

>>> import io
>>> src = StdinSource(io.BytesIO(b"4.01\\r\\n4.03\\n4.0"), name="pins")
>>> src.start(); src.join(2)
>>> [(ln.line_no, ln.offset, ln.data, ln.terminated) for ln in src.drain()]
[(1, 0, b'4.01', True), (2, 6, b'4.03', True), (3, 11, b'4.0', False)]
>>> src.eof
True
"""

from __future__ import annotations

import queue
import sys
import threading
from typing import BinaryIO

from .follow import RawLine

__all__ = ["StdinSource"]


class StdinSource:
    """Read ``stream`` line by line into a queue of :class:`RawLine`.

    ``changed_event`` is set whenever lines arrive or the stream ends, so the
    consumer can wait on it like on a :class:`GlobSource`.  The queue is
    bounded (``max_queue`` lines): a slow consumer makes the reader thread
    wait, it never drops lines.  Lines longer than ``max_line`` bytes are
    delivered in ``max_line``-sized pieces with ``terminated=False``.
    """

    def __init__(self, stream: BinaryIO | None = None, *, name: str = "stdin",
                 max_queue: int = 100_000, max_line: int = 1 << 20) -> None:
        self.stream = stream if stream is not None else sys.stdin.buffer
        self.name = name
        self.path = f"<{name}>"
        self.max_line = max_line
        self.queue: "queue.Queue[RawLine]" = queue.Queue(maxsize=max_queue)
        self.changed_event = threading.Event()
        self.eof = False
        self.error: BaseException | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name=f"stdin-{self.name}", daemon=True)
            self._thread.start()

    def join(self, timeout: float | None = None) -> None:
        if self._thread is not None:
            self._thread.join(timeout)

    def _run(self) -> None:
        offset = 0
        line_no = 0

        def emit(raw: bytes) -> None:
            nonlocal offset, line_no
            terminated = raw.endswith(b"\n")
            data = raw[:-1] if terminated else raw
            if terminated and data.endswith(b"\r"):
                data = data[:-1]
            line_no += 1
            self.queue.put(RawLine(self.path, line_no, offset, offset + len(raw), data, terminated))
            offset += len(raw)
            self.changed_event.set()

        pending: bytes | None = None  # a piece without newline: end of stream or an over-long line
        try:
            while True:
                raw = self.stream.readline(self.max_line)
                if pending is not None:
                    if not raw:
                        self.eof = True  # set before the last piece is visible to the consumer
                    emit(pending)
                    pending = None
                if not raw:
                    break
                if raw.endswith(b"\n"):
                    emit(raw)
                else:
                    pending = raw
        except (OSError, ValueError) as exc:  # closed or broken stream
            self.error = exc
            if pending is not None:
                self.eof = True
                emit(pending)
        finally:
            self.eof = True
            self.changed_event.set()

    def drain(self, max_lines: int = 100_000) -> list[RawLine]:
        """Lines received so far (at most ``max_lines``); clears ``changed_event`` first."""
        self.changed_event.clear()
        out: list[RawLine] = []
        while len(out) < max_lines:
            try:
                out.append(self.queue.get_nowait())
            except queue.Empty:
                break
        return out

    def wait(self, timeout: float | None = None) -> bool:
        return self.changed_event.wait(timeout)
