"""A Redis stream read through a consumer group, each entry learned exactly once.

``redis://[user:password@]host[:port][/db]?stream=KEY[&group=G&consumer=C&option=value...]``
(``rediss://`` for TLS). By default an entry's field/value pairs are the record
(``XADD telemetry * temp 21.5 door open``); with ``format=json`` or ``format=csv`` one
field (``field=payload``) holds a JSON object or a CSV line. A batch's ``origin`` is the
stream, its ``lines`` are message numbers (1, 2, ... per source, continued after a
restart) and a rejected entry's reason names its entry id; ``id_field=entry_id`` adds
the entry id as a column (a name ending in ``_id`` makes schema inference treat it as
the record id).

How exactly-once works (Redis documentation of XREADGROUP, XACK, XPENDING, XAUTOCLAIM)
--------------------------------------------------------------------------------------
* Entries are read with XREADGROUP, which records each one in the group's pending
  entries list (PEL) under this consumer until it is acknowledged.
* Entries are handed out in increasing id order only, so "learned" is always "every
  entry up to some id". A batch's position is ``{"last_id": <its last entry>, ...}``;
  :meth:`RedisStreamSource.commit` (called after a checkpoint holding that position is
  durable) XACKs the entries up to ``last_id``, and nothing else acknowledges them.
* At start the source first takes over the pending entries of the group's other
  consumers (XAUTOCLAIM with min-idle-time 0: earlier runs of this learner under another
  consumer name), then reads its own PEL from the beginning (XREADGROUP with id 0), in id
  order: entries with id <= the checkpoint's ``last_id`` were learned before the crash,
  so they are acknowledged without being handed out; the rest are handed out. Then it
  reads new entries (XREADGROUP with ``>``).
* After a lost connection it reads its own PEL again from the last entry it handed out,
  so entries the server assigned to it in a reply that never arrived are not skipped.
  First it closes the lost connection on the server (CLIENT KILL ID, its id taken with
  CLIENT ID at connect): a command sent into a cut link can reach the server seconds
  after the link is back and would assign entries on a connection nobody reads.
* Before it ends (``idle_exit``) it asks for pending entries after the last one handed
  out (XPENDING) and reads them first, so no entry it holds is left unseen.
* Reads go on a connection of their own, and while a batch of new entries is parsed and
  learned the next read is already sent on it (one read in flight), so the server
  gathers the next entries meanwhile. Entries of a read in flight when the run stops are
  pending under this consumer, unseen, and its next run reads them first.
* Entries deleted from the stream before they were read (XDEL, MAXLEN trimming) come
  back as ids without fields; they go to quarantine and are acknowledged.

On a Redis Cluster any node serves as the address: the source uses a cluster-aware
client (:mod:`connectors.redis_clients`) that follows MOVED and ASK, so reading goes on
when the stream's hash slot moves to another node; the connection closed after a loss
is the one on the node that served the stream then. There, reads are not sent ahead.

Assumptions: one learner per consumer group (``claim=false`` lets several learners
share a group, each under its own fixed consumer name, each recovering only its own
pending entries); the checkpoint given to :meth:`seek` is the latest one (an older
checkpoint misses entries that were acknowledged after it).
"""

from __future__ import annotations

import collections
import logging
import random
import time
from typing import Any, Callable, Iterator, Sequence

import numpy as np
import pandas as pd

from stream.errors import ConfigError, InputError

from .base import RawBatch, Reject
from .broker_payloads import (DEFAULT_LINGER, MAX_MESSAGE_BYTES, PAYLOAD_FORMATS, Backoff,
                              Options, Parsed, frame_from_fields, input_error,
                              parse_address, parse_payloads, with_retries)
from .fencing import ACK_CHUNK, Fence
from .redis_clients import node_address, node_of, open_redis

log = logging.getLogger("sapwood.connectors")

FORMATS = ("fields",) + PAYLOAD_FORMATS
_PORTS = {"redis": 6379, "rediss": 6379}
_ACK_CHUNK = 10000
_CLAIM_COUNT = 1000
_REDIRECTS = 16  # MOVED/ASK replies followed for one command, as redis-py's cluster client
READ_COUNT = 8192
"""Most entries one XREADGROUP asks for (a batch holds at most this many): measured on
200k entries of 4 fields, a whole run read 125k records/s at 65,536 per read and 145k
at 8,192 (the server builds, and the client parses, smaller replies faster)."""


def entry_id(text: str | bytes) -> tuple[int, int]:
    """A stream entry id "1700000000000-3" as (milliseconds, sequence) for comparisons."""
    if isinstance(text, bytes):
        text = text.decode("ascii")
    ms, _, seq = text.partition("-")
    return int(ms), int(seq or 0)


def _raw(response, **options):
    """Keep a reply as the server sent it (lists of bytes): no dict per entry."""
    return response


def _raw_replies(client):
    """``client`` with the replies of the reading commands kept raw."""
    if client.response_callbacks.get("XREADGROUP") is not _raw:
        for command in ("XREADGROUP", "XAUTOCLAIM", "XPENDING"):
            client.set_response_callback(command, _raw)
    return client


def _packed(commands: list[tuple]) -> list[bytes]:
    """Commands in the Redis protocol, packed by hiredis (a dependency, through
    ``redis[hiredis]``); redis-py's own packer makes a Python pass over every argument
    first: thousands of ids per acknowledgement."""
    from hiredis import pack_command

    return [pack_command(command) for command in commands]


class _Tags:
    """ "entry <id>" for the i-th kept entry, made only when a reject needs it."""

    def __init__(self, ids: list[bytes], alive: list[int]) -> None:
        self._ids = ids
        self._alive = alive

    def __len__(self) -> int:
        return len(self._alive)

    def __getitem__(self, i: int) -> str:
        return f"entry {self._ids[self._alive[i]].decode()}"

    def subset(self, keep: list[int]) -> "_Tags":
        return _Tags(self._ids, [self._alive[i] for i in keep])


class RedisStreamSource:
    """Entries of one Redis stream, read through a consumer group.

    Parameters
    ----------
    spec
        The source URL (see the module docstring); a password in it is never shown.
    batch_rows
        Most entries per batch (the COUNT of each read).
    clock, sleep, rng
        Monotonic clock, sleep function and jitter source of reconnects.
    **options
        Override or add to the URL's query options:

        ``stream`` (required), ``group`` (default sapwood), ``consumer`` (default
        sapwood), ``start`` (where a new group starts: 0 for the whole stream, the
        default, or $ for new entries only, or an entry id), ``claim`` (take over other
        consumers' pending entries at start, default true), ``fence`` (take a fencing
        epoch at start and acknowledge and checkpoint only while it is the latest,
        default true; :mod:`connectors.fencing`), ``format`` (fields, json,
        csv), ``field`` (the payload field of json/csv, default payload), ``columns``
        (csv field names), ``id_field`` (put each entry id in this column), ``linger``
        (s a read waits for entries, default 0.2), ``idle_exit`` (end after this many s
        without an entry; 0 ends when the stream is drained; default never),
        ``max_bytes`` (entry size limit, default 1 MiB), ``retry`` (s to keep
        reconnecting before giving up, default 300), ``connect_timeout`` (s),
        ``username``, ``password`` (or ``password_env``, the name of an environment
        variable holding it), ``ca``, ``cert``, ``key``, ``tls_insecure``.

    Attributes
    ----------
    name
        The redacted URL.
    max_uncommitted
        None: the server holds any number of pending entries.
    reconnects
        Connections re-established after a loss.
    on_quiet
        None, or called each time a read waited ``linger`` seconds and found nothing
        new: the reader of the batches may stop the iteration from there (by raising)
        or write a checkpoint due by time, though no entry comes.
    """

    max_uncommitted = None
    on_quiet = None

    def __init__(self, spec: str, batch_rows: int = 65536, *,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep,
                 rng: random.Random | None = None, **options: Any) -> None:
        address = parse_address(spec, 6379)
        self.name = address.display
        self._address = address
        opts = Options(address, options, "redis")
        self._stream = opts.text("stream")
        if not self._stream:
            raise ConfigError(f"a Redis source needs a stream: add ?stream=KEY to "
                              f"{self.name!r}")
        self._group = opts.text("group", "sapwood")
        self._consumer = opts.text("consumer", "sapwood")
        self._start = opts.text("start", "0")
        if self._start not in ("0", "$"):
            try:
                entry_id(self._start)
            except ValueError:
                raise ConfigError(f"start must be 0, $ or an entry id, got "
                                  f"{self._start!r} (in {self.name!r})") from None
        self._claim = opts.flag("claim", True)
        self._fenced = opts.flag("fence", True)
        self._format = opts.choice("format", "fields", FORMATS)
        self._field = opts.text("field", "payload").encode()
        columns = opts.raw("columns")
        if isinstance(columns, str):
            columns = [c.strip() for c in columns.split(",")]
        self._columns = list(columns) if columns else None
        if self._format == "csv" and not self._columns:
            raise ConfigError(f"format csv needs the column names: add &columns=a,b,c "
                              f"to {self.name!r}")
        self._id_field = opts.text("id_field")
        self._linger = opts.number("linger", DEFAULT_LINGER)
        self._idle_exit = opts.number("idle_exit", None)
        self._max_bytes = opts.whole("max_bytes", MAX_MESSAGE_BYTES, 1)
        self._retry = opts.number("retry", 300.0)
        self._connect_timeout = opts.number("connect_timeout", 10.0, 0.1)
        self._username = opts.text("username", address.username)
        self._password = opts.password(address.password)
        self._ca = opts.text("ca")
        self._cert = opts.text("cert")
        self._key = opts.text("key")
        self._tls_insecure = opts.flag("tls_insecure", False)
        db_text = address.path.strip("/") or "0"
        opts.finish()
        if not db_text.isdigit():
            raise ConfigError(f"database must be a whole number >= 0, got {db_text!r} "
                              f"(in {self.name!r})")
        self._db = int(db_text)
        self._tls = address.scheme == "rediss"
        if (self._ca or self._cert) and not self._tls:
            raise ConfigError(f"TLS files are given but {self.name!r} is not rediss://")
        self._batch_rows = int(batch_rows)
        if self._batch_rows < 1:
            raise ConfigError(f"batch rows must be a whole number >= 1, got {batch_rows!r}")
        self.reconnects = 0
        self._clock = clock
        self._sleep = sleep
        self._backoff = Backoff(0.5, 30.0, rng)
        self._client = None
        self.cluster = False                  # whether the server is a cluster node
        # (host:port, the server's id) of our connection, and of connections lost
        self._client_id: tuple[str, int | None] | None = None
        self._stale_ids: list[tuple[str, int]] = []
        self._seq = 0
        self._covered: tuple[int, int] | None = None  # last id of the checkpoint
        self._high: tuple[int, int] | None = None  # covered or handed out, whichever later
        self._last_text: str | None = None
        # (last id, ids) of each batch handed out and not yet acknowledged, in id order
        self._unacked: collections.deque[tuple[tuple[int, int], list[bytes]]] = \
            collections.deque()
        self._cursor: bytes = b"0"  # an id: own pending entries after it; b">": new ones
        self._read_conn = None      # the connection of reads (none on a cluster)
        self._in_flight: tuple | None = None  # a read sent ahead, its reply not yet read
        self._ack_conn = None       # the connection of acknowledgements
        self._acks_sent: tuple | None = None  # (connection, commands) whose replies wait
        self._acks_unsure: list[tuple] | None = None  # sent on a connection since lost
        self._recovered = False
        self._closed = False
        self.fence: Fence | None = None

    # ------------------------------------------------------------------ positions
    def seek(self, position: dict) -> None:
        """Go on after a checkpoint's position (call before :meth:`batches`)."""
        if position.get("stream") != self._stream or position.get("group") != self._group:
            raise ConfigError(f"the checkpoint is for stream {position.get('stream')!r}, "
                              f"group {position.get('group')!r}, but {self.name!r} reads "
                              f"stream {self._stream!r}, group {self._group!r}")
        self._seq = int(position["seq"])
        last = position.get("last_id")
        if last is not None:
            self._covered = entry_id(last)
            self._high = self._covered
            self._last_text = str(last)

    def commit(self, position: dict) -> None:
        """XACK every entry handed out up to ``position["last_id"]``."""
        if position.get("last_id") is None:
            return
        upto = entry_id(position["last_id"])
        ids: list[bytes] = []
        while self._unacked and self._unacked[0][0] <= upto:
            ids += self._unacked.popleft()[1]
        if self._unacked and entry_id(self._unacked[0][1][0]) <= upto:
            # a position inside a batch: split that batch's ids
            last, chunk = self._unacked.popleft()
            cut = next(i for i, raw in enumerate(chunk) if entry_id(raw) > upto)
            ids += chunk[:cut]
            self._unacked.appendleft((last, chunk[cut:]))
        self._ack(ids)

    def _position(self) -> dict:
        return {"stream": self._stream, "group": self._group, "last_id": self._last_text,
                "seq": self._seq}

    # ------------------------------------------------------------------ connection
    def _connect_once(self) -> None:
        import redis
        from redis.backoff import NoBackoff
        from redis.retry import Retry

        kwargs: dict[str, Any] = {}
        if self._tls:
            kwargs.update(ssl=True, ssl_ca_certs=self._ca, ssl_certfile=self._cert,
                          ssl_keyfile=self._key,
                          ssl_check_hostname=not self._tls_insecure)
        try:
            client, self.cluster = open_redis(
                self._address.host, self._address.port, self._db, self.name,
                username=self._username, password=self._password,
                socket_connect_timeout=self._connect_timeout,
                socket_timeout=self._linger + self._connect_timeout,
                retry=Retry(NoBackoff(), 0),  # sapwood retries, with backoff
                client_name=f"sapwood:{self._consumer}", **kwargs)
        except redis.AuthenticationError as exc:
            raise input_error(self.name, f"the server refused the credentials: {exc}") from exc
        except redis.ResponseError as exc:
            raise input_error(self.name, f"the server refused the connection: {exc}") from exc
        self._client = client
        self._close_stale()
        self._client_id = None
        self._create_group()

    def _stream_node(self):
        """The plain client of the node serving the stream (the one server's client when
        there is no cluster), its replies kept raw."""
        node = _raw_replies(node_of(self._client, self._stream) if self.cluster
                            else self._client)
        self._track_node(node)
        return node

    def _execute(self, *command: Any):
        """Send one command on the stream to the node serving it; on a cluster, follow
        MOVED (the slot map is refreshed) and ASK (ASKING, then the command, on one
        connection), as the Redis Cluster specification describes."""
        from redis.exceptions import AskError, MovedError, ResponseError

        for _ in range(_REDIRECTS):
            node = self._stream_node()
            try:
                return node.execute_command(*command)
            except MovedError:           # the slot moved: read the cluster's map again
                if not self.cluster:
                    raise
                self._client.nodes_manager.initialize()
            except AskError as exc:      # the slot is migrating and the key has left
                if not self.cluster:
                    raise
                target = _raw_replies(self._node(f"{exc.host}:{exc.port}"))
                pipe = target.pipeline(transaction=False)
                pipe.execute_command("ASKING")
                pipe.execute_command(*command)
                return pipe.execute()[1]
            except ResponseError as exc:
                # a read blocked while the stream migrated away ends so; ask again
                if not str(exc).startswith("UNBLOCKED"):
                    raise
        raise input_error(self.name, f"the cluster redirected a command on stream "
                                     f"{self._stream!r} {_REDIRECTS} times")

    def _track_node(self, node) -> None:
        """Know the server's id of the connection that reads the stream (on a cluster,
        again whenever the stream's slot has moved to another node)."""
        import redis

        address = node_address(node)
        if self._client_id is not None and self._client_id[0] == address:
            return
        try:
            self._client_id = (address, int(node.client_id()))
        except redis.ResponseError:     # an ACL without CLIENT ID: nothing to close later
            self._client_id = (address, None)

    def _close_stale(self) -> None:
        """Close, on the server, the connections this source lost.

        A command sent on a connection that then went dead may reach the server long
        after (TCP delivers it once the link is back) and an XREADGROUP there would
        assign entries to this consumer on a connection nobody reads: entries pending
        but never seen, or seen out of order. Closing the old connection (CLIENT KILL ID,
        on the node that had it) before this consumer reads its pending entries again
        rules that out.
        """
        import redis

        while self._stale_ids:
            address, stale = self._stale_ids.pop()
            try:
                self._node(address).execute_command("CLIENT", "KILL", "ID", stale)
            except (redis.ResponseError, LookupError) as exc:
                if "No such client" not in str(exc):
                    log.warning("%s: cannot close the lost connection %d of %s (%s); "
                                "entries a late command assigns to it are read before "
                                "the run ends", self.name, stale, address, exc)

    def _node(self, address: str):
        """The plain client of the node at host:port (of the one server if no cluster)."""
        if not self.cluster:
            return self._client
        host, _, port = address.rpartition(":")
        node = self._client.get_node(host=host, port=int(port))
        if node is None:
            raise LookupError(f"{address} is no longer a node of the cluster")
        return self._client.get_redis_connection(node)

    def _create_group(self) -> None:
        import redis

        try:
            self._execute("XGROUP", "CREATE", self._stream, self._group, self._start,
                          "MKSTREAM")
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise input_error(self.name, f"cannot create consumer group "
                                             f"{self._group!r}: {exc}") from exc

    def _retriable(self) -> tuple[type[BaseException], ...]:
        import redis
        return (redis.ConnectionError, redis.TimeoutError, OSError)

    def _call(self, *args: Any, make_args: Callable[[], tuple] | None = None,
              reading: bool = False):
        """One command, reconnecting with backoff while the server cannot be reached.

        ``make_args`` builds the command again for each try (a read switches from new
        entries to its own pending ones after a lost connection); ``reading`` sends it on
        the reading connection (:meth:`_execute_reading`).
        """
        import redis

        execute = self._execute_reading if reading else (lambda c: self._execute(*c))

        def attempt():
            command = make_args() if make_args is not None else args
            if self._client is None:
                self._connect_once()
            try:
                return command, execute(command)
            except self._retriable():
                self._lost_connection()
                raise
            except redis.ResponseError as exc:
                if str(exc).startswith("SUPERSEDED") and self.fence is not None:
                    raise self.fence.superseded(str(exc).split()[-1]) from None
                if "NOGROUP" not in str(exc):
                    raise input_error(self.name, str(exc)) from exc
                # the group (or stream) is gone, e.g. a server restarted without
                # persistence; entries up to those handed out are skipped anyway
                log.warning("%s: consumer group %r is gone; creating it again",
                            self.name, self._group)
                self._create_group()
                return command, execute(command)

        return with_retries(attempt, display=self.name, backoff=self._backoff,
                            give_up=self._retry, clock=self._clock, sleep=self._sleep,
                            retriable=self._retriable(), what="reach the server")

    def _lost_connection(self) -> None:
        if self._client_id is not None and self._client_id[1] is not None:
            self._stale_ids.append(self._client_id)
            self._client_id = None
        self._drop_client()
        self.reconnects += 1
        # a reply lost with the connection may have assigned entries to this consumer:
        # read its pending entries after the last one handed out before any new ones
        if self._cursor == b">":
            self._cursor = self._last_text.encode() if self._last_text else b"0"

    def _drop_client(self) -> None:
        self._read_conn = self._ack_conn = None   # closed with the client's connections
        self._in_flight = None
        if self._acks_sent is not None:           # their replies are lost with them:
            self._acks_unsure = self._acks_sent[1]  # sent again by _settle_acks
            self._acks_sent = None
        client, self._client = self._client, None
        if client is not None:
            try:
                client.close()
            except Exception:  # noqa: BLE001 - the connection is already broken
                pass

    def _ack(self, ids: Sequence[bytes]) -> None:
        """Acknowledge ``ids``: the commands are sent now and their replies read by
        :meth:`_settle_acks` before anything else this source does (the next batch, a
        fence check, the next acknowledgement, the end), so the server works on them
        while the run goes on. On a cluster they are sent one by one and waited for."""
        self._settle_acks()
        if self.fence is None:
            commands = [("XACK", self._stream, self._group, *ids[i:i + _ACK_CHUNK])
                        for i in range(0, len(ids), _ACK_CHUNK)]
        else:
            commands = [self.fence.ack_command(self._group, list(ids[i:i + ACK_CHUNK]))
                        for i in range(0, len(ids), ACK_CHUNK)]
        conn = self._ack_connection()
        if conn is None:
            self._ack_now(commands)
            return
        try:
            conn.send_packed_command(_packed(commands))
        except self._retriable():
            self._ack_conn = None
            self._ack_now(commands)      # reconnects; an acknowledgement may be repeated
            return
        self._acks_sent = (conn, commands)

    def _ack_now(self, commands: list[tuple]) -> None:
        for command in commands:
            self._call(*command)

    def _ack_connection(self):
        """The connection that carries acknowledgements (taken from the client's pool
        and kept), or None on a cluster or before the first connection."""
        if self.cluster or self._client is None:
            return None
        if self._ack_conn is None:
            self._ack_conn = self._client.connection_pool.get_connection()
        return self._ack_conn

    def _settle_acks(self) -> None:
        """Read the replies of the acknowledgements sent; raise SupersededError when a
        later learner had started; send them again (and wait) when the connection broke
        or the group was gone (XACK of an acknowledged entry changes nothing)."""
        import redis

        unsure, self._acks_unsure = self._acks_unsure, None
        if unsure is not None:
            self._ack_now(unsure)
        sent, self._acks_sent = self._acks_sent, None
        if sent is None:
            return
        conn, commands = sent
        refused: list[str] = []
        try:
            for _ in commands:
                try:
                    conn.read_response()
                except redis.ResponseError as exc:
                    refused.append(str(exc))
        except self._retriable():
            self._ack_conn = None
            self._ack_now(commands)
            return
        superseded = [r for r in refused if r.startswith("SUPERSEDED")]
        if superseded and self.fence is not None:
            raise self.fence.superseded(superseded[0].split()[-1])
        if refused:
            self._ack_now(commands)      # e.g. NOGROUP: the usual path creates it again

    def fence_check(self) -> None:
        """Raise SupersededError if a later learner of this stream has started (called
        before a checkpoint file changes); nothing when the source is not fenced."""
        self._settle_acks()
        if self.fence is not None:
            self.fence.check()

    # ------------------------------------------------------------------ reading
    def _claim_others(self) -> list[Reject]:
        """XAUTOCLAIM every pending entry of the group into this consumer's PEL."""
        rejects: list[Reject] = []
        cursor = b"0-0"
        while True:
            _, reply = self._call("XAUTOCLAIM", self._stream, self._group, self._consumer,
                                  0, cursor, "COUNT", _CLAIM_COUNT, "JUSTID", reading=True)
            cursor = reply[0]
            deleted = reply[2] if len(reply) > 2 else []
            for raw_id in deleted:
                self._seq += 1
                rejects.append(Reject(self._stream, self._seq, None, None,
                                      f"entry {raw_id.decode()} was deleted from the "
                                      "stream before it was learned"))
            if cursor in (b"0-0", "0-0"):
                return rejects

    def _read_command(self, block_ms: int) -> tuple:
        args = ("XREADGROUP", "GROUP", self._group, self._consumer,
                "COUNT", min(self._batch_rows, READ_COUNT))
        if self._cursor == b">":
            args += ("BLOCK", block_ms)  # reading pending entries never blocks
        return args + ("STREAMS", self._stream, self._cursor)

    def _read(self, block_ms: int) -> tuple[list, bool]:
        """(entries, True when they are this consumer's pending ones)."""
        def make_args() -> tuple:
            return self._read_command(block_ms)

        command, reply = self._call(make_args=make_args, reading=True)
        pending = command[-1] != b">"
        return (reply[0][1] if reply else []), pending

    def batches(self) -> Iterator[RawBatch]:
        """Yield batches in entry id order; end after ``idle_exit`` quiet seconds."""
        if not self._recovered:
            self._recovered = True
            if self._client is None:
                with_retries(self._connect_once, display=self.name, backoff=self._backoff,
                             give_up=self._retry, clock=self._clock, sleep=self._sleep,
                             retriable=self._retriable(), what="connect")
            if self._fenced:
                owner = self._group if self._claim else f"{self._group}:{self._consumer}"
                self.fence = Fence(self._stream, owner, self.name,
                                   lambda *command: self._call(*command)[1], self.cluster)
                try:
                    self.fence.take()
                except InputError as exc:
                    if "no permissions" not in str(exc) and "NOPERM" not in str(exc):
                        raise
                    raise input_error(self.name, f"{exc}; fencing runs INCR, GET and EVAL "
                                                 f"on key {self.fence.key!r}: allow them "
                                                 "to this user, or add fence=false to the "
                                                 "URL") from None
            claimed = self._claim_others() if self._claim else []
            if claimed:
                self._settle_acks()
                yield RawBatch(pd.DataFrame(index=pd.RangeIndex(0)), self._stream,
                               np.empty(0, np.int64), claimed, self._position())
        last_entry = self._clock()
        block_ms = max(1, int(round(self._linger * 1000)))
        while True:
            entries, pending = self._read(block_ms)
            if entries and not pending and self.fence is not None \
                    and self._skipped_pending(entries[0][0]):
                # a superseded learner under this consumer name took entries before
                # these: read them all again from the pending list, in id order
                self._cursor = self._last_text.encode() if self._last_text else b"0"
                continue
            if pending:
                if not entries:
                    self._cursor = b">"
                    continue
                self._cursor = entries[-1][0]
            elif entries:
                self._read_ahead(block_ms)
            batch = self._batch(entries)
            if batch is not None:
                self._settle_acks()
                yield batch
                last_entry = self._clock()   # quiet time counts from the reader's return
            elif not pending:
                if self._idle_exit is not None and \
                        self._clock() - last_entry >= self._idle_exit:
                    if self._unread_pending():
                        self._cursor = self._last_text.encode() if self._last_text \
                            else b"0"
                        continue
                    self._settle_acks()
                    return
                if self.on_quiet is not None:
                    self._settle_acks()
                    self.on_quiet()

    # ------------------------------------------------------------------ reading connection
    def _reading_connection(self):
        """The connection that carries this source's reads (XREADGROUP, XAUTOCLAIM,
        XPENDING), taken from the client's pool and kept, its server id known for
        :meth:`_close_stale`; None on a cluster (reads go through the cluster client,
        which follows redirections). Acknowledgements and fencing use the pool's other
        connections, so they never wait behind a read in flight."""
        import redis

        if self.cluster:
            return None
        if self._read_conn is None:
            conn = self._client.connection_pool.get_connection()
            try:
                conn.send_command("CLIENT", "ID")
                self._client_id = (node_address(self._client), int(conn.read_response()))
            except redis.ResponseError:  # an ACL without CLIENT ID: nothing to close later
                self._client_id = (node_address(self._client), None)
            self._read_conn = conn
        return self._read_conn

    def _execute_reading(self, command: tuple):
        """Send a reading command on the reading connection and return its raw reply;
        a read sent ahead (:meth:`_read_ahead`) is this command's reply when it is the
        same command, and is read and set aside otherwise (its entries are this
        consumer's pending ones, which a read of pending entries comes to)."""
        conn = self._reading_connection()
        if conn is None:
            return self._execute(*command)
        ahead, self._in_flight = self._in_flight, None
        if ahead is not None:
            reply = conn.read_response()
            if ahead == command:
                return reply
            if reply:       # entries it assigned are read again from the pending list
                self._cursor = self._last_text.encode() if self._last_text else b"0"
        conn.send_command(*command)
        return conn.read_response()

    def _read_ahead(self, block_ms: int) -> None:
        """Send the next read of new entries now, so the server prepares it while this
        batch is parsed and learned (one read in flight at most; not on a cluster)."""
        conn = None if self._client is None else self._reading_connection()
        if conn is None or self._in_flight is not None or self._cursor != b">":
            return
        command = self._read_command(block_ms)
        try:
            conn.send_command(*command)
        except self._retriable():
            return                       # the next read meets the broken connection
        self._in_flight = command

    def _skipped_pending(self, first: bytes) -> bool:
        """Whether this consumer holds pending entries between the last one handed out
        and ``first``, the first of a read of new entries (XPENDING, extended form)."""
        start = "(" + self._last_text if self._last_text else "-"
        _, reply = self._call("XPENDING", self._stream, self._group, start,
                              b"(" + first, 1, self._consumer, reading=True)
        return bool(reply)

    def _unread_pending(self) -> bool:
        """Whether this consumer holds pending entries after the last one handed out:
        assigned by a command whose reply was lost (XPENDING, extended form)."""
        start = "(" + self._last_text if self._last_text else "-"
        _, reply = self._call("XPENDING", self._stream, self._group, start, "+", 1,
                              self._consumer, reading=True)
        return bool(reply)

    def _batch(self, entries: list) -> RawBatch | None:
        """Entries read -> a batch; entries up to the covered or handed-out id are
        dropped (and XACKed when a checkpoint holds them)."""
        skip = 0
        if self._high is not None:
            # a reply is in id order, so the entries already seen are a prefix
            while skip < len(entries) and entry_id(entries[skip][0]) <= self._high:
                skip += 1
        if skip and self._covered is not None:
            covered = [raw for raw, _ in entries[:skip] if entry_id(raw) <= self._covered]
            if covered:
                self._ack(covered)
        entries = entries[skip:]
        if not entries:
            return None
        n = len(entries)
        ids = [raw for raw, _ in entries]
        flats = [flat for _, flat in entries]
        self._high = entry_id(ids[-1])
        self._unacked.append((self._high, ids))
        self._last_text = ids[-1].decode()
        first = self._seq + 1
        self._seq += n
        lines = np.arange(first, first + n, dtype=np.int64)
        alive = [i for i in range(n) if flats[i] is not None]
        rejects = [Reject(self._stream, int(lines[i]), None, None,
                          f"entry {ids[i].decode()} was deleted from the stream before it "
                          "was learned") for i in range(n) if flats[i] is None]
        if len(alive) < n:
            flats = [flats[i] for i in alive]
        parsed = self._parse(flats, lines[alive], _Tags(ids, alive))
        frame = parsed.frame
        if self._id_field is not None and len(frame):
            frame[self._id_field] = [ids[i].decode()
                                     for i in (parsed.lines - first).tolist()]
        if rejects:
            parsed.rejects = sorted(rejects + parsed.rejects, key=lambda r: r.line)
        return RawBatch(frame, self._stream, parsed.lines, parsed.rejects, self._position(),
                        keyed=self._format != "csv")

    def _parse(self, flats: list, lines: np.ndarray, tags: _Tags) -> Parsed:
        if self._format == "fields":
            return frame_from_fields(flats, lines, self._stream, tags, self._max_bytes)
        payloads, keep, missing = [], [], []
        for i, flat in enumerate(flats):
            names = flat[0::2]
            try:
                payloads.append(flat[2 * names.index(self._field) + 1])
                keep.append(i)
            except ValueError:
                missing.append(Reject(self._stream, int(lines[i]), None, None,
                                      f"{tags[i]} has no field "
                                      f"{self._field.decode()!r}"))
        parsed = parse_payloads(payloads, lines[keep], self._stream, tags.subset(keep),
                                self._format, self._columns, self._max_bytes)
        parsed.rejects = sorted(parsed.rejects + missing, key=lambda r: r.line)
        return parsed

    def close(self) -> None:
        """Wait for the acknowledgements sent, then close the connections (nothing more
        is acknowledged); safe to call twice."""
        try:
            if not self._closed:
                self._settle_acks()
        finally:
            self._closed = True
            self._drop_client()
