"""Readings pushed over MQTT: one subscription per source, messages into a queue.

Uses paho-mqtt 2.x (``CallbackAPIVersion.VERSION2``).  The client runs in
paho's own network thread (``loop_start``); when the broker goes away paho
reconnects by itself, waiting ``reconnect_min`` seconds, then doubling up to
``reconnect_max`` (``reconnect_delay_set``); the subscription is renewed on
every (re)connect.  Each received message becomes an :class:`MqttMessage`
with a receive sequence number counted from 1 in this run.

Messages published while we are disconnected are lost unless the publisher
uses QoS >= 1 and this source uses a fixed ``client_id`` with ``qos >= 1``
(a persistent session: the broker keeps them for us).  There is no resume of
positions: an MQTT stream has none.

Payloads are a JSON object or a bare number; :func:`decode_payload` checks
that and raises ``ValueError`` with the reason otherwise.

>>> decode_payload(b"12.31"), decode_payload(b'{"weight": 12.3, "unit": "g"}')["weight"]
(12.31, 12.3)
>>> decode_payload(b"[1, 2]")
Traceback (most recent call last):
...
ValueError: payload is a JSON list, expected a JSON object or a number
"""

from __future__ import annotations

import json
import math
import queue
import threading
import time
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

__all__ = ["MqttMessage", "MqttSource", "decode_payload"]


@dataclass(frozen=True, slots=True)
class MqttMessage:
    """One received message (the MQTT counterpart of a RawLine)."""

    source: str
    topic: str
    payload: bytes
    seq: int            # 1-based receive order in this run
    received_at: float  # time.time() on receipt
    retained: bool = False

    @property
    def path(self) -> str:  # for messages naming "where": mqtt://<topic>
        return f"mqtt:{self.topic}"

    @property
    def line_no(self) -> int:
        return self.seq


def decode_payload(payload: bytes) -> dict[str, Any] | float:
    """A JSON object (dict) or a bare number (float) from a payload."""
    try:
        text = payload.decode("utf-8").strip()
    except UnicodeDecodeError as exc:
        raise ValueError(f"payload is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    if not text:
        raise ValueError("payload is empty")
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ValueError(f"payload is not JSON or a number: {exc.msg} at column {exc.colno}") from None
    if isinstance(value, bool) or not isinstance(value, (dict, int, float)):
        kind = {list: "list", str: "string", bool: "boolean", type(None): "null"}.get(type(value), type(value).__name__)
        raise ValueError(f"payload is a JSON {kind}, expected a JSON object or a number")
    if isinstance(value, dict):
        return value
    x = float(value)
    if not math.isfinite(x):
        raise ValueError("payload number is not finite")
    return x


class MqttSource:
    """Subscribe to ``topic`` on ``host:port`` and queue what arrives.

    ``changed_event`` is set on each message; ``connected`` and ``subscribed``
    tell the current link state; ``connects`` counts successful
    (re)connections; ``dropped`` counts messages lost because the queue was
    full (the consumer fell ``max_queue`` messages behind).
    """

    def __init__(self, name: str, topic: str, *, host: str = "127.0.0.1", port: int = 1883,
                 qos: int = 0, client_id: str = "", keepalive: int = 30,
                 reconnect_min: float = 1.0, reconnect_max: float = 60.0,
                 username: str | None = None, password: str | None = None,
                 max_queue: int = 100_000) -> None:
        if qos not in (0, 1, 2):
            raise ValueError(f"source {name!r}: qos must be 0, 1 or 2, got {qos!r}")
        if not 0 < reconnect_min <= reconnect_max:
            raise ValueError(f"source {name!r}: need 0 < reconnect_min <= reconnect_max")
        self.name, self.topic, self.host, self.port = name, topic, host, int(port)
        self.qos, self.keepalive = qos, keepalive
        self.queue: "queue.Queue[MqttMessage]" = queue.Queue(maxsize=max_queue)
        self.changed_event = threading.Event()
        self.connected = threading.Event()
        self.subscribed = threading.Event()  # set when the broker acknowledged the subscription
        self.connects = 0
        self.dropped = 0
        self.last_error: str | None = None
        self._seq = 0
        self._seq_lock = threading.Lock()
        persistent = bool(client_id) and qos > 0
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  clean_session=not persistent)
        if username is not None:
            self.client.username_pw_set(username, password)
        self.client.reconnect_delay_set(min_delay=reconnect_min, max_delay=reconnect_max)
        self.client.on_connect = self._on_connect
        self.client.on_disconnect = self._on_disconnect
        self.client.on_message = self._on_message
        self.client.on_subscribe = self._on_subscribe
        self._started = False

    def start(self) -> None:
        """Connect in the background; returns at once (paho retries until it succeeds)."""
        if self._started:
            return
        self._started = True
        self.client.connect_async(self.host, self.port, keepalive=self.keepalive)
        self.client.loop_start()

    def stop(self) -> None:
        if not self._started:
            return
        self._started = False
        self.client.disconnect()
        self.client.loop_stop()

    # paho callbacks (network thread) -------------------------------------

    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        if reason_code.is_failure:
            self.last_error = f"broker refused connection: {reason_code}"
            return
        self.connects += 1
        client.subscribe(self.topic, qos=self.qos)
        self.connected.set()

    def _on_subscribe(self, client, userdata, mid, reason_codes, properties) -> None:
        if all(not rc.is_failure for rc in reason_codes):
            self.subscribed.set()
        else:
            self.last_error = f"broker refused subscription to {self.topic!r}: {reason_codes}"

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        self.connected.clear()
        self.subscribed.clear()
        if reason_code != 0:
            self.last_error = f"disconnected from {self.host}:{self.port}: {reason_code}"

    def _on_message(self, client, userdata, message) -> None:
        with self._seq_lock:
            self._seq += 1
            seq = self._seq
        msg = MqttMessage(self.name, message.topic, bytes(message.payload), seq, time.time(),
                          bool(message.retain))
        try:
            # Blocking here would stall paho's network thread (keepalive); a
            # full queue means the consumer is far behind: count what is dropped.
            self.queue.put_nowait(msg)
        except queue.Full:
            self.dropped += 1
        self.changed_event.set()

    # consumer side ---------------------------------------------------------

    def drain(self, max_messages: int = 100_000) -> list[MqttMessage]:
        """Messages received so far; clears ``changed_event`` first."""
        self.changed_event.clear()
        out: list[MqttMessage] = []
        while len(out) < max_messages:
            try:
                out.append(self.queue.get_nowait())
            except queue.Empty:
                break
        return out

    def wait(self, timeout: float | None = None) -> bool:
        return self.changed_event.wait(timeout)
