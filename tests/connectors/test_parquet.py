"""Parquet files (connectors/parquet.py) against the CSV reader on the same records:
river's Agrawal generator (Agrawal et al. 1993, as river ships it) written by pandas both
ways gives the same summary, rules and predictions; reading on from any batch position
gives the rest; a folder of parts reads as its files in name order."""

from __future__ import annotations

import itertools
import json

import pandas as pd
import pytest
from river.datasets import synth

pytest.importorskip("pyarrow", reason="pyarrow is not installed (pip install "
                    "\"sapwood[parquet]\")")

from connectors.sources import open_sources  # noqa: E402
from stream.errors import ConfigError  # noqa: E402
from stream.run.engine import run_learn  # noqa: E402
from stream.run.job import LearnJob  # noqa: E402

TIMING = {"seconds", "records_per_second", "startup_seconds", "sources", "outputs"}


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    rows = []
    for x, y in itertools.islice(synth.Agrawal(classification_function=5, seed=21), 9_000):
        rows.append({"salary": x["salary"], "commission": x["commission"],
                     "age": int(x["age"]), "elevel": f"e{x['elevel']}",
                     "car": f"car{x['car']}", "hvalue": x["hvalue"],
                     "loan": x["loan"], "group": str(y)})
    frame = pd.DataFrame(rows)
    frame.loc[::97, "salary"] = None      # missing values travel both ways
    return frame


@pytest.fixture(scope="module")
def files(frame, tmp_path_factory):
    d = tmp_path_factory.mktemp("parquet")
    frame.to_csv(d / "a.csv", index=False)
    frame.to_parquet(d / "a.parquet", index=False, row_group_size=1_000)
    parts = d / "parts"
    parts.mkdir()
    for k, start in enumerate(range(0, len(frame), 4_000)):
        frame.iloc[start:start + 4_000].to_parquet(parts / f"part-{k}.parquet", index=False)
    return d


def _flat(batches):
    return [tuple(map(repr, row)) for b in batches for row in b.frame.itertuples(index=False)] + \
        [int(x) for b in batches for x in b.lines]


@pytest.mark.parametrize("rows", [7, 999, 65536])
def test_reading_on_from_any_position_gives_the_rest(files, rows):
    spec = [str(files / "a.parquet")]
    batches = list(open_sources(spec, batch_rows=rows).batches())
    assert sum(len(b) for b in batches) == 9_000
    assert batches[0].lines[0] == 2 and batches[-1].lines[-1] == 9_001
    whole = _flat(batches)
    step = max(1, len(batches) // 5)
    for k in list(range(0, len(batches), step)) + [len(batches) - 1]:
        source = open_sources(spec, batch_rows=rows)
        source.seek(json.loads(json.dumps(batches[k].position)))
        assert _flat(batches[:k + 1] + list(source.batches())) == whole, k


def test_the_same_records_as_csv_and_as_parquet_learn_alike(files, tmp_path):
    results = {}
    for name in ("a.csv", "a.parquet", "parts"):
        out = tmp_path / name.replace(".", "_")
        out.mkdir()
        summary = run_learn(LearnJob(sources=[str(files / name)], target="group",
                                     predictions_path=str(out / "p.csv"),
                                     save_path=str(out / "m.sapwood"), batch_rows=3_000))
        predictions = pd.read_csv(out / "p.csv").drop(columns=["origin"])
        results[name] = ({k: v for k, v in summary.items() if k not in TIMING},
                         predictions)
    csv_summary, csv_predictions = results["a.csv"]
    assert csv_summary["learned"] == 9_000 and csv_summary["leaves"] > 1
    for name in ("a.parquet", "parts"):
        summary, predictions = results[name]
        assert summary == csv_summary, name
        kept = [c for c in predictions.columns if name != "parts" or c != "line"]  # per part
        pd.testing.assert_frame_equal(predictions[kept], csv_predictions[kept])


def test_a_file_that_is_not_parquet_is_named(tmp_path):
    bad = tmp_path / "x.parquet"
    bad.write_text("a,b\n1,2\n")
    with pytest.raises(ConfigError, match=r"'.*x.parquet' is not a readable Parquet file"):
        list(open_sources([str(bad)]).batches())


def test_a_folder_of_mixed_formats_is_refused(tmp_path):
    (tmp_path / "a.csv").write_text("a\n1\n")
    (tmp_path / "b.jsonl").write_text('{"a": 1}\n')
    with pytest.raises(ConfigError, match="must hold files of one format"):
        open_sources([str(tmp_path)])
