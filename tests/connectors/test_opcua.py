"""OPC UA source (connectors/opcua.py) against a real asyncua server started here on a
loopback port. The server's variables follow a rule the test knows (the label is "yes"
exactly when x > 0.6, written with x at each step), so the learned tree must find it;
the server is stopped and started again mid-run, and the run goes on."""

from __future__ import annotations

import json
import logging
import random
import threading
import time

import pytest

pytest.importorskip("asyncua", reason="asyncua is not installed (pip install "
                    "\"sapwood[plant]\")")

from asyncua import ua  # noqa: E402
from asyncua.sync import Server  # noqa: E402

from connectors.brokers import open_broker  # noqa: E402
from connectors.local_brokers import free_port  # noqa: E402
from stream.errors import ConfigError, InputError  # noqa: E402
from stream.run.engine import run_learn  # noqa: E402
from stream.run.job import LearnJob  # noqa: E402

logging.getLogger("asyncua").setLevel(logging.CRITICAL)


class Plant:
    """An asyncua server with variables x, y and fault (string node ids in namespace 2)
    and a thread that writes a seeded random x, y and fault = (x > 0.6) every ``step`` s."""

    def __init__(self, port: int, step: float = 0.02, seed: int = 5,
                 password: str | None = None) -> None:
        self.port, self.step = port, step
        self.password = password
        self.rng = random.Random(seed)
        self.written = 0
        self._server = None
        self._pump = None
        self._stop = threading.Event()

    def start(self) -> "Plant":
        server = Server()
        server.set_endpoint(f"opc.tcp://127.0.0.1:{self.port}/plant/")
        if self.password is not None:   # user name and password required (OPC UA Part 4)
            server.set_identity_tokens([ua.UserNameIdentityToken])
            server.aio_obj.iserver.set_user_manager(_Operators(self.password))
        idx = server.register_namespace("urn:sapwood-tests")
        line = server.nodes.objects.add_object(idx, "Line")
        self.vars = {name: line.add_variable(ua.NodeId(name, idx), name, value)
                     for name, value in (("x", 0.0), ("y", 0.0), ("fault", "no"))}
        server.start()
        self._server = server
        self._stop.clear()
        self._pump = threading.Thread(target=self._run, daemon=True)
        self._pump.start()
        return self

    def _run(self) -> None:
        while not self._stop.is_set():
            x, y = self.rng.random(), self.rng.random()
            self.vars["fault"].write_value("yes" if x > 0.6 else "no")
            self.vars["x"].write_value(x)
            self.vars["y"].write_value(y)
            self.written += 1
            time.sleep(self.step)

    def pause(self) -> None:
        self._stop.set()
        self._pump.join()

    def stop(self) -> None:
        if self._pump is not None and self._pump.is_alive():
            self.pause()
        if self._server is not None:
            self._server.stop()
            self._server = None

    def url(self, **query) -> str:
        nodes = "&".join(f"node={n}:ns=2;s={n}" for n in ("x", "y", "fault"))
        extra = "".join(f"&{k}={v}" for k, v in query.items())
        return f"opc.tcp://127.0.0.1:{self.port}/plant/?{nodes}{extra}"


def test_the_learned_rule_is_the_servers_and_a_server_restart_is_survived():
    port = free_port()
    plant = Plant(port).start()
    restarted = threading.Event()
    before_stop: list[int] = []

    def restart_midway():
        time.sleep(6.0)
        before_stop.append(plant.written)
        plant.stop()               # the server goes away for a second
        time.sleep(1.0)
        plant.start()
        restarted.set()
        time.sleep(6.0)
        plant.pause()              # then the values stop changing: idle_exit ends the run

    mover = threading.Thread(target=restart_midway, daemon=True)
    mover.start()
    try:
        summary = run_learn(LearnJob(
            sources=[plant.url(interval=0.02, idle_exit=3, retry=30)], target="fault"))
    finally:
        mover.join()
        plant.stop()
    assert restarted.is_set()
    assert summary["learned"] >= 0.6 * plant.written, (summary["learned"], plant.written)
    # the label is x > 0.6 (a majority guess scores about 0.6); how many ticks arrive
    # depends on the machine's load, and with fewer the tree is younger: a loaded 2-core
    # CI run measured 0.897 over the last window, an idle one above 0.95
    assert summary["window_accuracy"] >= 0.85
    # records written after the restart were learned too
    assert summary["learned"] >= before_stop[0] + 100, (summary["learned"], before_stop)


def test_the_rule_reads_x_above_0_6(tmp_path):
    port = free_port()
    plant = Plant(port, seed=9).start()
    stopper = threading.Timer(10.0, plant.pause)
    stopper.start()
    model = tmp_path / "plant.sapwood"
    try:
        summary = run_learn(LearnJob(sources=[plant.url(interval=0.02, idle_exit=2)],
                                     target="fault", save_path=str(model)))
    finally:
        stopper.cancel()
        plant.stop()
    from stream.views.rule_sources import load_rules

    _, rules = load_rules(str(model))
    assert summary["learned"] >= 200
    thresholds = [c.value for r in rules for c in r.conditions if c.feature == "x"]
    assert thresholds and all(0.5 <= t <= 0.7 for t in thresholds), thresholds
    assert not any(c.feature == "y" for r in rules for c in r.conditions)


class _Operators:
    """Lets in the user "operator" with the given password, nobody else."""

    def __init__(self, password: str) -> None:
        self.password = password

    def get_user(self, iserver, username=None, password=None, certificate=None):
        from asyncua.server.user_managers import User, UserRole

        if username == "operator" and password == self.password:
            return User(role=UserRole.User)
        return None


def test_a_server_that_wants_a_password_takes_it_from_the_environment(monkeypatch):
    secret = "pw-Ua83kq"
    plant = Plant(free_port(), password=secret).start()
    stopper = threading.Timer(3.0, plant.pause)
    monkeypatch.setenv("PLANT_PASS", secret)
    said: list[str] = []
    try:
        with pytest.raises(InputError) as refused:   # the wrong password is refused
            run_learn(LearnJob(sources=[plant.url(interval=0.05, retry=1, username="operator",
                                                  password="wrong")], target="fault"),
                      warn=said.append)
        stopper.start()
        summary = run_learn(LearnJob(
            sources=[plant.url(interval=0.05, idle_exit=1, username="operator",
                               password_env="PLANT_PASS")], target="fault"))
    finally:
        stopper.cancel()
        plant.stop()
    assert "wrong" not in str(refused.value) and "password=***" in str(refused.value)
    assert summary["learned"] >= 20
    assert secret not in json.dumps(summary) and "wrong" not in " ".join(said)


def test_bad_urls_are_named():
    with pytest.raises(ConfigError, match="needs the variables to read"):
        open_broker("opc.tcp://127.0.0.1:4840/")
    with pytest.raises(ConfigError, match="node must be FIELD:NODEID"):
        open_broker("opc.tcp://127.0.0.1:4840/?node=ns=2;s=x")


def test_a_server_that_never_answers_is_given_up_naming_it():
    source = open_broker(f"opc.tcp://127.0.0.1:{free_port()}/?node=x:ns=2;s=x&retry=1"
                         "&timeout=1&password=hunter2")
    with pytest.raises(InputError, match=r"cannot read 'opc.tcp://127.0.0.1:\d+/\?node="
                                         r".*password=\*\*\*'.*gave up after 1 s"):
        list(source.batches())
    source.close()
