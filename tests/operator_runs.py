"""Shared by the operator-view tests: a real learning run on river's Agrawal generator.

river's ``datasets.synth.Agrawal`` (Agrawal, Imielinski & Swami, 1993, as implemented in
river 0.26) generates loan applications labelled by one of ten published functions. The
stream here switches from function 0 to function 2 half way, a documented way to make
concept drift with this generator (river's docs use ``classification_function`` for
it), so the tree grows new rules after the switch. ``elevel``, ``car`` and ``zipcode``
are declared categories (river's docs describe them as nominal). About 3 % of the
values of four fields are blanked with a fixed seed, so missing-value handling is
exercised. Nothing else is invented: the labels are the generator's.
"""

from __future__ import annotations

import dataclasses
import itertools
from pathlib import Path

import numpy as np
import pandas as pd
from river.datasets import synth

from stream.classify.settings import TreeSettings
from stream.run.engine import run_learn
from stream.run.job import LearnJob
from stream.run.scoring import score_sources

FEATURES = ("salary", "commission", "age", "elevel", "car", "zipcode", "hvalue", "hyears",
            "loan")
CATEGORIES = ("elevel", "car", "zipcode")
BLANKED = ("salary", "age", "car", "elevel")
TARGET = "approved"


def agrawal_frame(rows: int, function: int, seed: int, blank_seed: int) -> pd.DataFrame:
    """``rows`` records of river's Agrawal generator as text-ready columns."""
    stream = synth.Agrawal(classification_function=function, seed=seed)
    records = list(itertools.islice(stream, rows))
    frame = pd.DataFrame([x for x, _ in records], columns=list(FEATURES))
    for name in ("salary", "commission", "hvalue", "loan"):
        frame[name] = frame[name].round(2)
    frame[TARGET] = np.where(np.array([y for _, y in records]) == 1, "yes", "no")
    frame = frame.astype(object)
    rng = np.random.default_rng(blank_seed)
    for name in BLANKED:
        frame.loc[rng.random(rows) < 0.03, name] = ""
    return frame


@dataclasses.dataclass
class Run:
    """Files of one learning run (and a held-out set scored by the saved model)."""

    directory: Path
    data: Path
    holdout: Path
    snapshots: Path
    metrics: Path
    predictions: Path
    scored: Path
    model: Path
    summary: dict


def learn_run(directory: Path, leaf_model: str = "majority", rows: int = 20000,
              holdout_rows: int = 10000, snapshot_every: int = 2500,
              metrics_every: int = 500) -> Run:
    """Learn ``rows`` records (function 0, then function 2), snapshots and metrics on;
    then score ``holdout_rows`` new records of function 2 with the saved model."""
    directory.mkdir(parents=True, exist_ok=True)
    half = rows // 2
    learn = pd.concat([agrawal_frame(half, 0, 11, 1), agrawal_frame(rows - half, 2, 12, 2)],
                      ignore_index=True)
    data = directory / "agrawal.csv"
    learn.to_csv(data, index=False)
    holdout = directory / "holdout.csv"
    agrawal_frame(holdout_rows, 2, 13, 3).to_csv(holdout, index=False)
    run = Run(directory, data, holdout, directory / "snapshots", directory / "metrics.jsonl",
              directory / "predictions.csv", directory / "scored.csv",
              directory / "model.sapwood", {})
    job = LearnJob(
        sources=[str(data)], target=TARGET, declared={c: "category" for c in CATEGORIES},
        settings=TreeSettings(leaf_model=leaf_model, grace_period=200),
        snapshot_dir=str(run.snapshots), snapshot_every=snapshot_every,
        metrics_path=str(run.metrics), metrics_every=metrics_every,
        predictions_path=str(run.predictions), save_path=str(run.model),
        quarantine_path=str(directory / "quarantine.jsonl"))
    run.summary = run_learn(job, wall=lambda: 1_700_000_000.0)
    score_sources(str(run.model), [str(holdout)], None, str(run.scored), None)
    return run


# --------------------------------------------------------------------------------------
# An evaluator of rules written for the tests, apart from sapwood: plain Python over the
# feature/operator/value triples of the snapshot JSON, and the CSV text as read by the
# standard library (csv module, float()).
# --------------------------------------------------------------------------------------

MISSING_TEXT = {"", "NA", "NaN", "nan", "null", "None", "N/A", "n/a", "NULL"}


def condition_holds(condition: dict, raw: str | None) -> bool:
    """One JSON condition on one raw CSV value."""
    if raw is None or raw in MISSING_TEXT:
        return bool(condition["missing"])
    op, value = condition["op"], condition["value"]
    if op == "<=":
        return float(raw) <= value
    if op == ">":
        return float(raw) > value
    label = raw
    try:  # sapwood prints integer-valued labels without a decimal point
        number = float(raw)
        if number.is_integer():
            label = str(int(number))
    except ValueError:
        pass
    if op == "in":
        return label in value
    if op == "not in":
        return label not in value
    raise AssertionError(f"unknown operator {op!r}")


def rules_that_hold(rules: list[dict], record: dict) -> list[dict]:
    """Every JSON rule whose conditions all hold for ``record`` (raw text values)."""
    return [r for r in rules
            if all(condition_holds(c, record.get(c["feature"])) for c in r["conditions"])]


_RUNS: dict[str, Run] = {}


def shared_run(leaf_model: str = "majority") -> Run:
    """One run per leaf model per test session, shared by the operator-view test modules
    (learning is deterministic, so sharing changes no result). Removed at exit."""
    if leaf_model not in _RUNS:
        import atexit
        import shutil
        import tempfile

        directory = Path(tempfile.mkdtemp(prefix=f"sapwood-views-{leaf_model}-"))
        atexit.register(shutil.rmtree, directory, True)
        _RUNS[leaf_model] = learn_run(directory, leaf_model)
    return _RUNS[leaf_model]


def read_csv_rows(path: Path) -> list[dict]:
    """A CSV file as dicts of raw text (standard library only)."""
    import csv

    with open(path, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))
