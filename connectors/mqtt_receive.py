"""A lighter receive path for QoS 1 PUBLISH packets under paho-mqtt.

paho-mqtt turns every incoming PUBLISH into an ``MQTTMessage`` (with, on MQTT 5, a
``Properties`` object built and unpacked even when the packet has none), logs it, and
matches its topic against per-topic callbacks before calling ``on_message``; measured
here, that is most of the time a single-record message costs. :class:`LeanClient` reads
the fixed layout of a QoS 1 PUBLISH itself (MQTT 3.1.1 section 3.3; MQTT 5.0 section
3.3: topic name, packet identifier, property length, payload) and hands topic, payload,
packet identifier and flags straight to ``receive``; ``ack_many`` sends the PUBACKs of
a commit in one write instead of one system call each. Every other packet, and a PUBLISH
that carries properties, QoS 0 or 2, or a topic that is not UTF-8, takes paho's own
path, so behaviour is paho's wherever the short path does not apply.

It overrides one internal method of paho-mqtt 2.x (``Client._handle_publish``, reading
``_in_packet`` and ``_protocol``); :func:`lean_client_available` says whether the
installed version has them, and the source falls back to paho's client otherwise.
"""

from __future__ import annotations

import struct
from typing import Callable

import numpy as np

Receive = Callable[[str, bytes, int, int, bool, bool], None]
"""receive(topic, payload, packet id, qos, dup, retain)."""

_UNSIGNED_SHORT = struct.Struct("!H")


def lean_client_available() -> bool:
    """Whether the installed paho-mqtt is a 2.x release (the internals
    :class:`LeanClient` uses are those of 2.x)."""
    import paho.mqtt
    import paho.mqtt.client as mqtt

    return str(getattr(paho.mqtt, "__version__", "")).startswith("2.") and \
        hasattr(mqtt.Client, "_handle_publish")


def lean_client_class():
    """The paho ``Client`` subclass with the short receive path (built on first use, so
    importing this module does not import paho)."""
    global _LEAN
    if _LEAN is None:
        _LEAN = _make_class()
    return _LEAN


_LEAN = None


def _make_class():
    import paho.mqtt.client as mqtt

    v5 = mqtt.MQTTv5
    puback = mqtt.PUBACK
    success = mqtt.MQTTErrorCode.MQTT_ERR_SUCCESS

    class LeanClient(mqtt.Client):
        """paho's client, with QoS 1 messages without properties handed to
        ``receive`` (set it before connecting; None keeps paho's path)."""

        receive: Receive | None = None

        def _handle_publish(self):
            receive = self.receive
            header = self._in_packet["command"]
            if receive is None or (header & 0x06) >> 1 != 1:
                return super()._handle_publish()
            packet = self._in_packet["packet"]
            try:
                (size,) = _UNSIGNED_SHORT.unpack_from(packet, 0)
                if size == 0:                # a topic alias, or malformed on 3.1.1
                    return super()._handle_publish()
                topic = bytes(packet[2:2 + size]).decode("utf-8")
                (mid,) = _UNSIGNED_SHORT.unpack_from(packet, 2 + size)
                at = 4 + size
                if self._protocol == v5:
                    if packet[at] != 0:      # properties present: paho decodes them
                        return super()._handle_publish()
                    at += 1
            except (struct.error, IndexError, UnicodeDecodeError):
                return super()._handle_publish()
            receive(topic, bytes(packet[at:]), mid, 1, bool(header & 0x08),
                    bool(header & 0x01))
            return success

        def ack_many(self, mids: list[int]):
            """PUBACK each packet id in ``mids``, in order, as one write: the packets
            paho would send one by one (fixed header 0x40, remaining length 2, the
            id; MQTT 5.0 lets the reason code go when it is 0 and there are no
            properties, section 3.4.2.1 as remembered)."""
            if not mids:
                return success
            packets = np.empty((len(mids), 4), np.uint8)
            ids = np.asarray(mids, dtype=np.uint16)
            packets[:, 0] = puback
            packets[:, 1] = 2
            packets[:, 2] = ids >> 8
            packets[:, 3] = ids & 0xFF
            return self._packet_queue(puback, packets.tobytes(), 0, 1)

    return LeanClient
