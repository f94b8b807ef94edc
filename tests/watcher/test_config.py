"""Configuration validation: every error names file:line:column, the key path, expected and found."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from watcher.config import ConfigError, load_config, parse_budget, parse_config, parse_duration

GOOD = """\
state: ./st
sources:
  - name: checkweigher
    path: data/cw-*.csv
    format: csv
    time_column: time
characteristics:
  - name: pack_mass
    source: checkweigher
    column: mass_g
    unit: g
    lsl: 495.0
    usl: 510.0
    window: 50
    baseline: {readings: 100}
alerts:
  - url: ${ALERT_URL}
digest:
  at: "06:30"
  to: [ "${DIGEST_URL}" ]
  folder: ./digests
"""

ENV = {"ALERT_URL": "json://127.0.0.1:9/x", "DIGEST_URL": "json://127.0.0.1:9/y"}


def _problems(text: str, env=ENV) -> list[str]:
    with pytest.raises(ConfigError) as e:
        parse_config(textwrap.dedent(text), "config.yaml", env)
    return e.value.problems


def test_example_config_is_valid():
    cfg = load_config(Path(__file__).parents[2] / "config.example.yaml", env={})
    assert [c.name for c in cfg.characteristics] == ["pack_mass", "pin_diameter"]
    assert cfg.characteristics[1].baseline.fixed


def test_good_config_values():
    cfg = parse_config(GOOD, "config.yaml", ENV)
    c = cfg.characteristics[0]
    assert (c.lsl, c.usl, c.window, c.baseline.readings) == (495.0, 510.0, 50, 100)
    assert cfg.alerts[0].url == ENV["ALERT_URL"]
    assert cfg.digest.at == "06:30" and cfg.digest.to == [ENV["DIGEST_URL"]]


def test_wrong_type_names_line_and_column():
    text = GOOD.replace("usl: 510.0", "usl: twelve")
    assert _problems(text) == ["config.yaml:13:5: characteristics[0].usl: expected a number, got 'twelve'"]


def test_unknown_key_suggests():
    text = GOOD.replace("    unit: g\n", "    unti: g\n")
    (p,) = _problems(text)
    assert p.startswith("config.yaml:11:5: characteristics[0].unti: unknown key 'unti'; did you mean 'unit'?")


def test_unknown_top_level_key():
    (p,) = _problems(GOOD + "alert:\n  - url: x\n")
    assert p == "config.yaml:22:1: alert: unknown key 'alert'; did you mean 'alerts'?"


def test_missing_environment_variable():
    (p,) = _problems(GOOD, env={"DIGEST_URL": "json://h/y"})
    assert p == "config.yaml:17:5: alerts[0].url: environment variable ALERT_URL is not set"


def test_unknown_source_reference():
    text = GOOD.replace("    source: checkweigher", "    source: checkweighr")
    (p,) = _problems(text)
    assert p == ("config.yaml:9:5: characteristics[0].source: expected the name of a source above, "
                 "got 'checkweighr'; did you mean 'checkweigher'?")


def test_bad_choice():
    (p,) = _problems(GOOD.replace("format: csv", "format: xlsx"))
    assert p == "config.yaml:5:5: sources[0].format: expected 'csv' or 'jsonl', got 'xlsx'"


def test_limits_out_of_order():
    (p,) = _problems(GOOD.replace("lsl: 495.0", "lsl: 515.0"))
    assert p == "config.yaml:13:5: characteristics[0].usl: expected usl above lsl (515), got 510"


def test_window_out_of_range():
    (p,) = _problems(GOOD.replace("window: 50", "window: 3"))
    assert p == "config.yaml:14:5: characteristics[0].window: expected a whole number of readings from 10 to 1000, got 3"


def test_missing_required_key():
    (p,) = _problems(GOOD.replace("    column: mass_g\n", ""))
    assert p == "config.yaml:8:5: characteristics[0]: missing required key 'column'"


def test_invalid_yaml_syntax():
    (p,) = _problems("sources: [\n  - name: a\n")
    assert p.startswith("config.yaml:2:3: not valid YAML")


def test_half_fixed_baseline():
    (p,) = _problems(GOOD.replace("{readings: 100}", "{mean: 500.2}"))
    assert p == "config.yaml:15:5: characteristics[0].baseline: expected both 'mean' and 'sigma' for a fixed baseline, got only one"


def test_bad_time_of_day():
    (p,) = _problems(GOOD.replace('at: "06:30"', 'at: "25:61"'))
    assert p == "config.yaml:19:3: digest.at: expected a time of day 'HH:MM', got '25:61'"


def test_alert_url_without_scheme():
    (p,) = _problems(GOOD, env={"ALERT_URL": "example.invalid", "DIGEST_URL": "json://h/y"})
    assert p == "config.yaml:17:5: alerts[0].url: expected an apprise URL such as 'mailto://...' or 'console://', got a value without ://"


def test_several_problems_all_reported_in_file_order():
    text = GOOD.replace("usl: 510.0", "usl: high").replace("format: csv", "format: xml")
    problems = _problems(text)
    assert [p.split(":")[1] for p in problems] == ["5", "13"]


def test_duplicate_characteristic_name():
    text = GOOD.replace("alerts:", """  - name: pack_mass
    source: checkweigher
    column: other
alerts:""")
    (p,) = _problems(text)
    assert p.startswith("config.yaml:16:5: characteristics[1].name: expected a unique characteristic name")


def test_unquoted_clock_is_understood():
    # YAML 1.1 reads an unquoted 06:30 as the sexagesimal number 390.
    cfg = parse_config(GOOD.replace('at: "06:30"', "at: 06:30"), "config.yaml", ENV)
    assert cfg.digest.at == "06:30"


def test_missing_file():
    with pytest.raises(ConfigError) as e:
        load_config("/nonexistent/linewatch.yaml")
    assert e.value.problems == ["/nonexistent/linewatch.yaml: no such file"]


@pytest.mark.parametrize("text,seconds", [("90s", 90), ("10m", 600), ("24h", 86400), ("2d", 172800), (30, 30)])
def test_durations(text, seconds):
    assert parse_duration(text) == seconds


def test_budgets():
    b = parse_budget("1 per 30 days")
    assert b.arl0(readings_per_hour=60) == pytest.approx(30 * 24 * 60)
    assert b.arl0(None) is None
    assert parse_budget("1 per 10000 readings").arl0(None) == 10000
    with pytest.raises(ValueError):
        parse_budget("rarely")
