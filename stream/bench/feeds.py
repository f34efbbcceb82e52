"""The ``feeds`` benchmark suite: live-feed throughput and the cost of checkpoints.

Every row is one ``sapwood learn`` child process on the same SEA-concept records (the
CSV of the end-to-end suite), and its rate is the summary's ``records_per_second``
(opening the source to the last record learned):

* a CSV file, without and with a checkpoint every 10,000 records (each checkpoint is the
  whole learner state written with temp file, fsync and rename);
* the same records as a Parquet file (written by pandas with pyarrow; skipped when the
  optional extra is not installed), which should read at least as fast as the CSV;
* a Redis stream filled beforehand (XADD), read through a consumer group, without and
  with checkpoints (entries are acknowledged when the checkpoint holding them is on
  disk);
* an MQTT topic whose QoS 1 messages were published while the learner's persistent
  session was away, so the broker delivers the backlog as fast as the learner takes it:
  one record per message, and 100 records per message (a JSON array, as gateways batch
  readings).

The brokers are throwaway servers on 127.0.0.1 (:mod:`connectors.local_brokers`); a row
is skipped with a note when its server is not installed. Targets: Redis at least 250k
records/s, MQTT at least 30k messages/s with one record each and 100k records/s in
messages of 100.
"""

from __future__ import annotations

import contextlib
import json
from pathlib import Path

from connectors.local_brokers import MOSQUITTO, REDIS_SERVER, LocalMosquitto, LocalRedis

from .common import Bench, Check, Column, SuiteResult, fmt_count, fmt_ratio, register
from .end_to_end import learn_child, warm_child, write_sea_csv

CHECKPOINT_EVERY = 10_000
"""Records between checkpoints in the rows that checkpoint (a common operating choice)."""

MQTT_RECORDS = 100_000
"""At most this many records go through the MQTT broker (publishing them takes a
while: every QoS 1 publish waits for its acknowledgement window)."""

RECORDS_PER_MESSAGE = 100
"""Records per message in the batched MQTT row."""

TARGETS = {"Redis stream": 250_000, "MQTT topic": 30_000,
           f"MQTT topic, {RECORDS_PER_MESSAGE} records per message": 100_000}
"""Records/s each live feed should reach without checkpoints."""


def _learn(bench: Bench, source: str, checkpoint: bool, name: str) -> dict:
    extra = ["--checkpoint", str(bench.workdir / f"{name}.ckpt"), "--checkpoint-every",
             str(CHECKPOINT_EVERY), "--checkpoint-seconds", "0"] if checkpoint else []
    run = learn_child(bench, None, "label", pipe=False, source=source, extra=extra)
    return run.summary


def _row(feed: str, checkpoint: bool, summary: dict, file_rate: float | None) -> dict:
    rate = summary["records_per_second"]
    return {"feed": feed, "checkpoint": f"every {CHECKPOINT_EVERY:,}" if checkpoint else "none",
            "records": summary["records"], "sapwood_rps": rate,
            "vs_file": rate / file_rate if file_rate and rate else None,
            "checkpoints": (summary.get("checkpoint") or {}).get("written"),
            "accuracy": summary["accuracy"]}


def _fill_redis(server: LocalRedis, key: str, csv_path: Path) -> int:
    import pandas as pd

    client = server.client()
    added = 0
    for frame in pd.read_csv(csv_path, dtype=str, chunksize=10_000):
        pipe = client.pipeline(transaction=False)
        for row in frame.to_dict("records"):
            pipe.xadd(key, row)
        pipe.execute()
        added += len(frame)
    return added


def _publish_backlog(broker: LocalMosquitto, topic: str, csv_path: Path, limit: int,
                     per_message: int = 1) -> int:
    """Publish the first ``limit`` records of ``csv_path``: one JSON object per message,
    or JSON arrays of ``per_message`` objects."""
    import paho.mqtt.client as mqtt
    import pandas as pd
    from paho.mqtt.enums import CallbackAPIVersion

    client = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
    client.max_inflight_messages_set(1000)
    client.connect("127.0.0.1", broker.port)
    client.loop_start()
    sent = 0
    try:
        for frame in pd.read_csv(csv_path, nrows=limit, chunksize=10_000):
            rows = frame.to_dict("records")
            payloads = [json.dumps(row) for row in rows] if per_message == 1 else \
                [json.dumps(rows[i:i + per_message]) for i in range(0, len(rows), per_message)]
            infos = [client.publish(topic, payload, qos=1) for payload in payloads]
            for info in infos:
                info.wait_for_publish(30)
                if not info.is_published():
                    raise RuntimeError("mosquitto did not acknowledge a benchmark message")
            sent += len(rows)
    finally:
        client.disconnect()
        client.loop_stop()
    return sent


def _open_session(url: str) -> None:
    """Subscribe once with the learner's client id, so the broker keeps its messages."""
    from connectors.mqtt import MqttSource

    source = MqttSource(url, idle_exit=0)
    try:
        for _ in source.batches():
            pass
    finally:
        source.close()


def _folder(bench: Bench, name: str) -> Path:
    folder = bench.workdir / name
    folder.mkdir()
    return folder


@contextlib.contextmanager
def _running(server):
    """A started local broker, stopped at the end of the block."""
    server.start()
    try:
        yield server
    finally:
        server.stop()


@register("feeds")
def feeds_suite(bench: Bench) -> SuiteResult:
    """Records/s into the learner from a file, Redis and MQTT, with and without
    checkpoints."""
    rows = bench.records
    result = SuiteResult(
        "feeds",
        f"feeds: sapwood learn from a file, a Redis stream and an MQTT topic, SEA concept, "
        f"{rows:,} records (MQTT at most {MQTT_RECORDS:,})",
        [Column("feed", "feed", left=True), Column("checkpoint", "checkpoint", left=True),
         Column("records", "records", fmt_count), Column("sapwood_rps", "sapwood rec/s", fmt_count),
         Column("vs_file", "vs file", fmt_ratio), Column("checkpoints", "checkpoints", fmt_count)])
    warm_child(bench)
    csv_path = write_sea_csv(bench.workdir / "feed.csv", rows, bench.seed)

    bench.say(f"feeds: CSV file, {rows:,} records, without then with checkpoints")
    plain = _learn(bench, str(csv_path), False, "file")
    file_rate = plain["records_per_second"]
    result.rows.append(_row("CSV file", False, plain, file_rate))
    result.rows.append(_row("CSV file", True, _learn(bench, str(csv_path), True, "file"),
                            file_rate))
    try:
        import pandas as pd
        import pyarrow  # noqa: F401  (the optional extra)
    except ImportError:
        result.notes.append("Parquet row skipped: pyarrow is not installed "
                            "(pip install \"sapwood[parquet]\").")
    else:
        parquet_path = csv_path.with_suffix(".parquet")
        pd.read_csv(csv_path).to_parquet(parquet_path, index=False)
        bench.say(f"feeds: the same {rows:,} records from a Parquet file")
        parquet = _row("Parquet file", False, _learn(bench, str(parquet_path), False,
                                                     "parquet"), file_rate)
        result.rows.append(parquet)
        result.checks.append(Check("Parquet file: records/s vs the CSV file",
                                   parquet["vs_file"], 1.0, ">=", "x"))
        parquet_path.unlink()

    if REDIS_SERVER is None:
        result.notes.append("Redis rows skipped: redis-server is not installed "
                            "(bash .ci/brokers.sh install).")
    else:
        with _running(LocalRedis(_folder(bench, "redis"), durable=False)) as server:
            bench.say(f"feeds: filling a Redis stream with {rows:,} entries")
            _fill_redis(server, "sea", csv_path)
            for group, checkpoint, fence in (("plain", False, True),
                                             ("durable", True, True),
                                             ("unfenced", False, False)):
                bench.say(f"feeds: learning from the Redis stream, group {group}")
                url = server.url(stream="sea", group=group, idle_exit=0,
                                 **({} if fence else {"fence": "false"}))
                feed = "Redis stream" if fence else "Redis stream, fence=false"
                result.rows.append(_row(feed, checkpoint,
                                        _learn(bench, url, checkpoint, f"redis-{group}"),
                                        file_rate))

    if MOSQUITTO is None:
        result.notes.append("MQTT row skipped: mosquitto is not installed "
                            "(bash .ci/brokers.sh install).")
    else:
        with _running(LocalMosquitto(_folder(bench, "mosquitto"))) as broker:
            count = min(rows, MQTT_RECORDS)
            for per_message in (1, RECORDS_PER_MESSAGE):
                feed = "MQTT topic" if per_message == 1 else \
                    f"MQTT topic, {per_message} records per message"
                topic = f"bench/sea{per_message}"
                url = broker.url(topic, client_id=f"sapwood-bench-{per_message}", idle_exit=1)
                _open_session(url)
                bench.say(f"feeds: publishing {count:,} records as QoS 1 messages of "
                          f"{per_message} while the learner is away")
                _publish_backlog(broker, topic, csv_path, count, per_message)
                bench.say(f"feeds: learning the MQTT backlog ({feed})")
                result.rows.append(_row(feed, False, _learn(bench, url, False,
                                                            f"mqtt{per_message}"), file_rate))
    csv_path.unlink()
    for row in result.rows:
        target = TARGETS.get(row["feed"])
        if target is not None and row["checkpoint"] == "none":
            result.checks.append(Check(f"{row['feed']}: records/s", row["sapwood_rps"],
                                       target, ">=", "rec/s"))

    result.notes.append("Rates are each child's summary records_per_second: from opening "
                        "the source to the last record learned, so the MQTT row's quiet "
                        "second before it ends is not counted. 'vs file' divides by the "
                        "CSV row without checkpoints.")
    result.notes.append(f"Checkpoints: every {CHECKPOINT_EVERY:,} records, plus one at the "
                        "end; each is the whole learner state written to a temporary file, "
                        "fsynced and renamed. Redis: a fresh consumer group per row, "
                        "entries acknowledged after the checkpoint that holds them (after "
                        "each batch without one). MQTT: QoS 1, protocol 5, one JSON object "
                        "per message (the batched row: JSON arrays of "
                        f"{RECORDS_PER_MESSAGE} objects), PUBACKs sent after each learned "
                        "batch.")
    return result
