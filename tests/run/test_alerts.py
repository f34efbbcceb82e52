"""Alerts on the rules that predict the class of concern (stream/run/alerts.py,
connectors/alert_sinks.py): what is raised (hand-built rules, the expected alerts follow
from the conditions written here), a run over river's ConceptDriftStream (an abrupt switch
between two of Agrawal's functions, Agrawal et al. 1993, as river ships them), and
delivery to a file, a local HTTP server on loopback, mosquitto and redis-server, at least
once across a restart from a checkpoint."""

from __future__ import annotations

import csv
import http.server
import itertools
import json
import threading
from pathlib import Path

import pytest
from river.datasets import synth

from connectors.local_brokers import MOSQUITTO, REDIS_SERVER, LocalMosquitto, LocalRedis, \
    free_port
from stream.rules.rule import Rule
from stream.run.alerts import AlertWatch
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.tree.paths import Condition

KEYS = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue", "hyears", "loan")
SWITCH = 15_000


def _rule(number, predict, conditions, fault=20, ok=5):
    conds = tuple(Condition(f, op, v, False) for f, op, v in conditions)
    return Rule(id=f"R{number}", conditions=conds, predict=predict, confidence=0.8,
                coverage=0.1, records=fault + ok, class_counts={"fault": fault, "ok": ok},
                scored=0, hits=0, depth=len(conds), created_at=0, leaf_model="majority",
                active=True)


HEADER = {"target": "state", "concern": "fault"}
RANGES = {"temp": [0.0, 100.0]}


def test_rules_appearing_going_and_moving_far_enough_alert():
    watch = AlertWatch(move_share=0.1)
    first = [_rule(1, "fault", [("temp", ">", 50.0)]), _rule(2, "ok", [("temp", "<=", 50.0)])]
    alerts = watch.check(first, HEADER, 1000, "t1", RANGES)
    assert [(a["id"], a["kind"], [r["id"] for r in a["rules"]]) for a in alerts] == \
        [("sapwood-alert-1000-1", "rule_appeared", ["R1"])]
    assert alerts[0]["rules"][0]["text"] == "IF temp > 50 THEN state = fault"
    assert alerts[0]["caution"].startswith("Learned rules describe")
    # 50 -> 55 is 5 % of the range 0..100: below the share, no alert
    assert watch.check([_rule(1, "fault", [("temp", ">", 55.0)])], HEADER, 2000, "t2",
                       RANGES) == []
    # 55 -> 70 is 15 %: alerts, with the share
    moved = watch.check([_rule(1, "fault", [("temp", ">", 70.0)])], HEADER, 3000, "t3", RANGES)
    assert [a["kind"] for a in moved] == ["threshold_moved"]
    assert moved[0]["moves"] == [{"feature": "temp", "bound": "lower", "old": 55.0,
                                  "new": 70.0, "share_of_range": 0.15}]
    gone = watch.check([_rule(2, "ok", [])], HEADER, 4000, "t4", RANGES)
    assert [a["kind"] for a in gone] == ["rule_gone"]
    assert watch.check([], {"target": "state", "concern": None}, 5000, "t5", RANGES) == []


def test_a_swap_alerts_only_above_a_rule_of_the_class_of_concern():
    watch = AlertWatch()
    rules = [_rule(3, "fault", [("temp", ">", 50.0), ("load", ">", 2.0)]),
             _rule(4, "ok", [("temp", "<=", 50.0)])]
    watch.check(rules, HEADER, 1000, "t1", RANGES)
    swap_above = {"kind": "swap", "record": 1500, "node": 1, "time": "t",
                  "where": "temp > 50", "error_before": 0.3, "error_after": 0.1,
                  "path": [{"feature": "temp", "op": ">", "value": 50.0, "missing": False}]}
    swap_elsewhere = {**swap_above, "node": 2, "path": [
        {"feature": "temp", "op": "<=", "value": 50.0, "missing": False}]}
    watch.note_events([swap_above, swap_elsewhere, {"kind": "alarm", "path": []}])
    alerts = watch.check(rules, HEADER, 2000, "t2", RANGES)
    assert [(a["kind"], [r["id"] for r in a["rules"]], a["change"]["node"])
            for a in alerts] == [("confirmed_change", ["R3"], 1)]


def _write(path: Path, pairs) -> Path:
    with open(path, "w", newline="") as out:
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow([*KEYS, "group"])
        for x, y in pairs:
            writer.writerow([repr(float(x[k])) for k in KEYS] + [y])
    return path


@pytest.fixture(scope="module")
def switching(tmp_path_factory) -> Path:
    stream = synth.ConceptDriftStream(
        stream=synth.Agrawal(classification_function=1, seed=11),
        drift_stream=synth.Agrawal(classification_function=4, seed=12),
        position=SWITCH, width=100, seed=13)  # narrower overflows in river
    return _write(tmp_path_factory.mktemp("drift") / "switch.csv",
                  itertools.islice(stream, 30_000))


@pytest.fixture(scope="module")
def expected(switching, tmp_path_factory) -> list[dict]:
    """The alerts of an uninterrupted run of the switching stream, sent to a file."""
    path = tmp_path_factory.mktemp("expected") / "alerts.jsonl"
    run_learn(LearnJob(sources=[str(switching)], target="group", alerts_path=str(path),
                       alert_every=5_000))
    return _alerts(path)


def _alerts(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def _timeless(alerts: list[dict]) -> list[dict]:
    """Alerts without their time: records without a time field are stamped with the
    clock of the run that raised them."""
    return [{k: v for k, v in a.items() if k != "time"} for a in alerts]


def test_a_run_alerts_after_the_switch_and_the_same_whatever_the_batches(switching, tmp_path):
    runs = []
    for rows in (65_536, 777):
        out = tmp_path / f"alerts{rows}.jsonl"
        summary = run_learn(LearnJob(sources=[str(switching)], target="group",
                                     alerts_path=str(out), alert_every=5_000,
                                     batch_rows=rows))
        runs.append((_alerts(out), summary))
    (alerts, summary), (again, _) = runs
    assert _timeless(alerts) == _timeless(again)
    assert summary["alerts"] == {"raised": len(alerts), "sent": len(alerts), "pending": 0,
                                 "to": str(tmp_path / "alerts65536.jsonl")}
    assert len({a["id"] for a in alerts}) == len(alerts)
    assert {a["record"] for a in alerts} <= set(range(5_000, 30_001, 5_000))
    after = [a for a in alerts if SWITCH < a["record"] <= SWITCH + 10_000]
    assert {"rule_appeared", "rule_gone"} <= {a["kind"] for a in after}, alerts
    assert all(a["concern"] == summary["concern"] for a in alerts)


class _Collector(http.server.BaseHTTPRequestHandler):
    received: list = []

    def do_POST(self):  # noqa: N802 (the standard library's name)
        body = self.rfile.read(int(self.headers["Content-Length"]))
        type(self).received.append(json.loads(body))
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args):
        pass


def test_alerts_a_server_could_not_take_are_sent_after_a_restart(switching, expected,
                                                                tmp_path):
    """At least once: a checkpoint keeps the alerts the sink refused; the same command
    run again sends them, under the same ids as an uninterrupted run's."""
    port = free_port()
    url = f"http://127.0.0.1:{port}/alerts"
    job = dict(sources=[str(switching)], target="group", alerts_path=url, alert_every=5_000,
               checkpoint_path=str(tmp_path / "run.ckpt"))
    said = []
    first = run_learn(LearnJob(**job), warn=said.append)   # nobody listens on the port
    assert first["alerts"]["sent"] == 0
    assert first["alerts"]["pending"] == first["alerts"]["raised"] == len(expected)
    assert any("the checkpoint keeps them" in text for text in said)
    _Collector.received = []
    server = http.server.ThreadingHTTPServer(("127.0.0.1", port), _Collector)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        second = run_learn(LearnJob(**job), warn=said.append)
    finally:
        server.shutdown()
        server.server_close()
    assert second["alerts"]["pending"] == 0
    assert _timeless(_Collector.received) == _timeless(expected)


@pytest.mark.skipif(MOSQUITTO is None, reason="mosquitto is not installed "
                                              "(bash .ci/brokers.sh install adds it)")
def test_alerts_reach_an_mqtt_topic(switching, expected, tmp_path):
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    broker = LocalMosquitto(tmp_path).start()
    got, subscribed = [], threading.Event()
    client = mqtt.Client(CallbackAPIVersion.VERSION2)
    client.on_message = lambda c, u, m: got.append(json.loads(m.payload))
    client.on_subscribe = lambda *a: subscribed.set()
    try:
        client.connect("127.0.0.1", broker.port)
        client.loop_start()
        client.subscribe("plant/alerts", qos=1)
        assert subscribed.wait(10)
        run_learn(LearnJob(sources=[str(switching)], target="group",
                           alerts_path=broker.url("plant/alerts"), alert_every=5_000))
        want = expected
        for _ in range(100):
            if len(got) >= len(want):
                break
            threading.Event().wait(0.1)
        assert _timeless(got) == _timeless(want)
    finally:
        client.disconnect()
        client.loop_stop()
        broker.stop()


@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                                                 "(bash .ci/brokers.sh install adds it)")
def test_alerts_reach_a_redis_stream(switching, expected, tmp_path):
    server = LocalRedis(tmp_path, durable=False).start()
    try:
        run_learn(LearnJob(sources=[str(switching)], target="group",
                           alerts_path=server.url(stream="alerts"), alert_every=5_000))
        entries = server.client().xrange("alerts")
        got = [json.loads(fields[b"alert"]) for _, fields in entries]
        assert _timeless(got) == _timeless(expected)
        assert [fields[b"id"].decode() for _, fields in entries] == [a["id"] for a in got]
    finally:
        server.stop()
