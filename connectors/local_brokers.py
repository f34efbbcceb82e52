"""Throwaway broker servers on the loopback interface, for the tests and the benchmark.

:class:`LocalMosquitto` runs Debian's ``mosquitto`` and :class:`LocalRedis` its
``redis-server``, each on a free port of 127.0.0.1 with its own configuration and data
directory, so a run never touches a broker of the machine. ``bash .ci/brokers.sh
install`` installs both. :data:`MOSQUITTO` and :data:`REDIS_SERVER` are the programs'
paths, or None when they are not installed (callers skip then).

Not used on any learning path.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import textwrap
import time
from pathlib import Path


def _program(name: str, *places: str) -> str | None:
    return shutil.which(name) or next((p for p in places if os.path.exists(p)), None)


MOSQUITTO = _program("mosquitto", "/usr/sbin/mosquitto", "/usr/local/sbin/mosquitto")
REDIS_SERVER = _program("redis-server", "/usr/bin/redis-server", "/usr/sbin/redis-server")


def free_port() -> int:
    """A TCP port of 127.0.0.1 that nothing listens on just now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_for_port(proc: subprocess.Popen, port: int, what: str, log: Path) -> None:
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            socket.create_connection(("127.0.0.1", port), 0.2).close()
            return
        except OSError:
            if proc.poll() is not None:
                break
            time.sleep(0.05)
    raise RuntimeError(f"{what} did not start: " +
                       (log.read_text()[-500:] if log.exists() else "no log"))


class LocalMosquitto:
    """A mosquitto process on 127.0.0.1 with its own config and persistence directory.

    ``max_queued_messages 0`` lifts mosquitto's default cap of 1000 queued messages per
    absent persistent client, which would otherwise drop messages (see
    :mod:`connectors.mqtt`). ``extra`` is appended to the configuration.
    """

    def __init__(self, directory: Path, extra: str = "allow_anonymous true\n") -> None:
        if MOSQUITTO is None:
            raise RuntimeError("mosquitto is not installed (bash .ci/brokers.sh install)")
        self.dir = Path(directory)
        self.port = free_port()
        self.extra = extra
        self.proc: subprocess.Popen | None = None
        (self.dir / "data").mkdir(parents=True, exist_ok=True)

    def config(self) -> str:
        return textwrap.dedent(f"""\
            listener {self.port} 127.0.0.1
            persistence true
            persistence_location {self.dir / 'data'}/
            max_queued_messages 0
            user root
            log_dest file {self.dir / 'mosquitto.log'}
            """) + self.extra

    def start(self) -> "LocalMosquitto":
        conf = self.dir / "mosquitto.conf"
        conf.write_text(self.config())
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(conf)], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)
        _wait_for_port(self.proc, self.port, "mosquitto", self.dir / "mosquitto.log")
        return self

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)  # writes its persistence file first
            self.proc.wait(10)
        self.proc = None

    def url(self, path: str, scheme: str = "mqtt", userinfo: str = "", **query) -> str:
        q = "&".join(f"{k}={v}" for k, v in query.items())
        return f"{scheme}://{userinfo}127.0.0.1:{self.port}/{path}" + (f"?{q}" if q else "")


class LocalRedis:
    """redis-server on 127.0.0.1; with ``durable`` an fsync-always append-only file, so a
    restart keeps the data. ``extra`` are more command-line options."""

    def __init__(self, directory: Path, *extra: str, durable: bool = True) -> None:
        if REDIS_SERVER is None:
            raise RuntimeError("redis-server is not installed (bash .ci/brokers.sh install)")
        self.dir = Path(directory)
        self.port = free_port()
        self.extra = list(extra)
        self.durable = durable
        self.proc: subprocess.Popen | None = None

    def start(self) -> "LocalRedis":
        persistence = ["--appendonly", "yes", "--appendfsync", "always"] if self.durable \
            else ["--appendonly", "no"]
        log = self.dir / "redis.log"
        self.proc = subprocess.Popen(
            [REDIS_SERVER, "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
             *persistence, "--dir", str(self.dir), "--logfile", str(log), *self.extra],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        _wait_for_port(self.proc, self.port, "redis-server", log)
        return self

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(10)
        self.proc = None

    def client(self, password: str | None = None):
        import redis
        return redis.Redis(port=self.port, password=password, protocol=2)

    def url(self, userinfo: str = "", **query) -> str:
        q = "&".join(f"{k}={v}" for k, v in query.items())
        return f"redis://{userinfo}127.0.0.1:{self.port}/0?{q}"


class LocalRedisCluster:
    """``nodes`` redis-servers on 127.0.0.1 joined into one Redis Cluster (no replicas),
    the hash slots split evenly; for the tests of cluster-aware reading.

    Set up with the cluster commands of the Redis documentation (CLUSTER ADDSLOTSRANGE,
    CLUSTER MEET), waiting until every node reports ``cluster_state:ok``.
    """

    SLOTS = 16384

    def __init__(self, directory: Path, nodes: int = 3) -> None:
        self.dir = Path(directory)
        self.nodes = []
        taken: set[int] = set()

        def distinct_port() -> int:   # free ports, none picked twice before they bind
            while (port := free_port()) in taken:
                pass
            taken.add(port)
            return port

        for i in range(nodes):
            node_dir = self.dir / f"node{i}"
            node_dir.mkdir(parents=True, exist_ok=True)
            node = LocalRedis(node_dir, durable=False)
            node.port = distinct_port()
            node.bus_port = distinct_port()  # else port + 10000, which may not exist
            node.extra = ["--cluster-enabled", "yes",
                          "--cluster-config-file", str(node_dir / "nodes.conf"),
                          "--cluster-node-timeout", "2000",
                          "--cluster-port", str(node.bus_port)]
            self.nodes.append(node)

    @property
    def port(self) -> int:
        """The first node's port (any node serves as the address of the cluster)."""
        return self.nodes[0].port

    def start(self) -> "LocalRedisCluster":
        for node in self.nodes:
            node.start()
        clients = [node.client() for node in self.nodes]
        share = self.SLOTS // len(self.nodes)
        for i, client in enumerate(clients):
            last = self.SLOTS - 1 if i == len(clients) - 1 else (i + 1) * share - 1
            client.execute_command("CLUSTER", "ADDSLOTSRANGE", i * share, last)
        for node in self.nodes[1:]:
            clients[0].execute_command("CLUSTER", "MEET", "127.0.0.1", node.port,
                                       node.bus_port)
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            if all(b"cluster_state:ok" in c.execute_command("CLUSTER", "INFO")
                   for c in clients):
                return self
            time.sleep(0.1)
        raise RuntimeError("the Redis Cluster did not reach cluster_state:ok in 20 s")

    def stop(self) -> None:
        for node in self.nodes:
            node.stop()

    def owner(self, key: str) -> "LocalRedis":
        """The node that serves ``key`` now."""
        client = self.nodes[0].client()
        slot = client.execute_command("CLUSTER", "KEYSLOT", key)
        for start, end, (host, port, *_), *_ in client.execute_command("CLUSTER", "SLOTS"):
            if start <= slot <= end:
                return next(n for n in self.nodes if n.port == int(port))
        raise RuntimeError(f"no node serves slot {slot}")

    def move(self, key: str, to: "LocalRedis") -> None:
        """Move ``key``'s hash slot, with its keys, to node ``to``, as a resharding does."""
        if self.owner(key) is not to:
            self.migrate_keys(key, to)
            self.assign_slot(key, to)

    def migrate_keys(self, key: str, to: "LocalRedis") -> None:
        """First half of a move: the slot is MIGRATING on its node and IMPORTING on
        ``to``, and its keys are moved there (MIGRATE); until :meth:`assign_slot` the
        old node answers ASK for them (Redis Cluster specification, "ASK redirection")."""
        source = self.owner(key)
        src, dst = source.client(), to.client()
        slot = src.execute_command("CLUSTER", "KEYSLOT", key)
        src_id = src.execute_command("CLUSTER", "MYID").decode()
        dst_id = dst.execute_command("CLUSTER", "MYID").decode()
        dst.execute_command("CLUSTER", "SETSLOT", slot, "IMPORTING", src_id)
        src.execute_command("CLUSTER", "SETSLOT", slot, "MIGRATING", dst_id)
        while True:
            keys = src.execute_command("CLUSTER", "GETKEYSINSLOT", slot, 100)
            if not keys:
                break
            src.execute_command("MIGRATE", "127.0.0.1", to.port, "", 0, 5000,
                                "KEYS", *keys)

    def assign_slot(self, key: str, to: "LocalRedis") -> None:
        """Second half of a move: every node is told that ``to`` serves the slot
        (CLUSTER SETSLOT ... NODE); the old node answers MOVED from then on."""
        slot = to.client().execute_command("CLUSTER", "KEYSLOT", key)
        dst_id = to.client().execute_command("CLUSTER", "MYID").decode()
        for node in [to] + [n for n in self.nodes if n is not to]:
            node.client().execute_command("CLUSTER", "SETSLOT", slot, "NODE", dst_id)

    def url(self, userinfo: str = "", **query) -> str:
        return self.nodes[0].url(userinfo, **query)
