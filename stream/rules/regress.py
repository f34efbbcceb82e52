"""What a regression rule says at its leaf: a value with spread, or a short linear formula.

Contents
--------
Consequent
    Plain data for one leaf: the model it predicts with now, target mean, spread
    (sample standard deviation) and record count, coverage, the linear formula in the
    inputs' own units (strongest terms first), and its recent error.
linear_formula(model, node) -> (intercept, [(feature, coefficient), ...])
    The whole linear model of a node in original units, terms in feature order.
leaf_consequent(model, leaf, max_terms=3) -> Consequent
leaf_consequents(model, max_terms=3) -> dict[leaf id, Consequent]
    Leaves of the main tree (alternate subtrees growing beside it are not rules yet).
format_consequent(target, consequent, digits=3) -> str
    ``minutes_to_excursion = 42 +- 7.5`` or ``... = 12.3 + 0.8 * ambient_c - 1.2 * amps``.
extract_regression_rules(model, categories) -> list[Rule]
    One rule per leaf: the path's conditions (:func:`stream.tree.paths.node_conditions`)
    and the consequent in ``estimate``.

The linear leaves work on standardised inputs (:mod:`stream.regress.kernel`):
y = mean_y + sd_y (b + sum_j w_j (x_j - mean_j) / sd_j) with tree-wide running means and
deviations. In original units the coefficient of x_j is c_j = sd_y w_j / sd_j. The short
formula keeps the ``max_terms`` inputs that move the prediction most inside the leaf
(|c_j| times x_j's standard deviation among the leaf's records) and holds the others at
their mean among the leaf's records, which is what the model does with a missing input;
``omitted`` counts them (inputs with no effect are not counted). Categorical inputs
never enter the linear model.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from stream.regress.tables import (ABS_ERROR, CREATED, DEPTH, ERR_LINEAR, ERR_MEAN, FM_KIND,
                                   KIND, LEAF, SC_MEAN, SC_SD, SCORED, SLOT, SQ_ERROR, Y_M2,
                                   Y_MEAN, Y_N)
from stream.tree.paths import drift_state, node_conditions

from .rule import Rule, rule_id, sort_rules


@dataclasses.dataclass(frozen=True)
class Consequent:
    """What one leaf predicts and the evidence behind it.

    ``model`` is ``"mean"`` or ``"linear"``: the predictor the leaf uses now (for the
    adaptive leaf model, whichever currently has the lower faded squared error).
    ``intercept`` and ``terms`` give the short linear formula (present for every leaf
    of a tree with linear or adaptive leaves; ``None`` / empty for mean leaves).
    ``mae`` and ``rmse`` are over the records the leaf scored since it was created.
    """

    model: str
    mean: float | None
    spread: float | None
    records: float
    coverage: float
    intercept: float | None
    terms: tuple[tuple[str, float], ...]
    omitted: int
    scored: int
    mae: float | None
    rmse: float | None
    active: bool

    def to_dict(self) -> dict:
        return {"model": self.model, "mean": _round(self.mean), "spread": _round(self.spread),
                "records": _round(self.records, 3), "coverage": _round(self.coverage),
                "intercept": _round(self.intercept),
                "terms": [{"feature": f, "coefficient": _round(c)} for f, c in self.terms],
                "omitted_terms": self.omitted, "scored": self.scored,
                "mae": _round(self.mae), "rmse": _round(self.rmse), "active": self.active}


def _round(value: float | None, digits: int = 6) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), digits)


def _numeric_names(model) -> list[str]:
    fmap = model.tables_.fmap
    return [name for name, row in zip(model.feature_names, fmap) if row[FM_KIND] == 0]


def _coefficients(model, node: int) -> tuple[float, np.ndarray, np.ndarray]:
    """(standardised intercept, standardised weights, coefficients in original units)."""
    t = model.tables_
    p = t.lin.shape[1] - 1
    w = t.lin[node, :p].astype(np.float64)
    sd_x = t.scale[:p, SC_SD]
    sd_y = t.scale[p, SC_SD]
    # an input whose spread is still undefined is standardised to 0: no effect
    coef = np.where(sd_x > 0, sd_y * w / np.where(sd_x > 0, sd_x, 1.0), 0.0)
    return float(t.lin[node, p]), w, coef


def linear_formula(model, node: int) -> tuple[float, list[tuple[str, float]]]:
    """The linear model of ``node`` in original units: intercept and one coefficient per
    numeric feature (in feature order)."""
    t = model.tables_
    p = t.lin.shape[1] - 1
    b, _, coef = _coefficients(model, node)
    intercept = t.scale[p, SC_MEAN] + t.scale[p, SC_SD] * b - float(coef @ t.scale[:p, SC_MEAN])
    return float(intercept), list(zip(_numeric_names(model), coef.tolist()))


def _short_formula(model, node: int, max_terms: int):
    t = model.tables_
    p = t.lin.shape[1] - 1
    b, _, coef = _coefficients(model, node)
    stats = t.lin_x[node]
    seen = stats[:, 0] > 0
    # an input's value inside the leaf: its mean there (the tree-wide mean if unseen)
    centre = np.where(seen, stats[:, 1], t.scale[:p, SC_MEAN])
    # its strength inside the leaf: the change one leaf standard deviation makes
    leaf_sd = np.sqrt(np.where(stats[:, 0] > 1, stats[:, 2] / np.maximum(stats[:, 0] - 1, 1),
                               -1.0).clip(min=0.0))
    spread = np.where(stats[:, 0] > 1, leaf_sd, t.scale[:p, SC_SD])
    strength = np.abs(coef) * spread
    # strongest first; equal strengths in feature order (a stable sort)
    order = [int(j) for j in np.argsort(-strength, kind="mergesort") if strength[j] > 0.0]
    kept = set(order[:max_terms])
    names = _numeric_names(model)
    intercept = t.scale[p, SC_MEAN] + t.scale[p, SC_SD] * b
    for j in range(p):
        if j in kept:
            intercept -= float(coef[j] * t.scale[j, SC_MEAN])
        else:
            intercept += float(coef[j] * (centre[j] - t.scale[j, SC_MEAN]))
    terms = tuple((names[j], float(coef[j])) for j in order[:max_terms])
    # omitted terms worth mentioning: those moving the prediction at least 0.1 % as much
    # as the strongest one does (the rest are rounding noise of the online fit)
    floor = 1e-3 * strength.max() if strength.size else 0.0
    omitted = sum(1 for j in order[max_terms:] if strength[j] >= floor)
    return float(intercept), terms, omitted


def _main_leaves(model) -> list[int]:
    t = model.tables_
    return [int(n) for n in model.main_nodes() if t.node_i[n, KIND] == LEAF]


def _leaf_total(model) -> float:
    t = model.tables_
    return float(sum(t.node_f[n, Y_N] for n in _main_leaves(model)))


def leaf_consequent(model, leaf: int, max_terms: int = 3, total: float | None = None
                    ) -> Consequent:
    """The :class:`Consequent` of leaf node ``leaf`` of a
    :class:`stream.regress.TreeRegressor`; ``total`` (records at all leaves) is
    computed when not given."""
    t = model.tables_
    f = t.node_f[leaf]
    if t.node_i[leaf, KIND] != LEAF:
        raise ValueError(f"node {leaf} is a branch, not a leaf")
    total = _leaf_total(model) if total is None else total
    n = float(f[Y_N])
    leaf_model = model.settings.leaf_model
    uses_linear = leaf_model == "linear" or (leaf_model == "adaptive"
                                             and not f[ERR_MEAN] < f[ERR_LINEAR])
    intercept, terms, omitted = None, (), 0
    if leaf_model != "mean":
        intercept, terms, omitted = _short_formula(model, leaf, max_terms)
    scored = int(f[SCORED])
    return Consequent(
        model="linear" if uses_linear else "mean",
        mean=float(f[Y_MEAN]) if n > 0 else None,
        spread=math.sqrt(f[Y_M2] / (n - 1.0)) if n > 1 else None,
        records=n, coverage=n / total if total > 0 else 0.0,
        intercept=intercept, terms=terms, omitted=omitted, scored=scored,
        mae=float(f[ABS_ERROR]) / scored if scored else None,
        rmse=math.sqrt(f[SQ_ERROR] / scored) if scored else None,
        active=bool(t.node_i[leaf, SLOT] >= 0))


def leaf_consequents(model, max_terms: int = 3) -> dict[int, Consequent]:
    """:func:`leaf_consequent` of every leaf of the main tree, by node id (ascending)."""
    total = _leaf_total(model)
    return {n: leaf_consequent(model, n, max_terms, total)
            for n in sorted(_main_leaves(model))}


def format_value(value: float, digits: int = 3) -> str:
    """``value`` with about ``digits`` significant digits, never in exponent form, trailing
    zeros cut: 42.0 -> "42", 7.5 -> "7.5", 0.012345 -> "0.0123", 12345.6 -> "12346"."""
    if value == 0 or not math.isfinite(value):
        return "0" if value == 0 else str(value)
    decimals = max(0, min(8, digits - 1 - math.floor(math.log10(abs(value)))))
    text = f"{value:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def format_estimate(c: Consequent, digits: int = 3) -> str:
    """What the leaf predicts, as text: ``42 +- 7.5`` (the mean with its spread) or the
    short linear formula ``12.3 + 0.8 * ambient_c - 1.2 * compressor_amps``."""
    if c.mean is None:
        return "(no records yet)"
    if c.model == "mean" or c.intercept is None:
        spread = format_value(c.spread, digits) if c.spread is not None else "?"
        return f"{format_value(c.mean, digits)} +- {spread}"
    text = format_value(c.intercept, digits)
    for name, coef in c.terms:
        sign = "-" if coef < 0 else "+"
        text += f" {sign} {format_value(abs(coef), digits)} * {name}"
    if c.omitted:
        text += f" (+{c.omitted} smaller term{'s' if c.omitted != 1 else ''} at their means)"
    return text


def format_consequent(target: str, c: Consequent, digits: int = 3) -> str:
    """The consequent as text: ``target = 42 +- 7.5`` or ``target = 12.3 + 0.8 * x``."""
    if c.mean is None:
        return "(no records yet)"
    return f"{target} = {format_estimate(c, digits)}"


def extract_regression_rules(model, categories: dict[str, list[str]] | None = None
                             ) -> list[Rule]:
    """One :class:`Rule` per leaf of the main tree, its consequent in ``estimate``, in the
    display order of :func:`stream.rules.rule.sort_rules`."""
    node_i = model.tables_.node_i
    out = []
    for leaf, c in leaf_consequents(model).items():
        drift, replaced_at = drift_state(node_i, leaf, model.root)
        out.append(Rule(
            id=rule_id(leaf), conditions=node_conditions(model, leaf, categories),
            predict=None, confidence=0.0, coverage=c.coverage, records=c.records,
            class_counts={}, scored=c.scored, hits=0,
            depth=int(node_i[leaf, DEPTH]), created_at=int(node_i[leaf, CREATED]),
            leaf_model=c.model, active=c.active, drift=drift, replaced_at=replaced_at,
            estimate={**c.to_dict(), "shown": format_estimate(c)}))
    return sort_rules(out)
