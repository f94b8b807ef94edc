"""The line parser: every line is readings or a quarantined line with a reason; nothing escapes."""

from __future__ import annotations

import math

from hypothesis import given, settings, strategies as st

from watcher.parse import Column, LineParser, parse_time, to_float


def csv_parser(**kw) -> LineParser:
    p = LineParser("cw", "csv", [Column("pack_mass", "mass_g"), Column("head_temp", "temp_c")],
                   time_column="time", file="cw.csv", **kw)
    readings, bad = p.parse(b"time,mass_g,temp_c", 1, 0)
    assert readings == [] and bad is None
    return p


def test_good_csv_line():
    p = csv_parser()
    readings, bad = p.parse(b"2026-03-02T06:00:00Z,500.12,21.5", 2, 20)
    assert bad is None
    assert [(r.characteristic, r.value) for r in readings] == [("pack_mass", 500.12), ("head_temp", 21.5)]
    assert readings[0].time == "2026-03-02T06:00:00+00:00"
    assert (readings[0].file, readings[0].line_no, readings[0].offset) == ("cw.csv", 2, 20)


def test_crlf_and_bom():
    p = LineParser("cw", "csv", [Column("m", "mass_g")], file="f")
    p.parse("\ufefftime,mass_g\r".encode(), 1, 0)
    readings, bad = p.parse(b"1767337200,499.5\r", 2, 10)
    assert bad is None and readings[0].value == 499.5


def test_decimal_comma_with_semicolon():
    p = LineParser("cw", "csv", [Column("m", "mass_g")], delimiter=";", decimal=",", file="f")
    p.parse(b"time;mass_g", 1, 0)
    readings, bad = p.parse(b"1767337200;499,75", 2, 12)
    assert bad is None and readings[0].value == 499.75


def test_empty_cell_means_not_measured():
    p = csv_parser()
    readings, bad = p.parse(b"1767337200,,21.5", 2, 0)
    assert bad is None and [r.characteristic for r in readings] == ["head_temp"]


def reason(p: LineParser, line: bytes) -> str:
    readings, bad = p.parse(line, 7, 100)
    assert readings == [] and bad is not None
    assert (bad.file, bad.line_no, bad.offset) == ("cw.csv", 7, 100)
    return bad.reason


def test_bad_lines_have_reasons():
    p = csv_parser()
    assert reason(p, b"1767337200,500.1") == "wrong number of fields: expected 3, got 2"
    assert reason(p, b"1767337200,heavy,21.5") == "column 'mass_g': not a number: 'heavy'"
    assert reason(p, b"1767337200,nan,21.5") == "column 'mass_g': 'nan' is not a finite number"
    assert reason(p, b"1767337200,inf,21.5") == "column 'mass_g': 'inf' is not a finite number"
    assert reason(p, b"yesterday,500.1,21.5").startswith("unparseable time:")
    assert reason(p, b"1767337200,\xff\xfe,21.5") == "not valid utf-8 text at byte 11"
    assert reason(p, b"17673\x0037200,500,21") == "binary data (NUL byte) in a text line"


def test_header_change_is_quarantined_and_adopted():
    p = csv_parser()
    assert reason(p, b"time,temp_c,mass_g").startswith("header changed mid-file")
    readings, bad = p.parse(b"1767337200,21.5,500.5", 8, 140)
    assert bad is None
    assert {r.characteristic: r.value for r in readings} == {"pack_mass": 500.5, "head_temp": 21.5}


def test_header_missing_a_column():
    p = LineParser("cw", "csv", [Column("m", "mass_g")], file="cw.csv")
    readings, bad = p.parse(b"time,weight", 1, 0)
    assert bad.reason == "header lacks column(s) mass_g"


def test_jsonl_lines():
    p = LineParser("lathe", "jsonl", [Column("pin", "d_mm")], time_column="t", file="l.jsonl")
    readings, bad = p.parse(b'{"t": 1767337200, "d_mm": 8.001}', 1, 0)
    assert bad is None and readings[0].value == 8.001 and readings[0].time.startswith("2026-01-02T07:00:00")
    assert p.parse(b"8.002", 2, 30)[0][0].value == 8.002  # a bare number feeds the only characteristic
    for line, why in [(b'{"d_mm": NaN}', "is not a finite number"), (b"{oops", "not valid JSON"),
                      (b'["a"]', "expected a JSON object"), (b'{"d_mm": true}', "a boolean is not a number"),
                      (b'{"d_mm": "x"}', "not a number")]:
        r, bad = p.parse(line, 3, 40)
        assert r == [] and why in bad.reason, line


def test_raw_text_is_capped_at_1kb():
    p = csv_parser()
    _, bad = p.parse(b"x" * 5000, 9, 0)
    assert len(bad.raw) == 1024


def test_time_forms():
    assert parse_time(0) == "1970-01-01T00:00:00+00:00"
    assert parse_time("2026-03-02 06:00:00+01:00") == "2026-03-02T06:00:00+01:00"
    assert to_float(" 12.5 ") == 12.5


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=200))
def test_fuzz_bytes_never_escape(data):
    p = csv_parser()
    readings, bad = p.parse(data, 5, 0)
    assert (bad is None) or readings == []
    for r in readings:
        assert math.isfinite(r.value)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text(max_size=60), max_size=20), st.sampled_from(["csv", "jsonl"]))
def test_fuzz_lines_are_readings_or_quarantined(lines, fmt):
    p = LineParser("s", fmt, [Column("a", "a"), Column("b", "b")], time_column="time", file="f")
    if fmt == "csv":
        p.parse(b"time,a,b", 1, 0)
    for i, line in enumerate(lines, start=2):
        data = line.replace("\n", " ").encode("utf-8", errors="surrogatepass")
        readings, bad = p.parse(data, i, 0)
        if bad is not None:
            assert readings == [] and bad.reason and bad.line_no == i
        else:
            assert all(math.isfinite(r.value) for r in readings)
