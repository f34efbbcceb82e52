"""The grove without Ray: its plan, the producers' routing of keys to streams, the
refusals of ``grove start`` before any learner starts, and ``status --folder-only`` and
``gather`` on the outputs of learners run here as plain ``sapwood learn`` commands.

Sources: the CRC-32 check value 0xCBF43926 of the nine ASCII bytes ``123456789`` (the
check value listed for CRC-32, ISO 3309 / ITU-T V.42, in catalogues of CRC parameters;
quoted from memory); records from river's Agrawal generator (Agrawal, Imielinski &
Swami, 1993; river 0.26.1 ``synth.Agrawal``).
"""

from __future__ import annotations

import itertools
import json
import subprocess
import sys

import pytest
from click.testing import CliRunner
from river.datasets import synth

from connectors.local_brokers import REDIS_SERVER, LocalRedis
from stream.child_env import same_code_env
from stream.cli.main import cli
from stream.errors import ConfigError
from stream.grove.plan import folder_name, make_plan, read_plan, stream_for, write_plan

CHECK_VALUE = 0xCBF43926


@pytest.mark.parametrize("streams", [1, 3, 8, 1000])
def test_a_key_goes_to_the_stream_of_its_crc32(streams):
    assert stream_for("123456789", "plant:", streams) == f"plant:{CHECK_VALUE % streams}"


def test_the_plan_gives_each_learner_its_stream_group_consumer_and_folder():
    plan = make_plan("north", "redis://10.0.0.5:6379/0?password_env=PW&format=json",
                     ["plant:0", "plant_0"], "fault", "line", "--grace-period 50", 1.0)
    first, second = plan.learners
    assert first.folder != second.folder                   # ':' and '_' stay apart
    url = plan.source_url(first)
    assert url.startswith("redis://10.0.0.5:6379/0?")
    for part in ("password_env=PW", "format=json", "stream=plant%3A0",
                 "group=sapwood-grove-north", "consumer=learner-0"):
        assert part in url
    command = plan.learn_command("/shared/g", second)
    assert command[:2] == ["learn", plan.source_url(second)]
    assert command[command.index("--by") + 1] == "line"
    assert command[-2:] == ["--grace-period", "50"]
    paths = [command[command.index(flag) + 1] for flag in (
        "--checkpoint", "--snapshots", "--summary", "--metrics", "--events", "--predictions",
        "--quarantine")]
    assert all(p.startswith(f"/shared/g/{second.folder}/") for p in paths)


@pytest.mark.parametrize("name, url, streams, args, words", [
    ("no spaces", "redis://h", ["a"], "", "grove name"),
    ("g", "mqtt://h/t", ["a"], "", "redis:// or rediss://"),
    ("g", "redis://h?stream=x", ["a"], "", "sets stream itself"),
    ("g", "redis://h", ["a", "a"], "", "named twice"),
    ("g", "redis://h", [], "", "at least one stream"),
    ("g", "redis://h", ["a"], "--snapshots elsewhere/", "--snapshots is set by the grove"),
])
def test_a_plan_that_cannot_work_is_refused_with_the_reason(name, url, streams, args,
                                                            words):
    with pytest.raises(ConfigError, match=words):
        make_plan(name, url, streams, "fault", "line", args, 1.0)


def test_folder_names_are_safe_and_distinct():
    names = [folder_name(s) for s in ("a", "a:b", "a_b", "a/b", ".hidden", "..")]
    assert len(set(names)) == len(names)
    assert all("/" not in n and not n.startswith(".") for n in names)


@pytest.mark.parametrize("args, words", [
    ("--grace-period many", "'--grace-period': 'many' is not a valid integer"),
    ("--labels later.csv", "--by does not work with --labels"),
    ("--predictions -", "--predictions is set by the grove"),
])
def test_grove_start_refuses_bad_learn_options_before_asking_ray(tmp_path, args, words):
    result = CliRunner().invoke(cli, ["grove", "start", str(tmp_path / "g"), "plant:0",
                                      "--redis", "redis://127.0.0.1:1", "--target", "y",
                                      "--by", "line", "--learn-args", args])
    assert result.exit_code != 0 and words in str(result.exception), result.output
    assert not (tmp_path / "g").exists()


@pytest.mark.skipif(REDIS_SERVER is None, reason="redis-server is not installed "
                                                 "(bash .ci/brokers.sh install adds it)")
def test_status_and_gather_read_the_learners_folders(tmp_path):
    # two learners run here as the grove's actors would run them (their own learn
    # commands), without Ray; then status --folder-only and gather read the folder
    (tmp_path / "redis").mkdir()
    server = LocalRedis(tmp_path / "redis", durable=False).start()
    try:
        client = server.client()
        counts = {"plant:0": 0, "plant:1": 0}
        for x, y in itertools.islice(synth.Agrawal(classification_function=1, seed=2),
                                     6000):
            row = {k: repr(float(v)) if isinstance(v, float) else str(v)
                   for k, v in x.items()}
            row["class"] = str(y)
            stream = stream_for(row["elevel"], "plant:", 2)
            counts[stream] += 1
            client.xadd(stream, row)
        plan = make_plan("here", server.url(idle_exit=0), list(counts), "class", "elevel",
                         "--snapshot-every 500 --kind car=category --kind zipcode=category",
                         1.0)
        home = tmp_path / "grove"
        write_plan(str(home), plan)
        for learner in plan.learners:
            plan.make_folder(str(home), learner)
            subprocess.run([sys.executable, "-m", "stream.cli",
                            *plan.learn_command(str(home), learner)],
                           check=True, env=same_code_env())
    finally:
        server.stop()
    assert read_plan(str(home)).name == "here"
    runner = CliRunner()
    status = runner.invoke(cli, ["grove", "status", str(home), "--folder-only", "--json"])
    assert status.exit_code == 0, status.output
    rows = json.loads(status.output)["learners"]
    assert {r["stream"]: r["records"] for r in rows} == counts
    assert sorted(k for r in rows for k in r["keys"]) == ["0", "1", "2", "3", "4"]
    assert all(r["alive"] is None for r in rows)
    listing = runner.invoke(cli, ["grove", "gather", str(home), "--json"])
    assert listing.exit_code == 0, listing.output
    keys = json.loads(listing.output)
    assert sorted(k["key"] for k in keys) == ["0", "1", "2", "3", "4"]
    assert all(k["rules"] for k in keys)
    report = tmp_path / "grove.html"
    some = runner.invoke(cli, ["grove", "gather", str(home), "--key", "[13]", "--report",
                               str(report)])
    assert some.exit_code == 0, some.output
    assert some.output.count("=== key ") == 2
    page = report.read_text()
    assert 'id="key-1"' in page and 'id="key-3"' in page and 'id="key-2"' not in page
    assert "advisory, not safety interlocks" in page
    none = runner.invoke(cli, ["grove", "gather", str(home), "--key", "nine"])
    assert none.exit_code != 0 and "no key matching nine" in str(none.exception)
