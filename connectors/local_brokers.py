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
