"""Checkpoints (stream/checkpoint.py) and the source positions they hold (connectors/).

What is checked, and against what:

* Source positions: reading on from any batch's position gives exactly the records an
  uninterrupted read gives after that batch (CSV with quoted fields, blank and bad lines,
  gzip, JSON Lines, several files; batch sizes 1 to 65536). A file changed under a
  position is refused with a message naming it.
* Resume exactness: a run resumed from *every* checkpoint it wrote ends with the same
  summary, metrics log, predictions, events and model as the uninterrupted run, for a
  class target and a numeric one (DEVELOPERS.md: the kernels are record-at-a-time, so
  restoring all state at a record gives the same tree). The SIGKILL version of this is
  tests/run/test_resume_kill.py.
* The file: a damaged newest checkpoint (truncated, one byte flipped) falls back to the
  previous one with a warning naming the damaged file, which is kept; both damaged is an
  error naming both; a checkpoint of another command is refused with exit code 1.

Data: river's Agrawal generator (Agrawal, Imielinski & Swami, 1993) and Friedman
regression generator (Friedman, 1991), river 0.26.1, written to CSV with ``repr``
floats; hand-made text only for the reader edge cases.
"""

from __future__ import annotations

import csv
import gzip
import itertools
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from river.datasets import synth
from tests.run.checkpoint_copies import keep_every_checkpoint

from connectors.sources import open_sources
from stream.cli.main import cli
from stream.errors import ConfigError, ModelFileError
from stream.run import checkpoint as ck
from stream.run.engine import LearnRun
from stream.run.job import LearnJob
import stream.run.resume as resume


def pinned_wall() -> float:
    """A stopped wall clock: drift events of a stream without a time field are dated by
    the wall clock, so runs compared byte for byte must share one, or a second boundary
    crossed between them shows up as a difference."""
    return 1.7e9


TIMING = {"seconds", "records_per_second", "startup_seconds", "checkpoint", "outputs",
          "stopped"}


# ------------------------------------------------------------------------ source positions

def flat(batches) -> list:
    """(origin, line, values or 'reject') of every record, in file and line order."""
    out = []
    for b in batches:
        out += [(b.origin, line, tuple(v)) for line, v in
                zip(b.lines.tolist(), b.frame.astype(str).values.tolist())]
        out += [(b.origin, r.line, "reject") for r in b.rejects]
    return sorted(out, key=lambda t: (t[0], t[1]))


@pytest.fixture(scope="module")
def messy(tmp_path_factory) -> dict:
    d = tmp_path_factory.mktemp("positions")
    rows = list(itertools.islice(synth.SEA(seed=1), 1500))
    with open(d / "a.csv", "w", newline="", encoding="utf-8") as out:
        out.write("x,y,note,c\n")
        for i, (x, y) in enumerate(rows):
            note = '"said ""hi"",\nthen left"' if i % 97 == 0 else "plain"
            out.write(f"{x[0]!r},{x[1]!r},{note},{y}\n")
            if i % 300 == 0:
                out.write("\n")          # a blank line
            if i % 377 == 0:
                out.write("1,2\n")       # too few fields: a reject
    with open(d / "a.csv", "rb") as raw, gzip.open(d / "b.csv.gz", "wb") as packed:
        shutil.copyfileobj(raw, packed)
    with open(d / "c.jsonl", "w", encoding="utf-8") as out:
        for i, (x, y) in enumerate(rows):
            out.write("not json\n" if i % 50 == 0 else
                      json.dumps({"x": x[0], "c": bool(y)}) + "\n")
    return {name: str(d / name) for name in ("a.csv", "b.csv.gz", "c.jsonl")}


@pytest.mark.parametrize("names", [["a.csv"], ["b.csv.gz"], ["c.jsonl"],
                                   ["a.csv", "b.csv.gz"]])
@pytest.mark.parametrize("rows", [7, 37, 65536])
def test_reading_on_from_any_position_gives_the_rest(messy, names, rows):
    specs = [messy[n] for n in names]
    batches = list(open_sources(specs, batch_rows=rows).batches())
    whole = flat(batches)
    assert all(b.position is not None for b in batches)
    step = max(1, len(batches) // 7)
    for k in list(range(0, len(batches), step)) + [len(batches) - 1]:
        source = open_sources(specs, batch_rows=rows)
        source.seek(json.loads(json.dumps(batches[k].position)))  # as a checkpoint holds it
        assert flat(batches[:k + 1] + list(source.batches())) == whole, k


def test_a_file_changed_under_its_position_is_refused(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_text("a,b\n" + "".join(f"{i},{i % 3}\n" for i in range(200)))
    batch = next(iter(open_sources([str(path)], batch_rows=50).batches()))
    path.write_text("a,b\n" + "".join(f"{i},{i % 5}\n" for i in range(200)))  # rewritten
    source = open_sources([str(path)], batch_rows=50)
    source.seek(batch.position)
    with pytest.raises(ConfigError, match=r"feed.csv' is not the file the checkpoint was "
                                          r"taken from: it no longer holds the bytes read "
                                          r"up to offset \d+"):
        list(source.batches())


def test_a_position_of_other_sources_is_refused(tmp_path):
    for name in ("a.csv", "b.csv"):
        (tmp_path / name).write_text("a,b\n1,2\n")
    batch = next(iter(open_sources([str(tmp_path / "a.csv")]).batches()))
    with pytest.raises(ConfigError, match="not among this run's sources"):
        open_sources([str(tmp_path / "b.csv")]).seek(batch.position)


# ------------------------------------------------------------------------ resume exactness

def write_rows(path: Path, pairs) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = None
        for x, y in pairs:
            if writer is None:
                writer = csv.writer(out, lineterminator="\n")
                writer.writerow(list(x) + ["target"])
            writer.writerow([repr(float(v)) for v in x.values()] + [y])
    return path


@pytest.fixture(scope="module")
def agrawal_csv(tmp_path_factory) -> Path:
    return write_rows(tmp_path_factory.mktemp("agrawal") / "agrawal.csv", itertools.islice(
        synth.Agrawal(classification_function=2, seed=7), 16_000))


@pytest.fixture(scope="module")
def friedman_csv(tmp_path_factory) -> Path:
    return write_rows(tmp_path_factory.mktemp("friedman") / "friedman.csv",
                      itertools.islice(synth.Friedman(seed=5), 12_000))


def job_for(data: Path, out: Path, **extra) -> LearnJob:
    return LearnJob(sources=[str(data)], target="target",
                    checkpoint_path=str(out / "run.ckpt"), checkpoint_every=1500,
                    checkpoint_seconds=0, metrics_path=str(out / "metrics.jsonl"),
                    metrics_every=250, predictions_path=str(out / "predictions.jsonl"),
                    events_path=str(out / "events.jsonl"), snapshot_dir=str(out / "snaps"),
                    snapshot_every=2500, quarantine_path=str(out / "q.jsonl"),
                    save_path=str(out / "model.sap"), batch_rows=700, **extra)


def same_files(a: Path, b: Path) -> None:
    for name in ("metrics.jsonl", "predictions.jsonl", "events.jsonl"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    index_a, index_b = (json.loads((d / "snaps" / "index.json").read_text())["snapshots"]
                        for d in (a, b))
    assert [(e["sequence"], e["records"], e["headline"]) for e in index_a] == \
        [(e["sequence"], e["records"], e["headline"]) for e in index_b]


@pytest.mark.parametrize("data", ["agrawal_csv", "friedman_csv"])
def test_resuming_from_every_checkpoint_equals_the_uninterrupted_run(request, tmp_path,
                                                                      monkeypatch, data):
    data = request.getfixturevalue(data)
    out = tmp_path / "run"
    out.mkdir()
    copies = keep_every_checkpoint(monkeypatch, tmp_path)
    reference = LearnRun(job_for(data, out), wall=pinned_wall).run()
    monkeypatch.setattr(resume, "write_checkpoint", ck.write_checkpoint)
    full = tmp_path / "full"
    shutil.copytree(out, full)
    assert len(copies) >= 6
    for copy in copies[:-1]:
        shutil.rmtree(out)
        shutil.copytree(full, out)      # outputs as the finished run left them
        os.remove(out / "run.ckpt.prev")
        shutil.copy(copy, out / "run.ckpt")
        at = ck.read_checkpoint(copy, print).meta["run"]["records"]
        resumed = LearnRun(job_for(data, out), wall=pinned_wall).run()
        assert resumed["checkpoint"]["resumed_at_records"] == at
        assert {k: v for k, v in resumed.items() if k not in TIMING} == \
            {k: v for k, v in reference.items() if k not in TIMING}, at
        same_files(full, out)


# ------------------------------------------------------------------------ the file

@pytest.fixture
def finished(agrawal_csv, tmp_path) -> Path:
    out = tmp_path / "run"
    out.mkdir()
    LearnRun(job_for(agrawal_csv, out), wall=pinned_wall).run()
    return out


def test_the_previous_checkpoint_is_kept(finished):
    newest = ck.read_checkpoint(str(finished / "run.ckpt"), print)
    previous = ck._read(str(finished / "run.ckpt.prev"))
    assert newest.meta["run"]["checkpoints"] == previous.meta["run"]["checkpoints"] + 1
    assert newest.meta["checkpoint_version"] == ck.CHECKPOINT_VERSION


@pytest.mark.parametrize("damage", ["truncate", "flip"])
def test_a_damaged_checkpoint_falls_back_to_the_previous_one(finished, damage):
    path = finished / "run.ckpt"
    data = bytearray(path.read_bytes())
    if damage == "truncate":
        data = data[:len(data) // 2]
    else:
        data[len(data) - 100] ^= 0xFF   # inside the last array
    path.write_bytes(bytes(data))
    warnings = []
    found = ck.read_checkpoint(str(path), warnings.append)
    assert found.path == str(path) + ".prev"
    reason = "is truncated" if damage == "truncate" else "is corrupt: checksum of array"
    assert len(warnings) == 1 and warnings[0].startswith(f"checkpoint {str(path)!r} {reason}")
    assert f"resuming from the previous checkpoint {str(path) + '.prev'!r}" in warnings[0]
    assert (finished / "run.ckpt.corrupt").read_bytes() == bytes(data)  # kept to inspect
    assert not path.exists()  # the next checkpoint will not rotate the damaged one


def test_a_damaged_checkpoint_resumes_the_run_from_the_previous(agrawal_csv, finished,
                                                                tmp_path):
    before = tmp_path / "before"
    shutil.copytree(finished, before)
    path = finished / "run.ckpt"
    path.write_bytes(path.read_bytes()[:100])
    warnings = []
    again = LearnRun(job_for(agrawal_csv, finished), warn=warnings.append,
                     wall=pinned_wall).run()
    assert again["checkpoint"]["resumed_at_records"] < again["records"] == 16_000
    assert "is truncated" in warnings[0]
    same_files(before, finished)


def test_both_checkpoints_damaged_is_an_error_naming_both(finished):
    for name in ("run.ckpt", "run.ckpt.prev"):
        (finished / name).write_bytes(b"SAPWOOD-STATE\n")
    with pytest.raises(ModelFileError) as caught:
        ck.read_checkpoint(str(finished / "run.ckpt"), print)
    text = str(caught.value)
    assert str(finished / "run.ckpt") in text and str(finished / "run.ckpt.prev") in text
    assert caught.value.exit_code == 2


def test_a_newer_checkpoint_version_is_refused(tmp_path):
    path = str(tmp_path / "x.ckpt")
    ck.write_checkpoint(path, {"checkpoint_version": 99}, {})
    with pytest.raises(ModelFileError, match=r"was written by a newer sapwood \(checkpoint "
                                             "version 99"):
        ck._read(path)


def test_a_newer_checkpoint_is_not_set_aside_as_corrupt(finished):
    # a valid file of a later release: refusing it must not rename it or fall back
    path = finished / "run.ckpt"
    meta, arrays = ck.read_model_file(str(path))
    ck.write_checkpoint(str(path), {**meta, "checkpoint_version": 99}, arrays)
    with pytest.raises(ModelFileError, match="written by a newer sapwood"):
        ck.read_checkpoint(str(path), print)
    assert path.exists() and not (finished / "run.ckpt.corrupt").exists()


def test_a_checkpoint_of_another_command_is_refused_with_exit_1(agrawal_csv, finished):
    runner = CliRunner()
    args = ["learn", str(agrawal_csv), "--target", "target", "--checkpoint",
            str(finished / "run.ckpt"), "--grace-period", "50", "-q"]
    result = runner.invoke(cli, args, standalone_mode=False, catch_exceptions=True)
    assert isinstance(result.exception, ConfigError)
    assert result.exception.exit_code == 1
    assert str(result.exception) == (
        f"checkpoint {str(finished / 'run.ckpt')!r} belongs to another command (the tree "
        f"options: {{}} there, {{\"grace_period\": 50}} now); give the same options to "
        f"resume, or remove the checkpoint to start over")


def test_an_output_shortened_after_the_checkpoint_is_an_error(agrawal_csv, finished):
    (finished / "metrics.jsonl").write_text("")
    with pytest.raises(ModelFileError, match=r"metrics log '.*metrics.jsonl' is 0 bytes "
                                             r"long but the checkpoint covers \d+ bytes"):
        LearnRun(job_for(agrawal_csv, finished))


def test_standard_input_cannot_be_checkpointed(tmp_path):
    job = LearnJob(sources=["-"], target="target", checkpoint_path=str(tmp_path / "c"))
    with pytest.raises(ConfigError, match="standard input cannot be read again"):
        LearnRun(job).run()


def test_snapshots_written_after_the_checkpoint_are_removed(tmp_path):
    from stream.run.snapshots import SnapshotStore

    store = SnapshotStore(tmp_path)
    for records in (100, 200, 300, 400):
        store.write(records, {"headline": {"n": records}}, "text", 1.7e9)
    assert ck.rollback_snapshots(str(tmp_path), 2) == 2
    assert [e["records"] for e in store.entries()] == [100, 200]
    assert store.write(300, {}, "text", 1.7e9)["sequence"] == 3


def test_checkpoint_holds_no_pickle_and_names_its_parts(finished):
    head = (finished / "run.ckpt").read_bytes()[:400]
    assert head.startswith(b"SAPWOOD-STATE\nversion 1 manifest ")
    found = ck.read_checkpoint(str(finished / "run.ckpt"), print)
    assert set(found.meta) >= {"job", "schema", "encoder", "tree", "score", "run", "source",
                               "outputs", "checkpoint_version"}
    assert set(found.meta["outputs"]) == {"metrics", "events", "predictions", "quarantine"}
    position = found.meta["source"]
    assert position["offset"] == os.path.getsize(position["path"])
    assert set(position) >= {"path", "device", "inode", "size", "offset", "line", "mark",
                             "columns", "header_line"}
    assert all(isinstance(a, np.ndarray) for a in found.arrays.values())
