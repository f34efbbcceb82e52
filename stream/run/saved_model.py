"""A saved learner: the tree, the encoder, the schema and the metrics in one model file.

The container is :mod:`stream.run.model_file` (versioned, checksummed, never pickle). The
encoder's code books travel with the tree, so a scorer encodes new records exactly as
the learner did. Either task (class or numeric target) is saved the same way.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from stream.classify.model import TreeClassifier
from stream.errors import ModelFileError
from stream.regress.model import TreeRegressor

from .encoding import Encoder
from .metrics import ClassificationScore, RegressionScore
from .model_file import read_model_file, write_model_file
from .schema import Schema
from .tasks import ClassificationTask, RegressionTask

MODEL_KIND = "sapwood-model"
_SCORE_PREFIX = "score."
LEARNERS = {"classification": (TreeClassifier, ClassificationScore, ClassificationTask),
             "regression": (TreeRegressor, RegressionScore, RegressionTask)}
"""Task name -> (learner, prequential score, task) classes, for files that hold a learner."""


@dataclasses.dataclass
class SavedModel:
    """Everything a model file holds."""

    schema: Schema
    encoder: Encoder
    task: ClassificationTask | RegressionTask
    facts: dict

    @property
    def model(self):
        return self.task.model

    @property
    def score(self):
        return self.task.score


def save_model(path: str, schema: Schema, encoder: Encoder, task, facts: dict) -> None:
    """Write a model file atomically; ``facts`` are JSON-able extras (record counts...)."""
    tree_meta, arrays = task.model.state()
    score_meta = {}
    for key, value in task.score.state_dict().items():
        if isinstance(value, np.ndarray):
            arrays[_SCORE_PREFIX + key] = value
        else:
            score_meta[key] = value
    write_model_file(path, MODEL_KIND, {
        "task": task.name, "tree": tree_meta, "schema": schema.to_dict(),
        "encoder": encoder.state_dict(), "score": score_meta, "facts": facts,
    }, arrays)


def load_model(path: str) -> SavedModel:
    """Read a model file written by :func:`save_model`."""
    meta, arrays = read_model_file(path, expect_kind=MODEL_KIND)
    try:
        schema = Schema.from_dict(meta["schema"])
        learner, scorer, task = LEARNERS[meta.get("task", "classification")]
        encoder = Encoder.from_state(schema, meta["encoder"])
        tree_arrays = {k: v for k, v in arrays.items() if not k.startswith(_SCORE_PREFIX)}
        model = learner.from_state(meta["tree"], tree_arrays)
        score_state = dict(meta["score"])
        score_state.update({k[len(_SCORE_PREFIX):]: v for k, v in arrays.items()
                            if k.startswith(_SCORE_PREFIX)})
        score = scorer.from_state(score_state)
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{path!r} is not a usable sapwood model: {exc}") from exc
    return SavedModel(schema, encoder, task(model, score), dict(meta.get("facts", {})))
