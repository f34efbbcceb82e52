"""What differs between predicting a class and predicting a number, behind one face.

A task holds the learner and its prequential score and knows how to turn its output into
prediction columns, rules, summary figures and a saved state. The engine, the scorer
and the rule readers work with either task through this interface:

learn(X, y, encoder) -> Scored-like    score each record, then learn it
predict(X) -> Scored-like              score without learning
update_score(y, scored, encoder, concern) -> metric log rows for this stretch
prediction_columns(scored, encoder) -> {column: array} for the predictions sink
rules(categories) -> list[Rule]        the tree as rules
result(encoder) -> dict                summary figures (accuracy/kappa... or mae/rmse/r2)
headline(result) -> dict               the few figures a snapshot index shows
take_events() -> list[DriftEvent]      drift events since the last call
state() / from_state()                 what a model file holds (no pickle)
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stream.classify.model import TreeClassifier
from stream.classify.settings import CRITERIA, LEAF_MODELS, TreeSettings
from stream.errors import ConfigError
from stream.regress.model import TreeRegressor
from stream.regress.settings import (
    REGRESSION_CRITERIA,
    REGRESSION_LEAF_MODELS,
    RegressionSettings,
)
from stream.rules.classify import extract_rules
from stream.rules.regress import extract_regression_rules
from stream.rules.rule import Rule, rule_ids

from .metrics import CONCERN_AFTER, ClassificationScore, RegressionScore

CONCERN_FIGURES = ("concern_precision", "concern_recall", "concern_f1",
                   "window_concern_precision", "window_concern_recall", "window_concern_f1")
"""The class of concern's figures in the summary (cumulative, then over the window)."""

# options shared by both tasks: CLI name -> settings field
_SHARED = {"grace_period": "grace_period", "delta": "delta", "tie_threshold": "tie_threshold",
           "max_depth": "max_depth", "memory_mb": "memory_mb", "detector": "detector",
           "adwin_delta": "adwin_delta", "page_hinkley_threshold": "page_hinkley_threshold",
           "swap_after": "swap_after", "swap_significance": "swap_significance"}


def classifier_settings(options: dict[str, Any]) -> TreeSettings:
    """TreeSettings from the options a user gave (missing ones keep their defaults)."""
    fields = {k: v for k, v in options.items() if v is not None}
    for name, registry in (("criterion", CRITERIA), ("leaf_model", LEAF_MODELS)):
        if name in fields and fields[name] not in registry:
            raise ConfigError(f"{name.replace('_', ' ')} for a class target must be one of "
                              f"{', '.join(sorted(registry))}, got {fields[name]!r}")
    return TreeSettings.from_dict(fields)


def regressor_settings(options: dict[str, Any]) -> RegressionSettings:
    """RegressionSettings from the options a user gave; class-only options are refused
    when set, so a typo does not pass silently."""
    fields = {k: v for k, v in options.items() if v is not None}
    out = {_SHARED[k]: v for k, v in fields.items() if k in _SHARED}
    if "criterion" in fields:
        if fields["criterion"] not in REGRESSION_CRITERIA:
            raise ConfigError("criterion for a numeric target must be one of "
                              f"{', '.join(sorted(REGRESSION_CRITERIA))}, got "
                              f"{fields['criterion']!r}")
        out["criterion"] = fields["criterion"]
    if "leaf_model" in fields:
        if fields["leaf_model"] not in REGRESSION_LEAF_MODELS:
            raise ConfigError("leaf model for a numeric target must be one of "
                              f"{', '.join(sorted(REGRESSION_LEAF_MODELS))}, got "
                              f"{fields['leaf_model']!r}")
        out["leaf_model"] = fields["leaf_model"]
    if "histogram_bins" in fields:
        out["bins"] = fields["histogram_bins"]
    return RegressionSettings.from_dict(out)


class ClassificationTask:
    """A Hoeffding tree classifier with its prequential classification score."""

    name = "classification"

    def __init__(self, model: TreeClassifier, score: ClassificationScore) -> None:
        self.model = model
        self.score = score

    @classmethod
    def create(cls, schema, options: dict, window: int, fading: float,
               log_every: int, concern: str | None = None) -> "ClassificationTask":
        """``concern``: the class of concern the user declared (None: the rarest class
        among the first labels, see :class:`ClassificationScore`)."""
        settings = options if isinstance(options, TreeSettings) else classifier_settings(options)
        concern_after = 0 if concern is not None else CONCERN_AFTER
        return cls(TreeClassifier(schema.feature_names, schema.feature_kinds, settings),
                   ClassificationScore(window, fading, log_every=log_every,
                                       concern_after=concern_after))

    @property
    def records_learned(self) -> int:
        return self.model.records_learned

    @property
    def settings(self):
        return self.model.settings

    def learn(self, X, y, encoder):
        return self.model.learn(X, y, encoder.classes, encoder.categories)

    def predict(self, X):
        return self.model.predict(X)

    def update_score(self, y, scored, encoder, concern: str | None = None) -> list[dict]:
        if concern is not None and self.score.concern < 0:
            code = encoder.class_code(concern)
            if code is not None:
                self.score.declare_concern(code)
        return self.score.update(y, scored.pred, max(len(encoder.classes), 1))

    def prediction_columns(self, scored, encoder) -> dict:
        labels = np.array(list(encoder.classes) + [""], dtype=object)
        return {"predicted": labels[scored.pred], "confidence": np.round(scored.confidence, 6),
                "rule": rule_ids(scored.leaf)}

    def rules(self, categories: dict) -> list[Rule]:
        return extract_rules(self.model, categories)

    def result(self, encoder) -> dict:
        return self.score.result(encoder.classes)

    @staticmethod
    def headline(result: dict) -> dict:
        return {"accuracy": result["accuracy"], "kappa": result["kappa"],
                "window_accuracy": result["window_accuracy"], "concern": result["concern"]}

    def summary_figures(self, result: dict) -> dict:
        return {k: result[k] for k in ("accuracy", "kappa", "kappa_m", "balanced_accuracy",
                                       "window_accuracy", "fading_accuracy", "concern",
                                       *CONCERN_FIGURES, "per_class", "confusion")}

    def take_events(self):
        return self.model.take_events()

    def labelled(self, y) -> np.ndarray:
        return y >= 0

    def correct(self, y, scored) -> int:
        return int((scored.pred == y).sum())


class RegressionTask:
    """A Hoeffding regression tree with its prequential regression score."""

    name = "regression"

    def __init__(self, model: TreeRegressor, score: RegressionScore) -> None:
        self.model = model
        self.score = score

    @classmethod
    def create(cls, schema, options: dict, window: int, fading: float,
               log_every: int, concern: str | None = None) -> "RegressionTask":
        settings = options if isinstance(options, RegressionSettings) \
            else regressor_settings(options)
        return cls(TreeRegressor(schema.feature_names, schema.feature_kinds, settings),
                   RegressionScore(window, fading, log_every=log_every))

    @property
    def records_learned(self) -> int:
        return self.model.records_learned

    @property
    def settings(self):
        return self.model.settings

    def learn(self, X, y, encoder):
        return self.model.learn(X, y, encoder.categories)

    def predict(self, X):
        return self.model.predict(X)

    def update_score(self, y, scored, encoder, concern: str | None = None) -> list[dict]:
        return self.score.update(y, scored.pred)

    def prediction_columns(self, scored, encoder) -> dict:
        return {"predicted": np.round(scored.pred, 6),
                "rule": rule_ids(scored.leaf)}

    def rules(self, categories: dict) -> list[Rule]:
        return extract_regression_rules(self.model, categories)

    def result(self, encoder) -> dict:
        return self.score.result()

    @staticmethod
    def headline(result: dict) -> dict:
        return {"mae": result["mae"], "rmse": result["rmse"], "r2": result["r2"]}

    def summary_figures(self, result: dict) -> dict:
        return {k: v for k, v in result.items() if k != "records"}

    def take_events(self):
        return self.model.take_events()

    def labelled(self, y) -> np.ndarray:
        return np.isfinite(y)

    def correct(self, y, scored) -> float:
        return float(np.abs(scored.pred - y).sum())


TASKS = {"classification": ClassificationTask, "regression": RegressionTask}
"""Task name -> task class."""


_WARM = {"done": False}


def warm_up() -> None:
    """Load (or, the first time, compile) the kernels before any source is opened."""
    if _WARM["done"]:
        return
    from stream.regress.model import warm_up as warm_regressor

    X = np.array([[0.5, 1.0], [0.25, 0.0], [np.nan, 1.0]])
    y = np.array([0, 1, 0], np.int32)
    for splits in ("gaussian", "histogram"):
        for detector in ("adwin", "page_hinkley", "off"):
            model = TreeClassifier(["a", "b"], ["numeric", "category"],
                                   TreeSettings(numeric_splits=splits, grace_period=1,
                                                detector=detector))
            scored = model.learn(X, y, ["p", "q"])
            model.predict(X)
    model._make_room()     # the room checks run only when a learn call fills a table
    ClassificationScore(2, 0.9, log_every=1).update(y, scored.pred, 2)
    RegressionScore(2, 0.9, log_every=1).update(np.ones(3), np.zeros(3))
    from stream.resolution import decimals_of

    from .encoding import _renumbered

    decimals_of(X[:, 0])
    column = X[:, 0].copy()
    decimals_of(column)
    column.flags.writeable = False     # a parsed column is often a read-only view
    decimals_of(column)
    _renumbered(np.array([1, 0, -1], dtype=np.int64), ["p", "q"])
    warm_regressor()
    _WARM["done"] = True
