"""MqttSource against a real mosquitto broker on 127.0.0.1 (started here).

Needs the Debian package ``mosquitto`` (``/usr/sbin/mosquitto``); the tests
skip, saying so, where the binary is absent.  The broker is started with only
``-p PORT`` (mosquitto 2.x then listens on the loopback interface and allows
anonymous clients).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time

import pytest

paho = pytest.importorskip("paho.mqtt.client")
from paho.mqtt.enums import CallbackAPIVersion  # noqa: E402

from watcher.sources.mqtt_source import MqttSource, decode_payload  # noqa: E402

MOSQUITTO = shutil.which("mosquitto") or ("/usr/sbin/mosquitto" if os.path.exists("/usr/sbin/mosquitto") else None)
NO_BROKER = ("mosquitto broker binary not installed (Debian: apt-get install -y mosquitto); "
             "the broker tests need it")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_broker(port: int) -> subprocess.Popen:
    proc = subprocess.Popen([MOSQUITTO, "-p", str(port)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return proc
        except OSError:
            if proc.poll() is not None:
                raise RuntimeError(f"mosquitto exited with {proc.returncode}")
            time.sleep(0.05)
    proc.kill()
    raise RuntimeError("mosquitto did not start listening")


def stop_broker(proc: subprocess.Popen) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=5)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


@pytest.fixture
def broker():
    if MOSQUITTO is None:
        pytest.skip(NO_BROKER)
    port = free_port()
    proc = start_broker(port)
    box = {"port": port, "proc": proc}
    yield box
    stop_broker(box["proc"])


def publish(port: int, topic: str, payloads: list[bytes]) -> None:
    c = paho.Client(CallbackAPIVersion.VERSION2)
    c.connect("127.0.0.1", port)
    c.loop_start()
    try:
        for p in payloads:
            c.publish(topic, p, qos=1).wait_for_publish(timeout=5)
    finally:
        c.disconnect()
        c.loop_stop()


def receive(src: MqttSource, want: int, timeout: float = 5.0):
    out = []
    deadline = time.monotonic() + timeout
    while len(out) < want and time.monotonic() < deadline:
        src.wait(0.2)
        out.extend(src.drain())
    return out


def test_messages_arrive_in_order_with_sequence_numbers(broker):
    src = MqttSource("checkweigher", "line3/weight", port=broker["port"], reconnect_min=0.1,
                     reconnect_max=0.5)
    src.start()
    try:
        assert src.subscribed.wait(5), src.last_error
        payloads = [b"12.31", b'{"weight": 12.29, "pack": 17}', b"12.40"]
        publish(broker["port"], "line3/weight", payloads)
        publish(broker["port"], "line3/other", [b"99"])  # another topic: not ours
        got = receive(src, 3)
        time.sleep(0.1)
        got += src.drain()
    finally:
        src.stop()
    assert [m.payload for m in got] == payloads
    assert [m.seq for m in got] == [1, 2, 3]
    assert {m.topic for m in got} == {"line3/weight"}
    assert decode_payload(got[1].payload) == {"weight": 12.29, "pack": 17}


def test_reconnects_after_broker_restart(broker):
    src = MqttSource("lathe", "cell2/pin", port=broker["port"], reconnect_min=0.1, reconnect_max=0.4)
    src.start()
    try:
        assert src.subscribed.wait(5), src.last_error
        publish(broker["port"], "cell2/pin", [b"4.001"])
        assert [m.payload for m in receive(src, 1)] == [b"4.001"]
        stop_broker(broker["proc"])
        deadline = time.monotonic() + 5
        while src.connected.is_set() and time.monotonic() < deadline:
            time.sleep(0.02)
        assert not src.connected.is_set()
        broker["proc"] = start_broker(broker["port"])  # same port: the client must come back
        assert _wait_until(lambda: src.connects >= 2 and src.subscribed.is_set(), 10), src.last_error
        publish(broker["port"], "cell2/pin", [b"4.003"])
        after = receive(src, 1)
    finally:
        src.stop()
    assert [(m.payload, m.seq) for m in after] == [(b"4.003", 2)]


def _wait_until(cond, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.02)
    return False


@pytest.mark.parametrize("payload, reason", [
    (b"", "empty"),
    (b"twelve", "not JSON"),
    (b'"12.3"', "JSON string"),
    (b"[12.3]", "JSON list"),
    (b"true", "JSON boolean"),
    (b"\xff\xfe", "not UTF-8"),
])
def test_bad_payloads_are_refused_with_a_reason(payload, reason):
    with pytest.raises(ValueError, match=reason):
        decode_payload(payload)


def test_module_docstring_examples_run():
    import doctest

    from watcher.sources import mqtt_source
    result = doctest.testmod(mqtt_source)
    assert result.attempted > 0 and result.failed == 0
