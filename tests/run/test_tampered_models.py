"""A checksum proves integrity, not validity: edited and re-signed model files are
refused with a message, never crash or hang the compiled code.

Data: river's Agrawal generator (Agrawal et al. 1993, function 2) and Friedman #1
(Friedman 1991), learned by sapwood and saved.
"""

from __future__ import annotations

import csv
import subprocess
import sys
from pathlib import Path

import pytest
from river.datasets import synth

from stream.child_env import same_code_env
from stream.errors import ModelFileError
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.model_file import read_model_file, write_model_file
from stream.run.saved_model import MODEL_KIND, load_model
from stream.tree.layout import CHILD_START, DEAD, KIND, LEAF, S_FREE_NODES, S_NODES, STATUS

ROOT = Path(__file__).resolve().parents[2]


def _saved(where: Path, name: str, rows, target: str, declared: dict) -> Path:
    data = where / f"{name}.csv"
    with open(data, "w", newline="") as out:
        writer = csv.writer(out)
        keys = None
        for x, y in rows:
            if keys is None:
                keys = list(x)
                writer.writerow([str(k) for k in keys] + [target])
            writer.writerow([x[k] for k in keys] + [y])
    model = where / f"{name}.sap"
    run_learn(LearnJob(sources=[str(data)], target=target, declared=declared,
                       save_path=str(model), options={"grace_period": 50},
                       quarantine_path=str(where / "q.jsonl")))
    return model


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    where = tmp_path_factory.mktemp("tampered")
    agrawal = _saved(where, "agrawal", synth.Agrawal(seed=3, classification_function=2)
                     .take(6_000), "group", {"elevel": "category", "car": "category",
                                             "zipcode": "category"})
    friedman = _saved(where, "friedman", synth.Friedman(seed=3).take(6_000), "y", {})
    return where, {"classification": agrawal, "regression": friedman}


def test_a_free_node_that_is_in_use_is_refused(models, tmp_path):
    # the edit that made the classifier loop forever: three live nodes declared free
    _, files = models
    meta, arrays = read_model_file(files["classification"])
    arrays["state"][S_FREE_NODES] = 3
    path = tmp_path / "m.sap"
    write_model_file(path, MODEL_KIND, meta, arrays)
    with pytest.raises(ModelFileError, match="free node stack"):
        load_model(str(path))


@pytest.mark.parametrize("task", ["classification", "regression"])
def test_a_cycle_in_the_children_is_refused(models, tmp_path, task):
    _, files = models
    meta, arrays = read_model_file(files[task])
    node_i = arrays["node_i"]
    n = int(arrays["state"][S_NODES])
    branch = next(i for i in range(n) if node_i[i, KIND] != LEAF and node_i[i, STATUS] < DEAD)
    arrays["child_table"][node_i[branch, CHILD_START]] = branch   # a node its own child
    path = tmp_path / "m.sap"
    write_model_file(path, MODEL_KIND, meta, arrays)
    with pytest.raises(ModelFileError, match="twice"):
        load_model(str(path))


@pytest.mark.parametrize("task,seed", [("classification", 11), ("regression", 12)])
def test_random_edits_never_crash_or_hang_the_loader(models, tmp_path, task, seed):
    """Property: 120 random edits of every kind of array (indices, counters, settings,
    statistics; edge values such as -1, the table size, NaN, 1e300), re-signed; each is
    refused with a message or gives a usable model. One child process runs them all."""
    _, files = models
    result = subprocess.run(
        [sys.executable, "-m", "tests.run.tampered_models", str(files[task]), str(seed),
         "120", str(tmp_path / "edited.sap")],
        capture_output=True, text=True, timeout=240, cwd=ROOT, env=same_code_env())
    last = result.stdout.strip().splitlines()[-1:] or ["(no trial ran)"]
    assert result.returncode == 0, f"after {last[0]}: {result.stderr[-2000:]}"
