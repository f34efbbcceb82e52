"""Rules of a classification tree: one per leaf of a :class:`stream.classify.TreeClassifier`.

The rules partition the input space: every record, missing values included, satisfies
the conditions of exactly one rule, the one whose leaf scores it.
"""

from __future__ import annotations

from stream.classify.tables import (CREATED, DEPTH, HITS, KIND, LEAF, MC_CORRECT,
                                    NB_CORRECT, SCORED, SLOT)
from stream.tree.paths import drift_state, merge_conditions, path_steps

from .rule import Rule, rule_id, sort_rules

LEAF_MODEL_NAMES = {0: "majority", 1: "naive_bayes", 2: "adaptive"}


def extract_rules(model, categories: dict[str, list[str]] | None = None) -> list[Rule]:
    """One :class:`Rule` per leaf, sorted by predicted class, then coverage (largest
    first), then id."""
    categories = categories or {}
    t = model.tables_
    node_i, node_f = t.node_i, t.node_f
    classes = model.classes_
    leaves = [int(n) for n in model.main_nodes() if node_i[n, KIND] == LEAF]
    totals = {n: float(t.counts[n, :len(classes)].sum()) for n in leaves}
    grand = sum(totals.values())
    leaf_model = model.settings.leaf_model
    rules = []
    for n in leaves:
        counts = t.counts[n, :len(classes)]
        total = totals[n]
        if total > 0:
            # ties broken by label order, as the kernels do
            top = min(range(len(classes)), key=lambda k: (-counts[k], classes[k]))
            predict, confidence = classes[top], float(counts[top] / total)
        else:
            predict, confidence = None, 0.0
        active = bool(node_i[n, SLOT] >= 0)
        model_name = "majority"
        if active and leaf_model == "naive_bayes":
            model_name = "naive_bayes"
        elif active and leaf_model == "adaptive" and \
                node_f[n, NB_CORRECT] >= node_f[n, MC_CORRECT] and total > 0:
            model_name = "naive_bayes"
        drift, replaced_at = drift_state(node_i, n, model.root)
        rules.append(Rule(
            id=rule_id(n),
            conditions=merge_conditions(path_steps(model, n, categories), model.feature_names),
            predict=predict, confidence=confidence,
            coverage=total / grand if grand > 0 else 0.0, records=total,
            class_counts={classes[k]: float(counts[k]) for k in range(len(classes))},
            scored=int(node_f[n, SCORED]), hits=int(node_f[n, HITS]),
            depth=int(node_i[n, DEPTH]), created_at=int(node_i[n, CREATED]),
            leaf_model=model_name, active=active, drift=drift, replaced_at=replaced_at))
    return sort_rules(rules)


# ---------------------------------------------------------------- JSON form


# ---------------------------------------------------------------- text form


