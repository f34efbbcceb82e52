"""MQTT topics as a resumable record source (paho-mqtt, QoS 1, persistent session).

``mqtt://[user:password@]host[:port]/topic/filter?client_id=NAME[&option=value...]``
(``mqtts://`` for TLS, default ports 1883 and 8883). The path is one topic filter
(``+`` and ``#`` wildcards as written; a ``#`` is part of the filter, not a URL
fragment); more filters with ``topic=...``. Each message is one record: a JSON object
(``format=json``, the default) or one CSV line (``format=csv&columns=a,b,c``). A batch's
``lines`` are message numbers (1, 2, ... per source, continued after a restart), its
``origin`` is the topic when all its messages share one, else the subscription; a
rejected message names its own topic.

Delivery (MQTT 3.1.1 sections 3.1.2.4, 4.3.2, 4.4; MQTT 5.0 sections 3.1.2.4, 3.1.2.11.2,
4.3.2, 4.4)
--------------------------------------------------------------------------------------
* Subscriptions are QoS 1 and the session is persistent: clean session 0 (3.1.1) or
  clean start 0 with a session expiry interval (5.0, ``session_expiry`` seconds, default
  one week). The broker keeps the subscription while sapwood is down and queues QoS 1
  messages for it. Producers must publish with QoS >= 1: a QoS 0 message is neither
  queued for an absent client nor redelivered.
* PUBACK is sent only by :meth:`MqttSource.commit`, i.e. after a checkpoint that includes
  the message is durable (paho-mqtt >= 2.0 ``manual_ack``). A message learned but not
  covered by a checkpoint is still unacknowledged, so the broker sends it again after a
  crash (with the DUP flag, under its original packet identifier, 3.1.1 [MQTT-4.4.0-1]).
  The position of a batch holds the packet identifiers that the checkpoint covers but
  that may not be acknowledged yet; after :meth:`MqttSource.seek`, a redelivery
  (DUP = 1) of one of them is acknowledged and dropped, so each message is learned once.
  PUBACKs go out in the order the messages arrived ([MQTT-4.6.0-2]).
* While connected, a redelivery of a message already handed out (a reconnect within the
  run) is dropped too.
* Retained messages: 5.0 subscribes with Retain Handling 1 (send retained messages only
  for a new subscription); 3.1.1 drops messages flagged RETAIN after a reconnect that
  found the session, since the broker re-sends retained messages on every SUBSCRIBE.

Limits to know
--------------
* The broker sends at most ``receive_max`` unacknowledged messages (5.0: the Receive
  Maximum sapwood asks for, default 65535; 3.1.1: the broker's own window, mosquitto's
  ``max_inflight_messages``, default 20). The engine must commit at least that often
  (``max_uncommitted``), otherwise the stream stalls until the next checkpoint.
* Brokers cap the queue of a persistent session (mosquitto ``max_queued_messages``,
  default 1000) and drop QoS 1 messages beyond it. For a learner that may be down for a
  while, raise the cap (0 means no cap) or messages are lost at the broker.
* Skipping redelivered messages relies on the broker not reusing a packet identifier it
  has just freed (mosquitto hands them out in rotation over 1..65535). A broker that
  reuses one at once could, if sapwood dies in the middle of a commit, make one new
  message look like an old one.
* paho-mqtt's network loop runs in the thread that reads batches; while a batch is being
  learned no keep-alive is sent. A batch that takes longer than 1.5 x ``keepalive``
  (60 s) to learn, e.g. a cold compile of the kernels outside ``warm_up``, costs a
  reconnect; the session and the packet identifiers kept above make that lose or repeat
  nothing.
* ``idle_exit`` counts quiet time since the broker last sent anything (redeliveries
  included), so a burst of redelivered, already-learned messages does not end the run.
"""

from __future__ import annotations

import collections
import logging
import random
import time
from typing import Any, Callable, Iterator

import numpy as np

from stream.errors import ConfigError

from .base import RawBatch
from .broker_payloads import (DEFAULT_LINGER, MAX_MESSAGE_BYTES, PAYLOAD_FORMATS, Backoff,
                              Options, input_error, parse_address, parse_payloads,
                              with_retries)
from .mqtt_receive import lean_client_available, lean_client_class

log = logging.getLogger("sapwood.connectors")

DEFAULT_SESSION_EXPIRY = 7 * 24 * 3600
"""Seconds an MQTT 5 broker keeps sapwood's session after a disconnect (one week)."""

PROTOCOLS = ("5", "3.1.1")
_PORTS = {"mqtt": 1883, "mqtts": 8883}


class _ConnectionLost(Exception):
    """The connection dropped while waiting for the broker (retried)."""


def _ranges(values: list[int]) -> list[list[int]]:
    """[3, 4, 5, 9] -> [[3, 5], [9, 9]]: runs of consecutive packet identifiers."""
    runs: list[list[int]] = []
    for v in values:
        if runs and v == runs[-1][1] + 1:
            runs[-1][1] = v
        else:
            runs.append([v, v])
    return runs


def _expand(runs: list) -> set[int]:
    return {v for a, b in runs for v in range(int(a), int(b) + 1)}


class MqttSource:
    """Records from MQTT topic subscriptions, acknowledged only at checkpoints.

    Parameters
    ----------
    spec
        The source URL (see the module docstring); a password in it is never shown.
    batch_rows
        Most messages per batch.
    clock, sleep, rng
        Monotonic clock, sleep function and jitter source of reconnects (tests pass
        fakes and a seeded ``random.Random``).
    **options
        Override or add to the URL's query options:

        ``client_id`` (required: the persistent session is the client id's),
        ``topic`` (more filters), ``format`` (json, csv), ``columns`` (csv field names,
        comma-separated), ``protocol`` (5, 3.1.1), ``session_expiry`` (s, 5.0),
        ``receive_max`` (unacknowledged messages the broker may send), ``keepalive``
        (s), ``username``, ``password`` (or ``password_env``, the name of an
        environment variable holding it), ``ca``, ``cert``, ``key`` (TLS files),
        ``tls_insecure`` (skip the host name check), ``linger`` (s to wait for a fuller
        batch, default 0.2), ``idle_exit`` (end after this many s without a message;
        default never), ``max_bytes`` (message size limit, default 1 MiB), ``retry``
        (s to keep reconnecting before giving up, default 300), ``connect_timeout``
        (s), ``topic_field`` (put each message's topic in this column).

    Attributes
    ----------
    name
        The redacted URL.
    max_uncommitted
        Messages that may wait for :meth:`commit` before the broker stops sending.
    reconnects
        Connections re-established after a loss.
    on_quiet
        None, or called about every half second while no message comes: the reader of
        the batches may stop the iteration from there (by raising) or write a
        checkpoint due by time.
    """

    on_quiet = None
    _lean = True   # QoS 1 messages through connectors.mqtt_receive (tests compare paho's)

    def __init__(self, spec: str, batch_rows: int = 65536, *,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep,
                 rng: random.Random | None = None, **options: Any) -> None:
        address = parse_address(spec, _PORTS.get(spec.split(":", 1)[0].lower(), 1883))
        self.name = address.display
        self._address = address
        opts = Options(address, options, "mqtt")
        self._client_id = opts.text("client_id")
        if not self._client_id:
            raise ConfigError(f"an MQTT source needs a client id for its persistent "
                              f"session: add ?client_id=NAME to {self.name!r}")
        self._filters = ([address.path] if address.path else []) + \
            [str(t) for t in opts.all("topic") if str(t)]
        if not self._filters:
            raise ConfigError(f"an MQTT source needs a topic filter: give it as the path "
                              f"of {self.name!r} or as ?topic=...")
        for topic in self._filters:
            _check_filter(topic, self.name)
        self._format = opts.choice("format", "json", PAYLOAD_FORMATS)
        columns = opts.raw("columns")
        if isinstance(columns, str):
            columns = [c.strip() for c in columns.split(",")]
        self._columns = list(columns) if columns else None
        if self._format == "csv" and not self._columns:
            raise ConfigError(f"format csv needs the column names: add "
                              f"&columns=a,b,c to {self.name!r}")
        self._protocol = opts.choice("protocol", "5", PROTOCOLS)
        self._session_expiry = opts.whole("session_expiry", DEFAULT_SESSION_EXPIRY, 1,
                                          0xFFFFFFFF)
        default_window = 65535 if self._protocol == "5" else 20
        self._receive_max = opts.whole("receive_max", default_window, 1, 65535)
        self._keepalive = opts.whole("keepalive", 60, 5, 65535)
        self._username = opts.text("username", address.username)
        self._password = opts.password(address.password)
        self._tls = address.scheme == "mqtts"
        self._ca = opts.text("ca")
        self._cert = opts.text("cert")
        self._key = opts.text("key")
        self._tls_insecure = opts.flag("tls_insecure", False)
        self._linger = opts.number("linger", DEFAULT_LINGER)
        self._idle_exit = opts.number("idle_exit", None)
        self._max_bytes = opts.whole("max_bytes", MAX_MESSAGE_BYTES, 1)
        self._retry = opts.number("retry", 300.0)
        self._connect_timeout = opts.number("connect_timeout", 10.0, 0.1)
        self._topic_field = opts.text("topic_field")
        opts.finish()
        if (self._ca or self._cert) and not self._tls:
            raise ConfigError(f"TLS files are given but {self.name!r} is not mqtts://")
        self._batch_rows = int(batch_rows)
        if self._batch_rows < 1:
            raise ConfigError(f"batch rows must be a whole number >= 1, got {batch_rows!r}")
        self.max_uncommitted = self._receive_max
        self.reconnects = 0
        self._clock = clock
        self._sleep = sleep
        self._backoff = Backoff(0.5, 30.0, rng)
        self._client = None
        self._connected_once = False
        self._seq = 0
        # received, not yet handed out: (payload, topic, packet id); payload None marks a
        # redelivery to acknowledge without learning, kept here so PUBACKs stay in order
        self._buffer: list[tuple[bytes | None, str, int]] = []
        self._buffered = 0  # messages to learn in the buffer
        self._buffered_mids: set[int] = set()
        self._first_arrival: float | None = None
        self._last_activity = float("-inf")
        # (seq, packet id) handed out or skipped, awaiting PUBACK, in arrival order
        self._unacked: collections.deque[tuple[int, int]] = collections.deque()
        self._unacked_mids: set[int] = set()
        # packet ids a checkpoint covers whose PUBACK may not have reached the broker
        self._covered: set[int] = set()
        self._acked_on_connection: set[int] = set()
        self._session_present = False
        self._connack = None
        self._suback = None
        self._lost = False
        self._closed = False
        self._warned_stall = False

    # ------------------------------------------------------------------ positions
    def seek(self, position: dict) -> None:
        """Go on after a checkpoint's position (call before :meth:`batches`)."""
        if position.get("client_id") != self._client_id:
            raise ConfigError(f"the checkpoint is for MQTT client id "
                              f"{position.get('client_id')!r}, but {self.name!r} uses "
                              f"{self._client_id!r}")
        self._seq = int(position["seq"])
        self._covered = _expand(position.get("mids", []))

    def commit(self, position: dict) -> None:
        """Acknowledge (PUBACK) every message up to ``position``, in arrival order."""
        upto = int(position["seq"])
        mids: list[int] = []
        while self._unacked and self._unacked[0][0] <= upto:
            _, mid = self._unacked.popleft()
            self._unacked_mids.discard(mid)
            self._acked_on_connection.add(mid)
            mids.append(mid)
        if self._client is not None:
            self._send_pubacks(mids)
        self._flush_skips()
        self._warned_stall = False

    def _flush_skips(self) -> None:
        """Acknowledge redeliveries queued at the front of the buffer once nothing
        received before them still waits for a checkpoint."""
        if self._unacked or self._client is None:
            return
        mids: list[int] = []
        for payload, _, mid in self._buffer:
            if payload is not None:
                break
            self._acked_on_connection.add(mid)
            self._buffered_mids.discard(mid)
            mids.append(mid)
        del self._buffer[:len(mids)]
        self._send_pubacks(mids)

    def _send_pubacks(self, mids: list[int]) -> None:
        """PUBACK each packet id, in this order (one write for all of them on the short
        path of :mod:`connectors.mqtt_receive`)."""
        client = self._client
        if hasattr(client, "ack_many"):
            client.ack_many(mids)
            return
        for mid in mids:
            client.ack(mid, 1)

    def _position(self, upto: int) -> dict:
        mids = [mid for seq, mid in self._unacked if seq <= upto]
        return {"client_id": self._client_id, "seq": upto, "mids": _ranges(mids)}

    # ------------------------------------------------------------------ connection
    def _make_client(self):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        lean = self._lean and lean_client_available()
        make = lean_client_class() if lean else mqtt.Client
        if self._protocol == "5":
            client = make(CallbackAPIVersion.VERSION2, client_id=self._client_id,
                          protocol=mqtt.MQTTv5, manual_ack=True, reconnect_on_failure=False)
        else:
            client = make(CallbackAPIVersion.VERSION2, client_id=self._client_id,
                          clean_session=False, protocol=mqtt.MQTTv311, manual_ack=True,
                          reconnect_on_failure=False)
        if lean:
            client.receive = self._receive
        if self._username is not None:
            client.username_pw_set(self._username, self._password)
        if self._tls:
            client.tls_set(ca_certs=self._ca, certfile=self._cert, keyfile=self._key)
            if self._tls_insecure:
                client.tls_insecure_set(True)
        client.connect_timeout = self._connect_timeout
        client.on_connect = self._on_connect
        client.on_subscribe = self._on_subscribe
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        return client

    def _connect_properties(self):
        if self._protocol != "5":
            return None
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = self._session_expiry
        props.ReceiveMaximum = self._receive_max
        return props

    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        self._connack = reason_code
        self._session_present = bool(getattr(flags, "session_present", False))

    def _on_subscribe(self, client, userdata, mid, reason_codes, properties) -> None:
        self._suback = reason_codes

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        if not self._closed:
            self._lost = True

    def _wait(self, done: Callable[[], bool], what: str) -> None:
        deadline = self._clock() + self._connect_timeout
        while not done():
            if self._clock() > deadline:
                raise _ConnectionLost(f"no answer to {what} within {self._connect_timeout:g} s")
            rc = self._client.loop(0.05)
            if (rc != 0 or self._lost) and not done():
                raise _ConnectionLost(f"connection lost while waiting for {what}")

    def _connect_once(self) -> None:
        self._lost = False
        self._connack = None
        self._suback = None
        if self._client is None:
            self._client = self._make_client()
            # paho keeps host, port and clean start for the reconnects that follow
            self._client.connect(self._address.host, self._address.port, self._keepalive,
                                 **({"clean_start": False,
                                     "properties": self._connect_properties()}
                                    if self._protocol == "5" else {}))
        else:
            self._client.reconnect()
        self._wait(lambda: self._connack is not None, "the connection request")
        if self._connack.is_failure:
            raise input_error(self.name, f"the broker refused the connection: {self._connack}")
        if not self._session_present:
            if self._connected_once:
                log.warning("%s: the broker did not keep the session; messages published "
                            "while disconnected are lost", self.name)
            # acknowledgements owed to an old session can no longer be sent
            self._unacked.clear()
            self._unacked_mids.clear()
            self._covered.clear()
            self._buffer = [m for m in self._buffer if m[0] is not None]
        self._connected_once = True
        self._subscribe()

    def _subscribe(self) -> None:
        if self._protocol == "5":
            from paho.mqtt.subscribeoptions import SubscribeOptions
            # Retain Handling 1: retained messages only for a subscription that is new
            options = SubscribeOptions(qos=1, retainHandling=1)
            self._client.subscribe([(t, options) for t in self._filters])
        else:
            self._client.subscribe([(t, 1) for t in self._filters])
        self._wait(lambda: self._suback is not None, "the subscription")
        for topic, code in zip(self._filters, self._suback):
            if code.is_failure:
                raise input_error(self.name, f"the broker refused the subscription to "
                                             f"{topic!r}: {code}")
            if code.value < 1:
                raise input_error(self.name, f"the broker granted QoS {code.value} for "
                                             f"{topic!r}; sapwood needs QoS 1")

    def _connect(self, what: str) -> None:
        with_retries(self._connect_once, display=self.name, backoff=self._backoff,
                     give_up=self._retry, clock=self._clock, sleep=self._sleep,
                     retriable=(OSError, _ConnectionLost), what=what)

    def _reconnect(self) -> None:
        self.reconnects += 1
        # PUBACKs sent on the lost connection may not have arrived: a redelivery of
        # those messages is covered too
        self._covered |= self._acked_on_connection
        self._acked_on_connection = set()
        log.warning("%s: connection lost; reconnecting", self.name)
        self._connect("reconnect")

    # ------------------------------------------------------------------ messages
    def _on_message(self, client, userdata, message) -> None:
        """paho's callback (packets the short path of :mod:`connectors.mqtt_receive`
        leaves to paho)."""
        payload = message.payload
        self._receive(message.topic, payload if isinstance(payload, bytes) else bytes(payload),
                      message.mid, message.qos, bool(message.dup), bool(message.retain))

    def _receive(self, topic: str, payload: bytes, mid: int, qos: int, dup: bool,
                 retain: bool) -> None:
        self._last_activity = self._clock()  # redeliveries too: the broker is not idle
        client = self._client
        if qos >= 1:
            if mid in self._unacked_mids or mid in self._buffered_mids:
                return  # sent again after a reconnect; already handed out or buffered
            skip = False
            if mid in self._covered:
                self._covered.discard(mid)
                # DUP set: the covered message itself (a checkpoint already holds it);
                # DUP clear: a first delivery reusing the id, so that one was acknowledged
                skip = dup
            if retain and self._protocol != "5" and self._session_present:
                skip = True  # 3.1.1 re-sends retained messages on every SUBSCRIBE
            if skip:
                if not self._unacked and not self._buffered_mids:
                    client.ack(mid, 1)
                    self._acked_on_connection.add(mid)
                else:
                    self._buffer.append((None, "", mid))
                    self._buffered_mids.add(mid)
                return
            self._buffered_mids.add(mid)
        self._buffer.append((payload, topic, mid if qos >= 1 else 0))
        self._buffered += 1
        if self._first_arrival is None:
            self._first_arrival = self._clock()

    # ------------------------------------------------------------------ batches
    def batches(self) -> Iterator[RawBatch]:
        """Yield batches as messages arrive; end only after ``idle_exit`` quiet seconds."""
        if self._client is None:
            self._connect("connect")
        last_message = self._clock()
        while True:
            have = self._buffered
            now = self._clock()
            if have:
                last_message = now
                if have >= self._batch_rows or now - self._first_arrival >= self._linger:
                    yield self._take()
                    # quiet time starts when the reader is back: while it learned, the
                    # broker held back what its window of unacknowledged messages kept
                    last_message = self._clock()
                    continue
                timeout = max(0.0, self._first_arrival + self._linger - now)
            else:
                quiet_since = max(last_message, self._last_activity)
                if self._idle_exit is not None and now - quiet_since >= self._idle_exit:
                    return
                timeout = 0.5 if self._idle_exit is None else \
                    max(0.0, min(0.5, quiet_since + self._idle_exit - now))
                self._flush_skips()
                self._check_stall(now - last_message)
                if self.on_quiet is not None and now - last_message >= 0.5:
                    self.on_quiet()
            rc = self._client.loop(timeout)
            # take in what has already arrived without waiting again
            while rc == 0 and not self._lost and self._buffered < self._batch_rows:
                before = len(self._buffer)
                rc = self._client.loop_read()
                if len(self._buffer) == before:
                    break
            if rc != 0 or self._lost:
                self._reconnect()

    def _check_stall(self, quiet: float) -> None:
        if (not self._warned_stall and len(self._unacked) >= self.max_uncommitted
                and quiet > 5.0):
            self._warned_stall = True
            log.warning("%s: %d messages wait for a checkpoint; the broker sends no more "
                        "until they are acknowledged", self.name, len(self._unacked))

    def _take(self) -> RawBatch:
        payloads: list[bytes] = []
        topics: list[str] = []
        first = self._seq + 1
        used = 0
        for payload, topic, mid in self._buffer:
            if payload is not None:
                if len(payloads) == self._batch_rows:
                    break
                payloads.append(payload)
                topics.append(topic)
                self._seq += 1
            used += 1
            if mid:
                self._unacked.append((self._seq, mid))
                self._unacked_mids.add(mid)
                self._buffered_mids.discard(mid)
        del self._buffer[:used]
        n = len(payloads)
        self._buffered -= n
        self._first_arrival = self._clock() if self._buffered else None
        seqs = np.arange(first, first + n, dtype=np.int64)
        parsed = parse_payloads(payloads, seqs, topics, None, self._format, self._columns,
                                self._max_bytes)
        frame = parsed.frame
        if self._topic_field is not None and len(frame):
            frame[self._topic_field] = [topics[i] for i in (parsed.lines - first).tolist()]
        same = n and topics.count(topics[0]) == n
        origin = topics[0] if same else ",".join(self._filters)
        return RawBatch(frame, origin, parsed.lines, parsed.rejects, self._position(self._seq),
                        keyed=self._format == "json")

    def close(self) -> None:
        """Deliver the PUBACKs committed so far, then disconnect; safe to call twice."""
        if self._closed:
            return
        self._closed = True
        client = self._client
        if client is None:
            return
        try:
            if not self._lost:
                self._barrier()
            client.disconnect()
            deadline = self._clock() + 2.0
            while client.want_write() and self._clock() < deadline:
                if client.loop(0.05) != 0:
                    break
        except Exception:  # noqa: BLE001 - closing must not mask the run's own error
            log.debug("%s: error while disconnecting", self.name, exc_info=True)
        self._client = None

    def _barrier(self) -> None:
        """Wait until the broker has processed every packet sent so far.

        A broker reads a connection's packets in order, so the answer to an UNSUBSCRIBE
        (of a filter sapwood never subscribed to; MQTT 3.1.1 section 3.10.4 requires the
        UNSUBACK all the same) means the PUBACKs before it were taken in. Without it, a
        new connection under the same client id that arrives at once may take the
        session over before the broker has read them (seen with mosquitto 2.0).
        """
        done = []
        self._client.on_unsubscribe = lambda *args: done.append(True)
        self._client.unsubscribe(f"$sapwood/barrier/{self._client_id}")
        try:
            self._wait(lambda: bool(done), "the broker to take in the acknowledgements")
        except _ConnectionLost:
            log.warning("%s: could not confirm that the broker took in the last "
                        "acknowledgements; their messages may come again", self.name)


def _check_filter(topic: str, display: str) -> None:
    """Topic filter rules of MQTT 3.1.1 section 4.7.1 ('#' last and alone, '+' alone)."""
    levels = topic.split("/")
    for i, level in enumerate(levels):
        bad = ("#" in level and (level != "#" or i != len(levels) - 1)) or \
              ("+" in level and level != "+")
        if bad:
            raise ConfigError(f"topic filter {topic!r} is not valid MQTT: '#' must be a "
                              f"whole last level and '+' a whole level (in {display!r})")
