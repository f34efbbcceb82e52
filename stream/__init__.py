"""sapwood's engine: a streaming Hoeffding tree that scores each record, then learns it.

Public names (loaded on first use, so ``import stream`` stays cheap):

========================================  ===========================================
TreeClassifier, Scored, TreeSettings      the classification tree (``stream.classify``)
TreeRegressor, RegressionSettings         the regression tree (``stream.regress``)
LearnJob, run_learn                       a whole learning run with its outputs
                                          (``stream.run``)
extract_rules, render_text, Rule,         rules read off a tree (``stream.rules``)
Condition
========================================  ===========================================

The wings, each importing only those below it::

    cli      the sapwood command                      (stream.cli)
    views    operator views; bench  the benchmark     (stream.views, stream.bench)
    run      a learning run: schema, encoding, tasks, metrics, checkpoints, snapshots
    rules    rules, their text, diffs and Markdown
    classify / regress   the two trees (model, kernel, tables, splits, criteria, settings)
    tree     what both trees share (node layout and kernel, drift detectors, paths)
    errors, checks, jit, lazy, child_env    the ground floor

``connectors`` (record sources and sinks) stands beside ``run``, below it, and imports
nothing of the learner.
"""

from __future__ import annotations

from .lazy import lazy_face

__getattr__, __all__ = lazy_face(__name__, {
    "TreeClassifier": "classify.model", "Scored": "classify.model",
    "TreeSettings": "classify.settings",
    "TreeRegressor": "regress.model", "RegressionSettings": "regress.settings",
    "LearnJob": "run.job", "run_learn": "run.engine",
    "extract_rules": "rules.classify", "render_text": "rules.text", "Rule": "rules.rule",
    "Condition": "tree.paths",
})
