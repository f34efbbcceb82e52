"""Two Ray nodes on one machine, each in a network namespace the test creates, for the
grove's tests: a head node (with Redis) and a worker node, joined through a bridge in a
third namespace so that the worker's link can be cut and restored.

Ray binds the machine's outward address when asked for loopback, so it runs only inside
these namespaces; traffic goes only to loopback and to them. The test process reaches
Redis through a veth pair between its own namespace and the head's. Everything started
here is killed and every namespace and link removed by :meth:`TwoNodes.close`.

::

    test process --(root veth 10.232.K.1 / .2)-- head ns [ray head, redis-server]
                                                  | h0 10.231.K.1
                                         switch ns [bridge]   <- cut: worker port down
                                                  | w0 10.231.K.2
                                                 worker ns [ray worker]
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from stream.child_env import same_code_env

RAY_PORT = 6390
REDIS_PORT = 6391
RAY = shutil.which("ray") or str(Path(sys.executable).with_name("ray"))


def why_not() -> str | None:
    """Why this machine cannot run the grove's cluster tests, or None."""
    if sys.platform != "linux":
        return "network namespaces are Linux only"
    if os.geteuid() != 0:
        return "creating network namespaces needs root (CI runs as root)"
    if shutil.which("ip") is None:
        return "the ip command (iproute2) is not installed"
    if shutil.which("redis-server") is None:
        return "redis-server is not installed (bash .ci/brokers.sh install adds it)"
    try:
        import ray  # noqa: F401
    except ImportError:
        return 'Ray is not installed (pip install ".[test]" or "sapwood[grove]")'
    probe = f"sapwood-probe-{os.getpid()}"
    made = subprocess.run(["ip", "netns", "add", probe], capture_output=True, text=True)
    if made.returncode != 0:
        return f"this machine cannot create network namespaces: {made.stderr.strip()}"
    try:
        for what, command in (("a bridge", ["ip", "link", "add", "br0", "type", "bridge"]),
                              ("a veth pair", ["ip", "link", "add", "v0", "type", "veth",
                                               "peer", "name", "v1"])):
            done = subprocess.run(["ip", "netns", "exec", probe, *command],
                                  capture_output=True, text=True)
            if done.returncode != 0:
                return f"this machine cannot create {what}: {done.stderr.strip()}"
    finally:
        subprocess.run(["ip", "netns", "del", probe], check=False)
    return None


def _ip(*args: str, ns: str | None = None) -> None:
    command = ["ip", *args] if ns is None else ["ip", "netns", "exec", ns, "ip", *args]
    subprocess.run(command, check=True, capture_output=True)


class TwoNodes:
    """The namespaces, Ray's two nodes and Redis; ``folder`` holds logs and Ray's files."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        k = os.getpid() % 200 + 20
        self.k = k
        tag = f"sw{k}"
        self.head, self.worker, self.switch = f"{tag}-head", f"{tag}-work", f"{tag}-sw"
        self.root_if = f"{tag}r0"
        self.head_ip, self.worker_ip = f"10.231.{k}.1", f"10.231.{k}.2"
        self.redis_ip = f"10.232.{k}.2"   # the head's address on the test's link
        self.env = same_code_env()
        self.env["RAY_USAGE_STATS_ENABLED"] = "0"
        # Ray's sockets live in its temp dir: a short path (a socket path has <= 107 bytes)
        self.ray_dir = tempfile.mkdtemp(prefix="swray-", dir="/tmp")
        self._servers: list[subprocess.Popen] = []
        self._made: list[str] = []

    # --- the network ---------------------------------------------------------------
    def _network(self) -> None:
        for ns in (self.head, self.worker, self.switch):
            subprocess.run(["ip", "netns", "del", ns], capture_output=True)  # a leftover
            _ip("netns", "add", ns)
            self._made.append(ns)
            _ip("link", "set", "lo", "up", ns=ns)
        subprocess.run(["ip", "link", "del", self.root_if], capture_output=True)
        _ip("link", "add", "br0", "type", "bridge", ns=self.switch)
        _ip("link", "set", "br0", "up", ns=self.switch)
        for ns, end, address in ((self.head, "h0", self.head_ip),
                                 (self.worker, "w0", self.worker_ip)):
            port = f"{self.root_if}{end}"
            _ip("link", "add", port, "type", "veth", "peer", "name", end)
            _ip("link", "set", end, "netns", ns)
            _ip("link", "set", port, "netns", self.switch)
            _ip("link", "set", port, "master", "br0", ns=self.switch)
            _ip("link", "set", port, "up", ns=self.switch)
            _ip("addr", "add", f"{address}/24", "dev", end, ns=ns)
            _ip("link", "set", end, "up", ns=ns)
        _ip("link", "add", self.root_if, "type", "veth", "peer", "name", "r0")
        _ip("link", "set", "r0", "netns", self.head)
        _ip("addr", "add", f"10.232.{self.k}.1/24", "dev", self.root_if)
        _ip("link", "set", self.root_if, "up")
        _ip("addr", "add", f"{self.redis_ip}/24", "dev", "r0", ns=self.head)
        _ip("link", "set", "r0", "up", ns=self.head)

    def cut(self) -> None:
        """Cut the worker's link: its bridge port goes down, so packets either way are
        dropped silently (the worker's own interface stays configured)."""
        _ip("link", "set", f"{self.root_if}w0", "down", ns=self.switch)

    def restore(self) -> None:
        _ip("link", "set", f"{self.root_if}w0", "up", ns=self.switch)

    # --- processes -----------------------------------------------------------------
    def exec_in(self, ns: str, command: list[str], **kw) -> subprocess.CompletedProcess:
        """Run ``command`` inside namespace ``ns`` (same code and Python as the test)."""
        kw.setdefault("env", self.env)
        return subprocess.run(["ip", "netns", "exec", ns, *command], **kw)

    def sapwood(self, *args: str, check: bool = True,
                timeout: float = 300) -> subprocess.CompletedProcess:
        """``sapwood ARGS`` run on the head node."""
        done = self.exec_in(self.head, [sys.executable, "-m", "stream.cli", *args],
                            capture_output=True, text=True, timeout=timeout)
        if check and done.returncode != 0:
            raise AssertionError(f"sapwood {' '.join(args)} exited {done.returncode}:\n"
                                 f"{done.stdout}\n{done.stderr}")
        return done

    def start(self) -> "TwoNodes":
        self._network()
        redis_dir = self.folder / "redis"
        redis_dir.mkdir(parents=True, exist_ok=True)
        self._servers.append(subprocess.Popen(
            ["ip", "netns", "exec", self.head, "redis-server", "--port", str(REDIS_PORT),
             "--bind", f"127.0.0.1 {self.head_ip} {self.redis_ip}", "--save", "",
             "--appendonly", "no", "--dir", str(redis_dir), "--protected-mode", "no"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        self._wait_port(self.redis_ip, REDIS_PORT)
        common = ["--num-cpus", "4", "--disable-usage-stats", "--node-ip-address"]
        self._ray(self.head, "--head", "--port", str(RAY_PORT), "--include-dashboard=false",
                  "--temp-dir", self.ray_dir, *common, self.head_ip)
        self._ray(self.worker, "--address", self.ray_address, *common, self.worker_ip)
        return self

    def _ray(self, ns: str, *args: str) -> None:
        done = self.exec_in(ns, [RAY, "start", *args], capture_output=True, text=True)
        if done.returncode != 0:
            raise AssertionError(f"ray start {' '.join(args)} failed:\n{done.stdout}\n"
                                 f"{done.stderr}")

    @property
    def ray_address(self) -> str:
        return f"{self.head_ip}:{RAY_PORT}"

    @property
    def redis_for_learners(self) -> str:
        return f"redis://{self.head_ip}:{REDIS_PORT}/0"

    def redis_client(self):
        import redis

        return redis.Redis(self.redis_ip, REDIS_PORT)

    def _wait_port(self, host: str, port: int, seconds: float = 20) -> None:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            try:
                socket.create_connection((host, port), timeout=0.5).close()
                return
            except OSError:
                time.sleep(0.05)
        raise AssertionError(f"nothing listens on {host}:{port}")

    def pids(self, ns: str) -> list[int]:
        done = subprocess.run(["ip", "netns", "pids", ns], capture_output=True, text=True)
        return [int(p) for p in done.stdout.split()]

    def kill_node(self, ns: str) -> int:
        """SIGKILL every process of namespace ``ns``; how many there were."""
        pids = self.pids(ns)
        for pid in pids:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        return len(pids)

    def close(self) -> None:
        for _ in range(3):     # processes may fork while being killed
            for ns in self._made:
                self.kill_node(ns)
            time.sleep(0.2)
        for server in self._servers:
            server.wait(10)
        for ns in self._made:
            subprocess.run(["ip", "netns", "del", ns], capture_output=True)
        subprocess.run(["ip", "link", "del", self.root_if], capture_output=True)
        shutil.rmtree(self.ray_dir, ignore_errors=True)
