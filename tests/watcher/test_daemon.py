"""The live daemon on real files appended while it runs, real SQLite state, real signals."""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from watcher.config import load_config
from watcher.daemon import Daemon
from watcher.replay import config_for_file, replay_file
from watcher.status import read_status

CONFIG = """\
state: ./st
sources:
  - name: cw
    path: data/cw-*.csv
    time_column: time
    poll: {poll}
    poll_interval: 0.2
characteristics:
  - name: mass
    source: cw
    column: mass_g
    unit: g
    usl: 515
    baseline: {{readings: 40}}
    window: 30
"""


def make_config(tmp: Path, poll: str = "never") -> Path:
    (tmp / "data").mkdir(exist_ok=True)
    p = tmp / "cfg.yaml"
    p.write_text(CONFIG.format(poll=poll))
    return p


def csv_lines(values, start: int = 0) -> str:
    return "".join(f"{1767337200 + 2 * (start + i)},{v:.3f}\n" for i, v in enumerate(values))


class Running:
    """A daemon in a thread of this process."""

    def __init__(self, cfg_path: Path):
        self.cfg = load_config(cfg_path)
        self.daemon = Daemon(self.cfg)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.daemon.run, args=(self.stop, False), daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        self.thread.join(10)
        assert not self.thread.is_alive()

    def readings(self) -> int:
        return readings_of(self.cfg)

    def wait_for(self, n: int, timeout: float = 10.0) -> None:
        t0 = time.time()
        while time.time() - t0 < timeout:
            if self.readings() >= n:
                return
            time.sleep(0.05)
        raise AssertionError(f"expected {n} readings, have {self.readings()}")


def readings_of(cfg) -> int:
    try:
        return read_status(cfg)["characteristics"]["mass"]["readings"]
    except FileNotFoundError:  # not started yet
        return 0


def append(path: Path, text: str) -> None:
    with open(path, "a") as fh:
        fh.write(text)
        fh.flush()


@pytest.mark.parametrize("poll", ["never", "always"])
def test_appends_rotation_partial_lines_new_files_and_bad_lines(tmp_path, poll):
    cfgp = make_config(tmp_path, poll)
    f1 = tmp_path / "data" / "cw-1.csv"
    rng = np.random.default_rng(3)
    f1.write_text("time,mass_g\n" + csv_lines(500 + rng.normal(size=30)))
    with Running(cfgp) as r:
        r.wait_for(30)
        append(f1, csv_lines(500 + rng.normal(size=20), 30))          # appends picked up
        r.wait_for(50)
        append(f1, "1767337300,5")                                     # a partial line: held back
        time.sleep(0.6)
        assert r.readings() == 50
        append(f1, "00.5\n1767337302,heavy\n")                         # completed later; then a bad line
        r.wait_for(51)
        os.rename(f1, tmp_path / "data" / "cw-1.csv.old")              # rotation by rename ...
        append(tmp_path / "data" / "cw-1.csv.old", csv_lines([501.0], 60))  # ... the old file is still read to its end
        (tmp_path / "data" / "cw-1.csv").write_text("time,mass_g\n" + csv_lines([499.0, 499.5], 70))
        r.wait_for(54)
        (tmp_path / "data" / "cw-2.csv").write_text("time,mass_g\n" + csv_lines([500.0] * 3, 80))  # a new file
        r.wait_for(57)
    st = read_status(r.cfg)
    assert st["characteristics"]["mass"]["readings"] == 57
    c = sqlite3.connect(r.cfg.state_dir / "linewatch.sqlite")
    bad = c.execute("SELECT file, line_no, reason FROM quarantine").fetchall()
    assert bad == [(str(f1), 53, "column 'mass_g': not a number: 'heavy'")]
    assert st["sources"]["cw"]["files"][str(tmp_path / "data" / "cw-2.csv")]["offset"] > 0


class _RoundCounter:
    """Daemon hook: rounds of each pass (``tick`` ends a round) and readings after each pass;
    it can also append a line to a file whenever a batch was taken, as a writer that always
    has one more line ready by the time the daemon looks again."""

    def __init__(self, daemon, path: Path | None = None, appends: int = 0):
        self.path, self.appends, self.rounds, self.passes = path, appends, 0, []
        self.daemon = daemon
        inner = daemon._pass

        def counted() -> None:
            before = self.rounds
            inner()
            self.passes.append((self.rounds - before, daemon.readings))

        daemon._pass = counted

    def on_batch(self, conn, batch) -> None:
        if self.appends and batch.readings:
            self.appends -= 1
            append(self.path, f"{1767400000 + self.appends},{500.0 + self.appends % 3:.1f},late\n")

    def tick(self, daemon) -> None:
        self.rounds += 1


def test_a_backlog_is_taken_in_one_pass_but_a_pass_never_chases_new_lines(tmp_path):
    """A file with a backlog beyond one round's read limit is taken whole by one pass; lines
    arriving while a pass runs wait for the next pass (after the gathering wait), or a
    steady writer would keep the daemon in one pass, busy, for as long as it writes."""
    cfgp = make_config(tmp_path)
    f1 = tmp_path / "data" / "cw-1.csv"
    backlog = 24_000  # lines of some 125 bytes (a long note column): three rounds of MAX_BYTES_PER_FILE
    note = "x" * 100
    f1.write_text("time,mass_g,note\n" + "".join(
        f"{1767337200 + 2 * i},{500.0 + (i % 7) * 0.1:.3f},{note}\n" for i in range(backlog)))
    r = Running(cfgp)
    counter = _RoundCounter(r.daemon, f1, appends=40)
    r.daemon.hooks.append(counter)
    with r:
        r.wait_for(backlog + 40, timeout=60)
    first = next(i for i, (_, n) in enumerate(counter.passes) if n)
    rounds, taken = counter.passes[first]
    assert taken >= backlog and rounds >= 3  # the backlog in one pass, round after round
    later = [(k, n - m) for (k, n), (_, m) in zip(counter.passes[first + 1:], counter.passes[first:])]
    assert len([1 for _, got in later if got]) >= 30  # each new line came in a pass of its own ...
    assert max(rounds for rounds, _ in later) == 1  # ... of one round: the pass did not chase it


def test_truncated_file_is_read_again(tmp_path):
    cfgp = make_config(tmp_path)
    f1 = tmp_path / "data" / "cw-1.csv"
    f1.write_text("time,mass_g\n" + csv_lines([500.0 + i % 3 for i in range(20)]))
    with Running(cfgp) as r:
        r.wait_for(20)
        f1.write_text("time,mass_g\n" + csv_lines([500.1, 500.2]))  # rewritten shorter, in place
        r.wait_for(22)
        time.sleep(0.3)
        assert r.readings() == 22


def test_second_daemon_on_same_state_is_refused(tmp_path):
    cfgp = make_config(tmp_path)
    (tmp_path / "data" / "cw-1.csv").write_text("time,mass_g\n")
    with Running(cfgp) as r:
        time.sleep(0.3)
        out = subprocess.run([sys.executable, "-m", "watcher", "run", str(cfgp)], capture_output=True, text=True, timeout=30)
        assert out.returncode == 2
        assert f"another linewatch (pid {os.getpid()}) is already using the state folder" in out.stderr
        assert r.thread.is_alive()


def test_bad_config_exits_2_with_the_reason(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("sources: []\ncharacteristics: []\nstate: [1, 2]\n")
    out = subprocess.run([sys.executable, "-m", "watcher", "run", str(p)], capture_output=True, text=True, timeout=30)
    assert out.returncode == 2
    assert f"{p}:3:1: state: expected a folder path, got a list" in out.stderr


def test_sigterm_stops_within_two_seconds_and_commits(tmp_path):
    cfgp = make_config(tmp_path)
    (tmp_path / "data" / "cw-1.csv").write_text("time,mass_g\n" + csv_lines([500.0 + (i % 5) * 0.1 for i in range(100)]))
    proc = subprocess.Popen([sys.executable, "-m", "watcher", "run", str(cfgp), "--log-format", "json"],
                            stderr=subprocess.PIPE, text=True)
    cfg = load_config(cfgp)
    t0 = time.time()
    while time.time() - t0 < 20:
        if readings_of(cfg) == 100:
            break
        time.sleep(0.1)
    t1 = time.time()
    proc.send_signal(signal.SIGTERM)
    proc.wait(10)
    assert proc.returncode == 0
    assert time.time() - t1 < 2.0
    events = [json.loads(line)["event"] for line in proc.stderr.read().splitlines() if line.startswith("{")]
    assert events[0] == "start" and events[-1] == "stop" and "file_opened" in events


def test_stdin_source(tmp_path):
    cfgp = make_config(tmp_path)
    data = "time,mass_g\n" + csv_lines(500 + np.random.default_rng(1).normal(size=80)) + "1767337400,oops\n"
    proc = subprocess.Popen([sys.executable, "-m", "watcher", "run", str(cfgp), "--stdin", "cw"],
                            stdin=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc.stdin.write(data)
    proc.stdin.close()
    cfg = load_config(cfgp)
    t0 = time.time()
    readings = 0
    while time.time() - t0 < 20 and readings < 80:
        readings = readings_of(cfg)
        time.sleep(0.1)
    proc.send_signal(signal.SIGTERM)
    proc.wait(10)
    assert proc.returncode == 0 and readings == 80
    assert "<cw>:82: skipped: column 'mass_g': not a number: 'oops'" in proc.stderr.read()


def test_crash_at_random_instants_loses_and_repeats_nothing(tmp_path):
    """SIGKILL at 20+ random instants while a writer appends 50,000 readings; restart each time."""
    cfgp = make_config(tmp_path)
    f1 = tmp_path / "data" / "cw-1.csv"
    rng = np.random.default_rng(7)
    n = 50_000
    values = 500 + rng.normal(size=n)
    values[30_000:] += 1.5  # a shift, so there are findings to compare
    f1.write_text("time,mass_g\n")
    writer_done = threading.Event()

    def writer():
        chunk = 500
        for i in range(0, n, chunk):
            text = csv_lines(values[i:i + chunk], i)
            cut = random.Random(i).randrange(len(text))  # write in two pieces, so lines are often half-written
            append(f1, text[:cut])
            time.sleep(0.002)
            append(f1, text[cut:])
            time.sleep(0.2)  # about 20 s of writing in all, so the kills fall while lines are arriving
        writer_done.set()

    threading.Thread(target=writer, daemon=True).start()
    cfg = load_config(cfgp)
    kills = 0
    killer = random.Random(11)
    while kills < 20 or not writer_done.is_set():
        proc = subprocess.Popen([sys.executable, "-m", "watcher", "run", str(cfgp)], stderr=subprocess.DEVNULL)
        time.sleep(killer.uniform(0.4, 1.2))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        kills += 1
    proc = subprocess.Popen([sys.executable, "-m", "watcher", "run", str(cfgp)], stderr=subprocess.DEVNULL)
    t0 = time.time()
    while time.time() - t0 < 60:
        if readings_of(cfg) >= n:
            break
        time.sleep(0.2)
    proc.send_signal(signal.SIGTERM)
    proc.wait(10)
    assert kills >= 20
    assert readings_of(cfg) == n

    c = sqlite3.connect(cfg.state_dir / "linewatch.sqlite")
    live = c.execute("SELECT pattern, detector, idx, onset_index, p_value FROM findings ORDER BY id").fetchall()
    run_cfg, src = config_for_file(f1, cfg, source="cw")
    once = [(f.pattern, f.detector, f.index, f.onset_index, f.p_value) for f in replay_file(f1, run_cfg, src, warn=None).findings]
    assert len(once) > 0
    assert live == once
    jsonl = [json.loads(x) for x in (cfg.state_dir / "findings.jsonl").read_text().splitlines()]
    assert [(j["pattern"], j["index"]) for j in jsonl] == [(p, i) for p, _, i, _, _ in once]


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


MOSQUITTO = next((p for p in ("/usr/sbin/mosquitto", "/usr/bin/mosquitto") if os.path.exists(p)), None)


@pytest.mark.skipif(MOSQUITTO is None, reason="the mosquitto broker is not installed (Debian package mosquitto)")
def test_mqtt_source_through_the_daemon(tmp_path):
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    port = _free_port()
    broker = subprocess.Popen([MOSQUITTO, "-p", str(port)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        cfgp = tmp_path / "cfg.yaml"
        cfgp.write_text(
            "state: ./st\nsources:\n"
            f"  - {{name: oven, kind: mqtt, broker: 'mqtt://127.0.0.1:{port}', topic: line3/oven, format: jsonl, time_column: t}}\n"
            "characteristics:\n  - {name: zone_temp, source: oven, column: temp_c, baseline: {readings: 40}}\n"
        )
        with Running(cfgp) as r:
            pub = mqtt.Client(CallbackAPIVersion.VERSION2)
            for _ in range(50):
                try:
                    pub.connect("127.0.0.1", port)
                    break
                except OSError:
                    time.sleep(0.1)
            pub.loop_start()
            t0 = time.time()  # wait until the daemon's subscription has landed at the broker
            while time.time() - t0 < 20 and not (r.daemon.feeds and r.daemon.feeds[0].reader.subscribed.is_set()):
                time.sleep(0.05)
            assert r.daemon.feeds[0].reader.subscribed.is_set()
            vals = 180 + np.random.default_rng(2).normal(size=60)
            for i, v in enumerate(vals):
                payload = json.dumps({"t": 1767337200 + i, "temp_c": round(float(v), 3)}) if i % 2 else f"{v:.3f}"
                pub.publish("line3/oven", payload, qos=1).wait_for_publish(5)
            pub.publish("line3/oven", "not json", qos=1).wait_for_publish(5)
            t0 = time.time()
            while time.time() - t0 < 10:
                try:
                    if read_status(r.cfg)["characteristics"]["zone_temp"]["readings"] >= 60:
                        break
                except FileNotFoundError:
                    pass
                time.sleep(0.1)
            pub.loop_stop()
        st = read_status(r.cfg)
        assert st["characteristics"]["zone_temp"]["readings"] == 60
        assert sum(st["sources"]["oven"]["quarantined_by_reason"].values()) == 1
    finally:
        broker.terminate()
        broker.wait(5)


def test_alerts_ack_and_rebaseline_through_the_commands(tmp_path):
    """A real HTTP receiver gets one alert when a shift opens; ack and rebaseline are recorded and shown."""
    from tests.watcher.http_receiver import HttpReceiver

    rx = HttpReceiver().start()
    try:
        (tmp_path / "data").mkdir()
        cfgp = tmp_path / "cfg.yaml"
        cfgp.write_text(CONFIG.format(poll="never") + f"alerts:\n  - url: json://127.0.0.1:{rx.port}/alerts\n")
        f1 = tmp_path / "data" / "cw-1.csv"
        rng = np.random.default_rng(9)
        x = 500 + rng.normal(size=300)
        x[150:] += 4.0
        f1.write_text("time,mass_g\n" + csv_lines(x))
        with Running(cfgp) as r:
            r.wait_for(300)
            t0 = time.time()
            while time.time() - t0 < 10 and not rx.requests:
                time.sleep(0.1)
            st = read_status(r.cfg)
            eps = st["characteristics"]["mass"]["open_episodes"]
            assert any(e["pattern"] == "shift" and e["direction"] == "up" for e in eps)
            shift = next(e for e in eps if e["pattern"] == "shift")
            out = run_cli("ack", str(cfgp), shift["id"], "--note", "filler valve checked")
            assert out.returncode == 0 and shift["id"] in out.stdout
            out = run_cli("rebaseline", str(cfgp), "mass", "--note", "new film reel")
            assert out.returncode == 0
            t0 = time.time()
            while time.time() - t0 < 10 and read_status(r.cfg)["characteristics"]["mass"]["open_episodes"]:
                time.sleep(0.1)
            st = read_status(r.cfg)
            assert st["characteristics"]["mass"]["open_episodes"] == []
            assert st["characteristics"]["mass"]["phase"].startswith("learning baseline")
            kinds = [(e["kind"], e["note"]) for e in st["records"]]
            assert ("acknowledged", "filler valve checked") in kinds and ("rebaselined", "new film reel") in kinds
        bodies = [q["body"] for q in rx.requests]
        assert any(shift["id"] in (b.get("message", "") + b.get("title", "")) for b in bodies)
        assert run_cli("ack", str(cfgp), "no-such-episode").returncode == 2
    finally:
        rx.stop()


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "watcher", *args], capture_output=True, text=True, timeout=60)
