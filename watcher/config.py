"""The YAML configuration: schema, validation and the typed result.

Everything is validated before anything runs.  Every error names the file,
line and column of the offending key, the key path, what was expected and
what was found, e.g.::

    config.yaml:14:7: characteristics[2].usl: expected a number, got 'twelve'

Unknown keys are errors with a did-you-mean suggestion.  ``${NAME}`` in a
string is replaced by the environment variable NAME (a missing one is an
error), so secrets such as alert URLs need not be written in the file.
"""

from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path as FsPath
from typing import Any, Callable

from watcher.yamlpos import Path, Positioned, YamlError, path_text

DEFAULT_STATE = "./linewatch-state"
DEFAULT_WINDOW = 50
DEFAULT_BASELINE_READINGS = 100
# One false episode per 10,000 readings per characteristic, where no reading rate is known.
DEFAULT_FALSE_ALARM_READINGS = 10_000


class ConfigError(Exception):
    """One or more problems in a configuration file; ``problems`` lists them all."""

    def __init__(self, problems: list[str]):
        self.problems = problems
        super().__init__("\n".join(problems))


# --------------------------------------------------------------------------------------
# Typed result


@dataclass
class SourceConfig:
    name: str
    kind: str = "file"  # file | stdin | mqtt
    path: str | None = None
    format: str = "csv"
    time_column: str | None = None
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    poll: str = "auto"
    poll_interval: float = 2.0
    broker: str | None = None
    topic: str | None = None
    gap: float | None = None  # seconds of silence before a silence episode
    working_hours: tuple[str, str] | None = None


@dataclass
class BaselineConfig:
    readings: int = DEFAULT_BASELINE_READINGS
    mean: float | None = None
    sigma: float | None = None
    file: str | None = None
    column: str | None = None

    @property
    def fixed(self) -> bool:
        return self.mean is not None


@dataclass
class CharacteristicConfig:
    name: str
    source: str
    column: str
    unit: str = ""
    target: float | None = None
    lsl: float | None = None
    usl: float | None = None
    window: int = DEFAULT_WINDOW
    baseline: BaselineConfig = field(default_factory=BaselineConfig)
    detectors: dict[str, dict[str, Any]] | None = None  # None = the default set
    false_alarms: "Budget | None" = None
    readings_per_hour: float | None = None
    subgroup: int | None = None


@dataclass(frozen=True)
class Budget:
    """At most ``count`` false episodes per ``readings`` readings, or per ``seconds``."""

    count: float
    readings: float | None = None
    seconds: float | None = None

    def arl0(self, readings_per_hour: float | None) -> float | None:
        """The budget as readings between false findings, or None where no rate is known."""
        if self.readings is not None:
            return self.readings / self.count
        if readings_per_hour:
            return self.seconds / 3600.0 * readings_per_hour / self.count
        return None

    def text(self) -> str:
        if self.readings is not None:
            return f"{_num(self.count)} per {_num(self.readings)} readings"
        return f"{_num(self.count)} per {_duration_text(self.seconds)}"


@dataclass
class AlertTarget:
    url: str
    name: str = ""
    characteristics: list[str] = field(default_factory=lambda: ["*"])
    sources: list[str] = field(default_factory=lambda: ["*"])
    min_severity: str = "notice"
    quiet_hours: tuple[str, str] | None = None
    max_per_hour: int | None = None


@dataclass
class EpisodeSettings:
    close_after: int | None = None  # readings absent; None = 2 x largest window, at least 100
    escalate_factor: float = 100.0
    alert_on_close: bool = False
    projection_hours: float = 8.0
    p_escalations: int = 2


@dataclass
class DeliverySettings:
    retry_first: float = 10.0
    retry_max: float = 600.0
    expire_after: float = 24 * 3600.0
    timeout: float = 10.0


@dataclass
class DigestConfig:
    at: str = "06:30"
    to: list[str] = field(default_factory=list)
    folder: str = "digests"
    retention_days: int = 400


@dataclass
class Config:
    file: str
    state: str = DEFAULT_STATE
    timezone: str = "UTC"
    sources: list[SourceConfig] = field(default_factory=list)
    characteristics: list[CharacteristicConfig] = field(default_factory=list)
    alerts: list[AlertTarget] = field(default_factory=list)
    episodes: EpisodeSettings = field(default_factory=EpisodeSettings)
    delivery: DeliverySettings = field(default_factory=DeliverySettings)
    digest: DigestConfig | None = None
    false_alarms: Budget = field(default_factory=lambda: Budget(1, readings=DEFAULT_FALSE_ALARM_READINGS))

    @property
    def base_dir(self) -> FsPath:
        return FsPath(self.file).resolve().parent if self.file != "<defaults>" else FsPath.cwd()

    def resolve(self, p: str) -> FsPath:
        """A path from the config, relative to the config file's folder."""
        q = FsPath(p).expanduser()
        return q if q.is_absolute() else self.base_dir / q

    @property
    def state_dir(self) -> FsPath:
        return self.resolve(self.state)

    def source(self, name: str) -> SourceConfig:
        for s in self.sources:
            if s.name == name:
                return s
        raise KeyError(name)

    def characteristics_of(self, source: str) -> list[CharacteristicConfig]:
        return [c for c in self.characteristics if c.source == source]


# --------------------------------------------------------------------------------------
# Small parsers for our value forms


_DUR = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|sec|secs|seconds?|m|min|mins|minutes?|h|hours?|d|days?)\s*$", re.I)
_DUR_UNIT = {"s": 1, "m": 60, "h": 3600, "d": 86400}
_BUDGET = re.compile(
    r"^\s*(\d+(?:\.\d+)?)\s+per\s+(\d+(?:\.\d+)?\s*)?"
    r"(readings?|s|sec|secs|seconds?|m|min|mins|minutes?|h|hours?|d|days?|weeks?|shifts?)\s*$",
    re.I,
)
_CLOCK = re.compile(r"^([01]?\d|2[0-3]):([0-5]\d)$")


def parse_duration(value: Any) -> float:
    """'90s', '10m', '24h', '2d' or a number of seconds."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and value >= 0:
        return float(value)
    m = _DUR.match(str(value))
    if not m:
        raise ValueError("a duration such as '90s', '10m', '24h' or '2d'")
    return float(m.group(1)) * _DUR_UNIT[m.group(2)[0].lower()]


def parse_budget(value: Any) -> Budget:
    """'1 per 30 days', '2 per week', '1 per 10000 readings'."""
    m = _BUDGET.match(str(value))
    if not m:
        raise ValueError("a budget such as '1 per 30 days' or '1 per 10000 readings'")
    count = float(m.group(1))
    amount = float(m.group(2)) if m.group(2) else 1.0
    unit = m.group(3).lower()
    if count <= 0 or amount <= 0:
        raise ValueError("a budget with positive numbers")
    if unit.startswith("reading"):
        return Budget(count, readings=amount)
    if unit.startswith("week"):
        return Budget(count, seconds=amount * 7 * 86400)
    if unit.startswith("shift"):  # common practice: an 8-hour shift
        return Budget(count, seconds=amount * 8 * 3600)
    return Budget(count, seconds=amount * _DUR_UNIT[unit[0]])


def _num(x: float) -> str:
    return f"{x:g}"


def _duration_text(seconds: float) -> str:
    for unit, size in (("days", 86400), ("hours", 3600), ("minutes", 60)):
        if seconds >= size and seconds % size == 0:
            n = seconds / size
            return f"{_num(n)} {unit[:-1] if n == 1 else unit}"
    return f"{_num(seconds)} seconds"


# --------------------------------------------------------------------------------------
# Validation


class _Checker:
    def __init__(self, doc: Positioned):
        self.doc = doc
        self.problems: list[tuple[int, int, str]] = []
        self.env_paths = {p for p, _ in doc.env_errors}

    def fail(self, path: Path, message: str) -> None:
        if path in self.env_paths and not message.startswith("environment variable"):
            return  # the value is missing already; one message is enough
        pos = self.doc.pos(path)
        line, col = (pos.line, pos.column) if pos else (0, 0)
        where = f"{self.doc.file}:{line}:{col}" if pos else self.doc.file
        self.problems.append((line, col, f"{where}: {path_text(path)}: {message}"))

    def mapping(self, value: Any, path: Path, allowed: dict[str, Any], required: tuple[str, ...] = ()) -> dict | None:
        if not isinstance(value, dict):
            self.fail(path, f"expected a mapping of keys, got {_show(value)}")
            return None
        for key in value:
            if key not in allowed:
                hint = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
                tip = f"; did you mean '{hint[0]}'?" if hint else f"; known keys: {', '.join(sorted(allowed))}"
                self.fail(path + (key,), f"unknown key '{key}'{tip}")
        for key in required:
            if key not in value:
                self.fail(path, f"missing required key '{key}'")
        return value

    def get(self, m: dict, key: str, path: Path, conv: Callable[[Any], Any], expected: str, default: Any = None) -> Any:
        if key not in m or m[key] is None:
            return default
        try:
            return conv(m[key])
        except (ValueError, TypeError) as e:
            why = str(e) if isinstance(e, ValueError) and str(e) else expected
            self.fail(path + (key,), f"expected {why}, got {_show(m[key])}")
            return default


def _show(v: Any) -> str:
    if isinstance(v, str):
        return repr(v)
    if isinstance(v, dict):
        return "a mapping"
    if isinstance(v, list):
        return "a list"
    if v is None:
        return "nothing"
    return repr(v)


def _number(v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise TypeError
    if not math.isfinite(v):
        raise ValueError("a finite number")
    return float(v)


def _positive_int(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise TypeError
    if v < 1:
        raise ValueError("a whole number of at least 1")
    return v


def _count(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 0:
        raise ValueError("a whole number of at least 0")
    return v


def _string(v: Any) -> str:
    if not isinstance(v, str) or not v.strip():
        raise TypeError
    return v


def _choice(*choices: str) -> Callable[[Any], str]:
    def conv(v: Any) -> str:
        if v not in choices:
            raise ValueError(" or ".join(repr(c) for c in choices))
        return v

    return conv


def _clock(v: Any) -> str:
    if isinstance(v, int) and not isinstance(v, bool):  # YAML 1.1 reads 06:30 unquoted as sexagesimal
        v = f"{v // 60:02d}:{v % 60:02d}"
    if not isinstance(v, str) or not _CLOCK.match(v.strip()):
        raise ValueError("a time of day 'HH:MM'")
    h, m = v.strip().split(":")
    return f"{int(h):02d}:{m}"


def _clock_pair(v: Any) -> tuple[str, str]:
    if isinstance(v, dict) and set(v) == {"from", "to"}:
        return (_clock(v["from"]), _clock(v["to"]))
    if isinstance(v, str) and "-" in v:
        a, b = v.split("-", 1)
        return (_clock(a.strip()), _clock(b.strip()))
    raise ValueError("a span of the day such as '22:00-06:00'")


def _str_list(v: Any) -> list[str]:
    if isinstance(v, str):
        return [v]
    if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
        raise ValueError("a name or a list of names")
    return list(v)


def _timezone(v: Any) -> str:
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        ZoneInfo(str(v))
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError("an IANA time zone such as 'Europe/Berlin'") from None
    return str(v)


SEVERITIES = ("notice", "urgent")

_TOP = {
    "state": None, "timezone": None, "sources": None, "characteristics": None, "alerts": None,
    "digest": None, "episodes": None, "delivery": None, "false_alarms": None, "defaults": None,
}
_SOURCE = {
    "name": None, "kind": None, "path": None, "format": None, "time_column": None, "delimiter": None,
    "decimal": None, "encoding": None, "poll": None, "poll_interval": None, "broker": None, "topic": None,
    "gap": None, "working_hours": None,
}
_CHAR = {
    "name": None, "source": None, "column": None, "unit": None, "target": None, "lsl": None, "usl": None,
    "window": None, "baseline": None, "detectors": None, "false_alarms": None, "readings_per_hour": None,
    "subgroup": None,
}
_DEFAULTS = {"window": None, "baseline": None, "detectors": None, "false_alarms": None}
_BASELINE = {"readings": None, "mean": None, "sigma": None, "file": None, "column": None}
_ALERT = {
    "url": None, "name": None, "characteristics": None, "sources": None, "min_severity": None,
    "quiet_hours": None, "max_per_hour": None,
}
_DIGEST = {"at": None, "to": None, "folder": None, "retention_days": None}
_EPISODES = {"close_after": None, "escalate_factor": None, "alert_on_close": None, "projection_hours": None,
             "p_escalations": None}
_DELIVERY = {"retry_first": None, "retry_max": None, "expire_after": None, "timeout": None}


def _boolean(v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError("true or false")
    return v


def load_config(path: str | FsPath, env: dict[str, str] | None = None) -> Config:
    """Read and fully validate a configuration file; raise ConfigError listing every problem."""
    path = str(path)
    try:
        text = FsPath(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError([f"{path}: no such file"]) from None
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"{path}: cannot read the file ({e})"]) from None
    return parse_config(text, path, env)


def parse_config(text: str, file: str = "<config>", env: dict[str, str] | None = None) -> Config:
    try:
        doc = Positioned(file, text, env)
    except YamlError as e:
        raise ConfigError([str(e)]) from None
    ck = _Checker(doc)
    for p, msg in doc.env_errors:
        ck.fail(p, msg)
    cfg = _build(ck, doc.value, file)
    if ck.problems:
        ck.problems.sort(key=lambda t: (t[0], t[1]))
        raise ConfigError([m for _, _, m in ck.problems])
    return cfg


def _build(ck: _Checker, top: Any, file: str) -> Config:
    cfg = Config(file=file)
    m = ck.mapping(top, (), _TOP, required=("sources", "characteristics"))
    if m is None:
        return cfg
    cfg.state = ck.get(m, "state", (), _string, "a folder path", DEFAULT_STATE)
    cfg.timezone = ck.get(m, "timezone", (), _timezone, "a time zone", "UTC")
    cfg.false_alarms = ck.get(m, "false_alarms", (), parse_budget, "a budget", cfg.false_alarms)

    defaults = {}
    if "defaults" in m and m["defaults"] is not None:
        defaults = ck.mapping(m["defaults"], ("defaults",), _DEFAULTS) or {}

    # sources
    names: set[str] = set()
    srcs = m.get("sources")
    if srcs is not None and not isinstance(srcs, list):
        ck.fail(("sources",), f"expected a list of sources, got {_show(srcs)}")
        srcs = []
    for i, s in enumerate(srcs or []):
        sc = _source(ck, s, ("sources", i))
        if sc is None:
            continue
        if sc.name in names:
            ck.fail(("sources", i, "name"), f"expected a unique source name, got '{sc.name}' a second time")
        names.add(sc.name)
        cfg.sources.append(sc)

    chars = m.get("characteristics")
    if chars is not None and not isinstance(chars, list):
        ck.fail(("characteristics",), f"expected a list of characteristics, got {_show(chars)}")
        chars = []
    cnames: set[str] = set()
    for i, c in enumerate(chars or []):
        cc = _characteristic(ck, c, ("characteristics", i), defaults, names)
        if cc is None:
            continue
        if cc.name in cnames:
            ck.fail(("characteristics", i, "name"), f"expected a unique characteristic name, got '{cc.name}' a second time")
        cnames.add(cc.name)
        cfg.characteristics.append(cc)

    alerts = m.get("alerts")
    if alerts is not None and not isinstance(alerts, list):
        ck.fail(("alerts",), f"expected a list of alert targets, got {_show(alerts)}")
        alerts = []
    for i, a in enumerate(alerts or []):
        t = _alert(ck, a, ("alerts", i))
        if t is not None:
            cfg.alerts.append(t)

    if m.get("digest") is not None:
        d = ck.mapping(m["digest"], ("digest",), _DIGEST)
        if d is not None:
            p = ("digest",)
            cfg.digest = DigestConfig(
                at=ck.get(d, "at", p, _clock, "a time of day 'HH:MM'", "06:30"),
                to=ck.get(d, "to", p, _str_list, "a list of apprise URLs", []),
                folder=ck.get(d, "folder", p, _string, "a folder path", "digests"),
                retention_days=ck.get(d, "retention_days", p, _positive_int, "a whole number of days", 400),
            )
    if m.get("episodes") is not None:
        e = ck.mapping(m["episodes"], ("episodes",), _EPISODES)
        if e is not None:
            p = ("episodes",)
            cfg.episodes = EpisodeSettings(
                close_after=ck.get(e, "close_after", p, _positive_int, "a whole number of readings", None),
                escalate_factor=ck.get(e, "escalate_factor", p, _gt1, "a number above 1", 100.0),
                alert_on_close=ck.get(e, "alert_on_close", p, _boolean, "true or false", False),
                projection_hours=ck.get(e, "projection_hours", p, _positive, "a positive number", 8.0),
                p_escalations=ck.get(e, "p_escalations", p, _count, "a whole number", 2),
            )
    if m.get("delivery") is not None:
        d = ck.mapping(m["delivery"], ("delivery",), _DELIVERY)
        if d is not None:
            p = ("delivery",)
            cfg.delivery = DeliverySettings(
                retry_first=ck.get(d, "retry_first", p, parse_duration, "a duration", 10.0),
                retry_max=ck.get(d, "retry_max", p, parse_duration, "a duration", 600.0),
                expire_after=ck.get(d, "expire_after", p, parse_duration, "a duration", 86400.0),
                timeout=ck.get(d, "timeout", p, parse_duration, "a duration", 10.0),
            )
    return cfg


def _gt1(v: Any) -> float:
    x = _number(v)
    if x <= 1:
        raise ValueError("a number above 1")
    return x


def _positive(v: Any) -> float:
    x = _number(v)
    if x <= 0:
        raise ValueError("a positive number")
    return x


def _source(ck: _Checker, s: Any, p: Path) -> SourceConfig | None:
    m = ck.mapping(s, p, _SOURCE, required=("name",))
    if m is None or "name" not in m:
        return None
    name = ck.get(m, "name", p, _string, "a name", None)
    if name is None:
        return None
    kind = ck.get(m, "kind", p, _choice("file", "stdin", "mqtt"), "", "file")
    sc = SourceConfig(name=name, kind=kind)
    sc.path = ck.get(m, "path", p, _string, "a file path or glob", None)
    sc.format = ck.get(m, "format", p, _choice("csv", "jsonl"), "", "csv")
    sc.time_column = ck.get(m, "time_column", p, _string, "a column name", None)
    sc.delimiter = ck.get(m, "delimiter", p, _choice(",", ";", "\t", "|"), "", ",")
    sc.decimal = ck.get(m, "decimal", p, _choice(".", ","), "", ".")
    sc.encoding = ck.get(m, "encoding", p, _encoding, "a text encoding", "utf-8")
    sc.poll = ck.get(m, "poll", p, _choice("auto", "always", "never"), "", "auto")
    sc.poll_interval = ck.get(m, "poll_interval", p, parse_duration, "a duration", 2.0)
    sc.broker = ck.get(m, "broker", p, _string, "a broker address such as 'mqtt://127.0.0.1:1883'", None)
    sc.topic = ck.get(m, "topic", p, _string, "an MQTT topic", None)
    sc.gap = ck.get(m, "gap", p, parse_duration, "a duration", None)
    sc.working_hours = ck.get(m, "working_hours", p, _clock_pair, "", None)
    if kind == "file" and sc.path is None and "path" not in m:
        ck.fail(p, "missing required key 'path' (a file or glob) for a file source")
    if kind == "mqtt":
        for key in ("broker", "topic"):
            if key not in m:
                ck.fail(p, f"missing required key '{key}' for an mqtt source")
    if sc.format == "csv" and sc.delimiter == "," and sc.decimal == ",":
        ck.fail(p + ("decimal",), "expected a delimiter other than ',' when the decimal mark is ',', got both ','")
    return sc


def _encoding(v: Any) -> str:
    import codecs

    try:
        codecs.lookup(str(v))
    except LookupError:
        raise ValueError("a known text encoding such as 'utf-8' or 'latin-1'") from None
    return str(v)


def _characteristic(ck: _Checker, c: Any, p: Path, defaults: dict, sources: set[str]) -> CharacteristicConfig | None:
    m = ck.mapping(c, p, _CHAR, required=("name", "source", "column"))
    if m is None:
        return None
    name = ck.get(m, "name", p, _string, "a name", None)
    source = ck.get(m, "source", p, _string, "a source name", None)
    column = ck.get(m, "column", p, _string, "a column name", None)
    if name is None or source is None or column is None:
        return None
    if sources and source not in sources:
        hint = difflib.get_close_matches(source, list(sources), n=1, cutoff=0.6)
        tip = f"; did you mean '{hint[0]}'?" if hint else ""
        ck.fail(p + ("source",), f"expected the name of a source above, got '{source}'{tip}")
    cc = CharacteristicConfig(name=name, source=source, column=column)
    cc.unit = ck.get(m, "unit", p, str, "a unit", "")
    cc.target = ck.get(m, "target", p, _number, "a number", None)
    cc.lsl = ck.get(m, "lsl", p, _number, "a number", None)
    cc.usl = ck.get(m, "usl", p, _number, "a number", None)
    if cc.lsl is not None and cc.usl is not None and cc.lsl >= cc.usl:
        ck.fail(p + ("usl",), f"expected usl above lsl ({cc.lsl:g}), got {cc.usl:g}")
    dp = ("defaults",)
    win_default = ck.get(defaults, "window", dp, _window, "", DEFAULT_WINDOW)
    cc.window = ck.get(m, "window", p, _window, "", win_default)
    bl = m.get("baseline", defaults.get("baseline"))
    bpath = p + ("baseline",) if "baseline" in m else dp + ("baseline",)
    if bl is not None:
        cc.baseline = _baseline(ck, bl, bpath)
    det = m.get("detectors", defaults.get("detectors"))
    if det is not None:
        cc.detectors = _detectors(ck, det, p + ("detectors",) if "detectors" in m else dp + ("detectors",))
    fa_default = ck.get(defaults, "false_alarms", dp, parse_budget, "a budget", None)
    cc.false_alarms = ck.get(m, "false_alarms", p, parse_budget, "a budget", fa_default)
    cc.readings_per_hour = ck.get(m, "readings_per_hour", p, _positive, "a positive number", None)
    cc.subgroup = ck.get(m, "subgroup", p, _subgroup, "", None)
    return cc


def _window(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise ValueError("a whole number of readings from 10 to 1000")
    if not 10 <= v <= 1000:
        raise ValueError("a whole number of readings from 10 to 1000")
    return v


def _subgroup(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or not 2 <= v <= 25:
        raise ValueError("a subgroup size from 2 to 25")
    return v


def _baseline(ck: _Checker, b: Any, p: Path) -> BaselineConfig:
    m = ck.mapping(b, p, _BASELINE)
    out = BaselineConfig()
    if m is None:
        return out
    out.readings = ck.get(m, "readings", p, _baseline_n, "", DEFAULT_BASELINE_READINGS)
    out.mean = ck.get(m, "mean", p, _number, "a number", None)
    out.sigma = ck.get(m, "sigma", p, _positive, "a positive number", None)
    out.file = ck.get(m, "file", p, _string, "a file path", None)
    out.column = ck.get(m, "column", p, _string, "a column name", None)
    if (out.mean is None) != (out.sigma is None) and ("mean" in m or "sigma" in m):
        ck.fail(p, "expected both 'mean' and 'sigma' for a fixed baseline, got only one")
    if out.fixed and "readings" in m:
        ck.fail(p + ("readings",), "expected either 'readings' or a fixed 'mean' and 'sigma', got both")
    return out


def _baseline_n(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 20:
        raise ValueError("a whole number of at least 20 readings")
    return v


def _detectors(ck: _Checker, d: Any, p: Path) -> dict[str, dict[str, Any]]:
    from rules import DETECTORS

    out: dict[str, dict[str, Any]] = {}
    if not isinstance(d, dict):
        ck.fail(p, f"expected a mapping of detector names to settings, got {_show(d)}")
        return out
    for key, params in d.items():
        kp = p + (key,)
        if key not in DETECTORS:
            hint = difflib.get_close_matches(key, list(DETECTORS), n=1, cutoff=0.6)
            tip = f"; did you mean '{hint[0]}'?" if hint else f"; known detectors: {', '.join(sorted(DETECTORS))}"
            ck.fail(kp, f"unknown detector '{key}'{tip}")
            continue
        if params is False:
            continue
        if params is True or params is None:
            params = {}
        if not isinstance(params, dict):
            ck.fail(kp, f"expected true, false or a mapping of settings, got {_show(params)}")
            continue
        cls = DETECTORS[key]
        bad = False
        for name in params:
            if name not in cls.PARAMS:
                hint = difflib.get_close_matches(name, list(cls.PARAMS), n=1, cutoff=0.6)
                tip = f"; did you mean '{hint[0]}'?" if hint else f"; known settings: {', '.join(cls.PARAMS)}"
                ck.fail(kp + (name,), f"unknown setting '{name}' of detector '{key}'{tip}")
                bad = True
        if bad:
            continue
        try:
            cls(**params)
        except (ValueError, TypeError) as e:
            ck.fail(kp, f"expected valid settings for '{key}', got {params!r}: {e}")
            continue
        out[key] = dict(params)
    return out


def _alert(ck: _Checker, a: Any, p: Path) -> AlertTarget | None:
    m = ck.mapping(a, p, _ALERT, required=("url",))
    if m is None or "url" not in m:
        return None
    url = m["url"]
    if not isinstance(url, str) or ("://" not in url and url != "console"):
        ck.fail(p + ("url",), f"expected an apprise URL such as 'mailto://...' or 'console://', got {_show(url) if not isinstance(url, str) else 'a value without ://'}")
        return None
    t = AlertTarget(url=url)
    t.name = ck.get(m, "name", p, _string, "a name", "")
    t.characteristics = ck.get(m, "characteristics", p, _str_list, "", ["*"])
    t.sources = ck.get(m, "sources", p, _str_list, "", ["*"])
    t.min_severity = ck.get(m, "min_severity", p, _choice(*SEVERITIES), "", "notice")
    t.quiet_hours = ck.get(m, "quiet_hours", p, _clock_pair, "", None)
    t.max_per_hour = ck.get(m, "max_per_hour", p, _positive_int, "a whole number", None)
    return t


def default_config(state: str = DEFAULT_STATE) -> Config:
    """An empty configuration (used by replay without --config)."""
    return Config(file="<defaults>", state=state)
