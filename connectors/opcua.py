"""OPC UA variables (IEC 62541) as a live record source (the optional extra
``sapwood[plant]``, the asyncua library).

``opc.tcp://[user[:password]@]host[:port][/path]?node=FIELD:NODEID&node=...``

Each ``node=FIELD:NODEID`` names a variable (``NODEID`` in the standard's text form,
e.g. ``ns=2;s=Line3.SupplyTemp`` or ``ns=2;i=1042``) and the field its values fill. The
source subscribes to every variable (data change notifications, publishing interval
``interval`` seconds, default 1) and, at every tick of that interval at which at least
one value changed, makes one record: every variable's latest value, plus ``time``, the
newest server timestamp among them (ISO 8601, UTC). A label can come from another node
(name its field and pass it as ``--target``) or later from ``--labels``.

Options: ``interval`` (s), ``time_field`` (the timestamp's field, default ``time``),
``idle_exit`` (end after this many s without a change; default never), ``retry`` (s to
keep reconnecting after the server is lost, default 300), ``timeout`` (s per request,
default 10), ``username`` and ``password`` (or ``password_env``), ``security`` (asyncua's
security string, e.g. ``Basic256Sha256,SignAndEncrypt,client-cert.pem,client-key.pem``).
Passwords are never shown.

When the server goes away (a restart, a cut link), the source reconnects with backoff
and subscribes again; values that changed while it was away are not replayed (OPC UA
current values have no history here), and the run goes on with the next change. A
record's ``line`` is its number in the run (1, 2, ...), continued after a checkpoint.
"""

from __future__ import annotations

import logging
import random
import threading
import time
from typing import Any, Callable, Iterator

import numpy as np
import pandas as pd

from stream.errors import ConfigError, InputError

from .base import RawBatch
from .broker_payloads import Backoff, Options, parse_address

DEFAULT_PORT = 4840
"""The port IEC 62541 registers for OPC UA over TCP."""


class _Latest:
    """Subscription handler: the latest value and server timestamp of each node."""

    def __init__(self, fields: dict[str, str]) -> None:
        self._fields = fields                   # node id text -> field
        self.values: dict[str, Any] = {}
        self.stamps: dict[str, Any] = {}
        self.changed = False
        self.lost = False
        self.lock = threading.Lock()

    def datachange_notification(self, node, value, data) -> None:
        field = self._fields.get(node.nodeid.to_string())
        if field is None:
            return
        stamp = data.monitored_item.Value.ServerTimestamp or \
            data.monitored_item.Value.SourceTimestamp
        with self.lock:
            self.values[field] = value
            self.stamps[field] = stamp
            self.changed = True

    def status_change_notification(self, status) -> None:
        self.lost = True


class OpcUaSource:
    """Records assembled from subscribed OPC UA variables, one per tick with a change.

    Parameters
    ----------
    spec
        The URL (see the module docstring).
    batch_rows
        Most records per batch.
    clock, sleep
        Monotonic clock and sleep (tests may pass their own).
    **options
        Override the URL's query options.
    """

    on_quiet = None

    def __init__(self, spec: str, batch_rows: int = 65536, *,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep, **options: Any) -> None:
        address = parse_address(spec, DEFAULT_PORT)
        self.name = address.display
        opts = Options(address, options, "opc.tcp")
        self._nodes: dict[str, str] = {}        # field -> node id text
        for item in opts.all("node"):
            field, colon, node = str(item).partition(":")
            if not colon or not field or not node:
                raise ConfigError(f"node must be FIELD:NODEID (e.g. temp:ns=2;i=7), got "
                                  f"{item!r} in {self.name!r}")
            if field in self._nodes:
                raise ConfigError(f"field {field!r} is named by two nodes in {self.name!r}")
            self._nodes[field] = node
        if not self._nodes:
            raise ConfigError(f"an OPC UA source needs the variables to read: add "
                              f"&node=FIELD:NODEID for each to {self.name!r}")
        self._interval = opts.number("interval", 1.0, 0.01)
        self._time_field = opts.text("time_field", "time")
        if self._time_field in self._nodes:
            raise ConfigError(f"time_field {self._time_field!r} is also a node's field "
                              f"(in {self.name!r})")
        self._idle_exit = opts.number("idle_exit", None)
        self._retry = opts.number("retry", 300.0)
        self._timeout = opts.number("timeout", 10.0, 0.1)
        self._username = opts.text("username", address.username)
        self._password = opts.password(address.password)
        self._security = opts.text("security")
        opts.finish()
        host = f"[{address.host}]" if ":" in address.host else address.host
        self._url = f"opc.tcp://{host}:{address.port}/{address.path}"
        self._batch_rows = int(batch_rows)
        self._clock, self._sleep = clock, sleep
        self._backoff = Backoff(0.5, 10.0, random.Random())
        self._client = None
        self._handler: _Latest | None = None
        self._seq = 0
        self._closed = False
        self.reconnects = 0
        for noisy in ("asyncua", "asyncio"):   # the library logs every lost connection
            logging.getLogger(noisy).setLevel(logging.CRITICAL)

    # ------------------------------------------------------------------ positions
    def seek(self, position: dict) -> None:
        """Go on numbering records after a checkpoint's position."""
        self._seq = int(position["seq"])

    def commit(self, position: dict) -> None:
        """Nothing to acknowledge: OPC UA current values are not replayed."""

    # ------------------------------------------------------------------ connection
    def _connect_once(self) -> None:
        from asyncua import ua
        from asyncua.sync import Client

        client = Client(self._url, timeout=self._timeout)
        if self._username is not None:
            client.set_user(self._username)
        if self._password is not None:
            client.set_password(self._password)
        if self._security:
            client.set_security_string(self._security)
        handler = _Latest({})
        try:
            client.connect()
            nodes = {field: client.get_node(node) for field, node in self._nodes.items()}
            handler = _Latest({n.nodeid.to_string(): f for f, n in nodes.items()})
            subscription = client.create_subscription(self._interval * 1000.0, handler)
            subscription.subscribe_data_change(list(nodes.values()))
        except (OSError, TimeoutError, ConnectionError, ua.UaError, RuntimeError) as exc:
            _drop(client)
            raise _Lost(str(exc) or type(exc).__name__) from exc
        self._client, self._handler = client, handler

    def _connect(self) -> None:
        deadline = self._clock() + self._retry
        while True:
            try:
                self._connect_once()
                self._backoff.reset()
                return
            except _Lost as exc:
                if self._clock() >= deadline:
                    raise InputError(f"cannot read {self.name!r}: {exc} (gave up after "
                                     f"{self._retry:g} s)") from None
                self._sleep(self._backoff.next())

    def _alive(self) -> bool:
        """Whether the server still answers (read its state)."""
        if self._handler is not None and self._handler.lost:
            return False
        try:
            self._client.nodes.server_state.read_value()
            return True
        except Exception:     # any failure of the link or the session
            return False

    # ------------------------------------------------------------------ batches
    def batches(self) -> Iterator[RawBatch]:
        """Yield records as the variables change; end only after ``idle_exit`` quiet s."""
        if self._client is None:
            self._connect()
        rows: list[dict] = []
        last_change = self._clock()
        next_tick = self._clock() + self._interval
        while True:
            now = self._clock()
            if now < next_tick:
                self._sleep(next_tick - now)
            next_tick += self._interval
            record = self._take_record()
            now = self._clock()
            if record is not None:
                rows.append(record)
                last_change = now
            if rows and (len(rows) >= self._batch_rows or record is None
                         or len(rows) * self._interval >= 0.2):
                yield self._batch(rows)
                rows = []
                last_change = self._clock()   # quiet time counts from the reader's return
                continue
            quiet = now - last_change
            if record is None and quiet >= max(3 * self._interval, 2.0) and not self._alive():
                self._reconnect()
                last_change = self._clock()
                next_tick = last_change + self._interval
                continue
            if self._idle_exit is not None and quiet >= self._idle_exit:
                return
            if record is None and self.on_quiet is not None and quiet >= 0.5:
                self.on_quiet()

    def _take_record(self) -> dict | None:
        handler = self._handler
        with handler.lock:
            if not handler.changed:
                return None
            handler.changed = False
            record = dict(handler.values)
            stamps = [s for s in handler.stamps.values() if s is not None]
        record[self._time_field] = max(stamps).isoformat() if stamps else None
        return record

    def _batch(self, rows: list[dict]) -> RawBatch:
        first = self._seq + 1
        self._seq += len(rows)
        frame = pd.DataFrame(rows, columns=[*self._nodes, self._time_field])
        return RawBatch(frame, self.name, np.arange(first, self._seq + 1, dtype=np.int64),
                        position={"seq": self._seq}, keyed=True)

    def _reconnect(self) -> None:
        _drop(self._client)
        self._client = None
        self.reconnects += 1
        self._connect()

    def close(self) -> None:
        """Disconnect; safe to call twice."""
        if self._closed:
            return
        self._closed = True
        _drop(self._client)
        self._client = None


class _Lost(Exception):
    """The server could not be reached or the session failed."""


def _drop(client) -> None:
    """Disconnect ``client`` and stop its thread, whatever state the link is in."""
    if client is None:
        return
    try:
        client.disconnect()
    except Exception:   # a dead link fails to close politely; the thread must stop anyway
        try:
            client.tloop.stop()
        except Exception:
            pass
