"""The route from a raw line to the monitors: times that go backwards are flagged, not dropped."""

from __future__ import annotations

from dataclasses import dataclass

from watcher.config import parse_config
from watcher.route import Route


@dataclass
class Line:
    path: str
    line_no: int
    offset: int
    data: bytes


def test_times_going_backwards_are_flagged_once_per_reading_and_kept(tmp_path):
    cfg = parse_config(f"""
state: {tmp_path / 'state'}
sources: [{{name: lathe, path: {tmp_path / 'pins.csv'}, time_column: time}}]
characteristics:
  - {{name: pin_dia, source: lathe, column: dia, baseline: {{mean: 6.0, sigma: 0.01}}, detectors: {{shewhart: {{}}}}}}
  - {{name: pin_len, source: lathe, column: len, baseline: {{mean: 40.0, sigma: 0.05}}, detectors: {{shewhart: {{}}}}}}
""")
    route = Route(cfg)
    path = str(tmp_path / "pins.csv")
    rows = ["time,dia,len",
            "2026-03-04T08:00:00+00:00,6.00,40.00",
            "2026-03-04T08:00:05+00:00,6.01,40.02",
            "2026-03-04T08:00:05+00:00,6.00,39.99",  # same time: not backwards
            "2026-03-04T07:59:59.500000+00:00,6.00,40.01",  # half a second before 08:00:00: backwards
            "2026-03-04T09:00:01+01:00,6.01,40.00",  # 08:00:01 UTC, later than 07:59:59.5: fine
            "2026-03-04T08:00:00,6.00,40.00"]  # fmt: skip  naive against aware: cannot tell, not flagged
    lines = [Line(path, i + 1, 0, (r + "\n").encode()) for i, r in enumerate(rows)]
    batch = route.take(cfg.sources[0], lines)
    assert batch.readings == 12  # every reading taken, backwards or not
    assert [(name, t) for name, t, _ in batch.backwards] == [("pin_dia", "2026-03-04T07:59:59.500000+00:00"),
                                                            ("pin_len", "2026-03-04T07:59:59.500000+00:00")]
    assert all(prev == "2026-03-04T08:00:05+00:00" for _, _, prev in batch.backwards)
