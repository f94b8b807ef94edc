"""Where measurement lines come from: followed files, globs of files, stdin, MQTT.

Each source yields raw records (:class:`RawLine`, :class:`MqttMessage`) and,
where a position exists (files), plain-data checkpoints that the caller
commits only after the records were processed.
"""

from .follow import (Deleted, FileFollower, FollowEvent, Opened, RawLine, ReadFailed, RemainderLost, Resumed,
                     Rotated, Truncated)
from .glob_source import GlobSource
from .stdin_source import StdinSource

__all__ = ["RawLine", "FileFollower", "FollowEvent", "Opened", "Rotated", "Truncated", "Deleted",
           "Resumed", "RemainderLost", "ReadFailed", "GlobSource", "StdinSource"]


def __getattr__(name: str):
    # paho-mqtt is imported only when an MQTT source is used.
    if name in ("MqttSource", "MqttMessage", "decode_payload"):
        from . import mqtt_source
        return getattr(mqtt_source, name)
    raise AttributeError(name)
