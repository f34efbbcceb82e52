"""Redis Streams on a Redis Cluster: three redis-servers on loopback joined by the
cluster commands of the Redis documentation (CLUSTER ADDSLOTSRANGE, CLUSTER MEET).

The checks: the source and the prediction sink reach a stream through any node (the
server's MOVED reply is followed); a stream whose hash slot is moved to another node
while it is read (CLUSTER SETSLOT ... MIGRATING/IMPORTING, MIGRATE, SETSLOT NODE: the
resharding steps of the Redis Cluster specification) is still read once, in order, with
nothing left pending; a learn run on the cluster equals the same run on one server; the
hash-tag helper agrees with the server's own CLUSTER KEYSLOT.
"""

from __future__ import annotations

import json
import threading
import time

import pytest

from connectors.brokers import open_broker
from connectors.local_brokers import REDIS_SERVER, LocalRedisCluster
from connectors.redis_clients import hash_tag, same_slot_key
from connectors.sinks import open_prediction_sink
from stream.errors import ConfigError
from tests.connectors.redis_records import add_hot_records, learn_numbers

pytestmark = pytest.mark.skipif(
    REDIS_SERVER is None,
    reason="redis-server is not installed (bash .ci/brokers.sh install adds it)")


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    c = LocalRedisCluster(tmp_path_factory.mktemp("cluster")).start()
    yield c
    c.stop()


@pytest.fixture(scope="module")
def single(plain_redis):
    return plain_redis


_names = iter(range(1, 10**6))


def stream_on_other_node(cluster: LocalRedisCluster) -> str:
    """A fresh key whose slot is not served by the node the URLs name."""
    while True:
        name = f"line{next(_names)}"
        if cluster.owner(name) is not cluster.nodes[0]:
            return name


fill = add_hot_records


def cluster_client(cluster):
    from redis.cluster import RedisCluster
    return RedisCluster(host="127.0.0.1", port=cluster.port, protocol=2)


def pending(client, stream: str) -> int:
    return client.xpending(stream, "sapwood")["pending"]


def test_a_stream_on_another_node_is_read_through_any_node(cluster):
    stream = stream_on_other_node(cluster)
    rc = cluster_client(cluster)
    fill(rc, stream, 500)
    src = open_broker(cluster.url(stream=stream, idle_exit=0), 64, retry=5)
    seen = learn_numbers(src)
    assert src.cluster
    assert seen == list(range(500))
    assert pending(rc, stream) == 0


def test_a_slot_moved_while_reading_loses_and_repeats_nothing(cluster):
    """The stream's keys move while batches are handed out and not yet acknowledged:
    first the old node answers ASK (keys gone, slot still migrating), then MOVED (slot
    assigned to the new node). Every entry once, in order; acknowledged at the new node
    (XPENDING 0)."""
    stream = stream_on_other_node(cluster)
    rc = cluster_client(cluster)
    fill(rc, stream, 2000)
    before = cluster.owner(stream)
    after = next(n for n in cluster.nodes if n is not before)
    src = open_broker(cluster.url(stream=stream, idle_exit=0), 100, retry=5)
    seen, asked = [], None
    for i, batch in enumerate(src.batches()):
        seen += batch.frame["n"].astype(int).tolist()
        if i == 3:        # entries 300-399 handed out and not yet acknowledged
            cluster.migrate_keys(stream, after)
        if i == 8:
            asked = len(seen)
            cluster.assign_slot(stream, after)
        src.commit(batch.position)
    src.close()
    assert asked == 900 and cluster.owner(stream) is after
    assert seen == list(range(2000))
    assert pending(rc, stream) == 0


def test_a_learn_run_on_the_cluster_equals_the_same_run_on_one_server(
        cluster, single, tmp_path):
    """Same records, same settings: the predictions and the summary's figures are equal,
    though the stream's slot moves to another node halfway through the cluster run."""
    from click.testing import CliRunner

    from stream.cli.main import cli

    stream = stream_on_other_node(cluster)
    n = 6000
    fill(cluster_client(cluster), stream, n)
    fill(single.client(), stream, n)
    rc = cluster_client(cluster)
    before = cluster.owner(stream)

    def move_halfway():
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            groups = rc.xinfo_groups(stream) if rc.exists(stream) else []
            # entries-read is nil while the server cannot tell (XINFO GROUPS docs)
            if groups and (groups[0].get("entries-read") or 0) >= n // 2:
                break
            time.sleep(0.005)
        cluster.move(stream, next(x for x in cluster.nodes if x is not before))

    results = {}
    for name, server in (("single", single), ("cluster", cluster)):
        out = tmp_path / name
        out.mkdir()
        mover = threading.Thread(target=move_halfway) if name == "cluster" else None
        if mover:
            mover.start()
        result = CliRunner().invoke(cli, [
            "learn", server.url(stream=stream, idle_exit=0), "--target", "hot",
            "--batch-rows", "200", "--predictions", str(out / "p.csv"),
            "--summary", str(out / "s.json"), "-q"])
        if mover:
            mover.join()
        assert result.exit_code == 0, result.output
        summary = json.loads((out / "s.json").read_text())
        results[name] = (summary, (out / "p.csv").read_text())
    keep = ("records", "learned", "quarantined", "accuracy", "kappa", "leaves")
    figures = {name: {k: s.get(k) for k in keep} for name, (s, _) in results.items()}
    assert cluster.owner(stream) is not before      # the move did happen mid-run
    assert figures["cluster"] == figures["single"]
    assert figures["cluster"]["learned"] == n
    assert results["cluster"][1] == results["single"][1]
    assert pending(rc, stream) == 0


def test_predictions_go_to_a_stream_on_the_cluster(cluster):
    import pandas as pd

    key = stream_on_other_node(cluster)
    sink = open_prediction_sink(cluster.url(stream=key))
    sink.write(pd.DataFrame({"line": [1, 2], "predicted": ["yes", "no"]}))
    sink.close()
    entries = cluster_client(cluster).xrange(key)
    assert [f[b"predicted"] for _, f in entries] == [b"yes", b"no"]


def test_a_cluster_has_no_database_but_0(cluster):
    url = cluster.url(stream="x").replace("/0?", "/3?")
    src = open_broker(url, 10, retry=1)
    with pytest.raises(ConfigError, match="database 0 only"):
        next(src.batches())


@pytest.mark.parametrize("key", ["line7", "plant:{line7}:telemetry", "{a}{b}", "x{}y{z}",
                                 "{}", "a}b", "k:{x"])
def test_same_slot_keys_share_the_slot_the_server_computes(cluster, key):
    """The server's CLUSTER KEYSLOT is the reference (Redis Cluster specification, hash
    tags): a key made by same_slot_key lands in the slot of the key it was made from,
    or the name is refused when no such key can be made."""
    client = cluster.nodes[0].client()
    try:
        made = same_slot_key(key, "fence:sapwood")
    except ConfigError:
        assert hash_tag(key) is None and ("{" in key or "}" in key)
        return
    assert client.execute_command("CLUSTER", "KEYSLOT", made) == \
        client.execute_command("CLUSTER", "KEYSLOT", key)
