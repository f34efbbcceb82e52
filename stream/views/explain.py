"""Which rule fired for a record, and the path through the tree that led there.

Inside: :func:`explain_batch` (a saved model and a batch of raw records ->
:class:`Explanation` per record), :func:`match_rules` and :class:`RuleMatcher` (the
rules of a snapshot whose conditions a raw record satisfies, for when only a snapshot
is at hand),
:func:`record_batches` (records given on the command line as a JSON object or a CSV
line, or files of them) and the renderers :func:`render_explanation` and
:meth:`Explanation.to_dict`.

With a model the answer is the tree's own: the record is routed by the same compiled
code that scores it (:meth:`stream.classify.TreeClassifier.predict`), and the rule
is the one read off the leaf it reaches. The path lists every test on the way, with the
record's value and whether the record went that way because the value was missing (or
a category the split had no branch for), in which case it follows the busiest branch.
Per-record predictions for whole files, with the rule id in a ``rule`` column, come
from ``sapwood score`` and ``sapwood learn --predictions``.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
from typing import Iterator, Sequence

import numpy as np

from connectors.base import RawBatch, Reject
from connectors.sources import open_sources
from stream.errors import ConfigError, InputError
from stream.rules.concern import precision
from stream.rules.classify import extract_rules
from stream.rules.regions import region_of
from stream.rules.rule import Rule, rule_id
from stream.rules.text import NEW_VALUE_MARK, format_condition
from stream.run.saved_model import SavedModel
from stream.run.values import MISSING_MARKERS, parse_numbers
from stream.tree.paths import Condition, path_steps


@dataclasses.dataclass(frozen=True)
class Step:
    """One test on the way to the leaf: its text, the record's value, and whether the
    record took this branch because the value was missing or had no branch."""

    feature: str
    test: str
    value: str
    by_default: bool

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


@dataclasses.dataclass
class Explanation:
    """The rule that scored one record, the prediction and the path."""

    origin: str
    line: int
    rule: Rule
    predicted: str | None
    confidence: float
    path: list[Step]

    def to_dict(self) -> dict:
        return {"origin": self.origin, "line": self.line, "rule": self.rule.id,
                "predicted": self.predicted, "confidence": round(float(self.confidence), 6),
                "leaf_model": self.rule.leaf_model,
                "leaf": {"predict": self.rule.predict,
                         "confidence": round(self.rule.confidence, 6),
                         "coverage": round(self.rule.coverage, 6),
                         "records": self.rule.records,
                         "class_counts": self.rule.class_counts},
                "conditions": [c.to_dict() for c in self.rule.conditions],
                "path": [s.to_dict() for s in self.path]}


# --------------------------------------------------------------------------- with a model


def explain_batch(saved: SavedModel, batch: RawBatch) -> tuple[list[Explanation], list[Reject]]:
    """Explain every record of ``batch``; records that cannot be read come back as rejects.

    The saved model is not changed (scoring never learns); a category the model has
    never seen is shown as read.
    """
    model, encoder = saved.model, saved.encoder
    known = {name: list(labels) for name, labels in encoder.categories.items()}
    encoded = encoder.encode(batch, scoring=True)
    # codes the encoder handed out just now stand for labels the tree never saw
    categories = encoder.categories
    rules = {r.id: r for r in extract_rules(model, known)}
    if not len(encoded):
        return [], encoded.rejects
    scored = model.predict(encoded.X)
    classes = model.classes_
    out = []
    for i in range(len(encoded)):
        leaf = int(scored.leaf[i])
        pred = int(scored.pred[i])
        out.append(Explanation(
            origin=encoded.origin, line=int(encoded.lines[i]), rule=rules[rule_id(leaf)],
            predicted=classes[pred] if pred >= 0 else None,
            confidence=float(scored.confidence[i]),
            path=_path(model, leaf, encoded.X[i], known, categories)))
    return out, encoded.rejects


def _path(model, leaf: int, x: np.ndarray, known: dict[str, list[str]],
          seen: dict[str, list[str]]) -> list[Step]:
    steps = []
    for f, op, value, missing, branch in path_steps(model, leaf, known):
        name = model.feature_names[f]
        v = x[f]
        labels = seen.get(name)
        if isinstance(value, set):
            value = tuple(sorted(value))
        condition = Condition(name, op, value, False, tuple(sorted(branch or ())))
        test = format_condition([condition]).removesuffix(" " + NEW_VALUE_MARK)
        if math.isnan(v):
            shown, by_default = "missing", True
        elif labels is not None:
            shown = labels[int(v)] if int(v) < len(labels) else f"#{int(v)}"
            by_default = op == "not in" and bool(branch) and shown not in branch
        else:
            shown, by_default = _number(v), False
        steps.append(Step(name, test, shown, by_default))
    return steps


def _number(v: float) -> str:
    return str(int(v)) if float(v).is_integer() and abs(v) < 1e15 else repr(float(v))


# --------------------------------------------------------------------------- with rules only


class RuleMatcher:
    """Check raw records against a fixed list of rules (regions are worked out once)."""

    def __init__(self, rules: Sequence[Rule]) -> None:
        self.rules = list(rules)
        self._regions = [region_of(r.conditions) for r in self.rules]

    def match(self, record: dict) -> list[Rule]:
        """The rules whose conditions ``record`` satisfies; see :func:`match_rules`."""
        values: dict[str, object] = {}
        found = []
        for rule, region in zip(self.rules, self._regions):
            ok = True
            for feature, span in region.items():
                if feature not in values:
                    values[feature] = _read(record, feature, span.kind)
                v = values[feature]
                if v is None:
                    ok = span.missing
                elif span.kind == "num":
                    ok = (span.lo is None or v > span.lo) and (span.hi is None or v <= span.hi)
                else:
                    ok = (v in span.labels) == (span.op == "in")
                if not ok:
                    break
            if ok:
                found.append(rule)
        return found


def match_rules(rules: Sequence[Rule], record: dict) -> list[Rule]:
    """The rules whose conditions ``record`` satisfies (one, for the rules of one tree).

    ``record`` maps feature names to raw values (text or numbers); a feature that is
    absent, empty or a missing marker (NA, NaN, null, ...) is missing. A numeric test on
    a value that is not a number raises ConfigError naming the field and value. For
    many records, make one :class:`RuleMatcher` and call its ``match``.
    """
    return RuleMatcher(rules).match(record)


def _read(record: dict, feature: str, kind: str):
    raw = record.get(feature)
    if raw is None or (isinstance(raw, float) and math.isnan(raw)) or \
            (isinstance(raw, str) and raw in MISSING_MARKERS):
        return None
    if kind == "cat":
        if isinstance(raw, bool):
            return str(raw)
        if isinstance(raw, (int, float)):
            return _number(float(raw))
        return str(raw)
    if isinstance(raw, (int, float)) and not isinstance(raw, bool):
        return float(raw)
    numbers, bad = parse_numbers(np.array([raw], dtype=object))
    if bad[0]:
        raise ConfigError(f"field {feature!r}: {str(raw)!r} is not a number")
    return float(numbers[0])


# --------------------------------------------------------------------------- input


def record_batches(texts: Sequence[str], field_names: Sequence[str]) -> Iterator[RawBatch]:
    """One batch per record given as text: a JSON object, or a CSV line whose fields
    come in ``field_names`` order. Batches are labelled ``record 1``, ``record 2``, ..."""
    for k, text in enumerate(texts, 1):
        origin = f"record {k}"
        stripped = text.strip()
        if stripped.startswith("{"):
            try:
                json.loads(stripped)
            except ValueError as exc:
                raise InputError(f"{origin}: not a JSON object ({exc})") from None
            data, fmt = (stripped + "\n").encode("utf-8"), "jsonl"
        else:
            fields = next(csv.reader([stripped]), [])
            if len(fields) != len(field_names):
                raise InputError(
                    f"{origin}: a CSV record needs {len(field_names)} fields in the order "
                    f"{', '.join(field_names)}; got {len(fields)}")
            header = io.StringIO()
            csv.writer(header, lineterminator="\n").writerow(field_names)
            data, fmt = (header.getvalue() + stripped + "\n").encode("utf-8"), "csv"
        source = open_sources(["-"], fmt, stdin=io.BytesIO(data))
        try:
            for batch in source.batches():
                yield dataclasses.replace(
                    batch, origin=origin, lines=np.full(len(batch), 1, np.int64),
                    rejects=[dataclasses.replace(r, origin=origin, line=1)
                             for r in batch.rejects])
        finally:
            source.close()


def file_batches(paths: Sequence[str], fmt: str | None) -> Iterator[RawBatch]:
    """Batches of records from files (or ``-`` for standard input)."""
    source = open_sources(list(paths), fmt)
    try:
        yield from source.batches()
    finally:
        source.close()


# --------------------------------------------------------------------------- text


def _pct(value: float) -> str:
    return f"{100 * value:.1f}%"


def render_explanation(item: Explanation, target: str, concern: str | None = None) -> str:
    """An explanation as text for people; with a class of concern, the share of the
    leaf's records in that class comes second."""
    rule = item.rule
    where = item.origin if item.origin.startswith("record ") else \
        f"{item.origin} line {item.line}"
    predicted = "nothing (no records learned yet)" if item.predicted is None else \
        f"{target} = {item.predicted}"
    lines = [f"{where}: {predicted}, confidence {_pct(item.confidence)}, by rule {rule.id}"]
    if concern is not None and rule.estimate is None:
        lines.append(f"  class of concern {concern}: {_pct(precision(rule, concern))} of the "
                     f"rule's records" + (" (the rule predicts it)"
                                          if rule.predict == concern else ""))
    if rule.leaf_model == "naive_bayes":
        lines.append("  (naive Bayes weighs the record's values within the rule; the "
                     "rule's majority is " + str(rule.predict) + ")")
    groups: dict[str, list[Condition]] = {}
    for c in rule.conditions:
        groups.setdefault(c.feature, []).append(c)
    pad = " " * (len(rule.id) + 4)
    if not groups:
        lines.append(f"  {rule.id}  ALWAYS (the tree is a single leaf)")
    for i, group in enumerate(groups.values()):
        lead = f"  {rule.id}  IF   " if i == 0 else f"{pad}AND  "
        lines.append(lead + format_condition(group))
    outcome = "(no records yet)" if rule.predict is None else f"{target} = {rule.predict}"
    lines.append(f"{pad}THEN {outcome}")
    counts = " / ".join(f"{label} {value:,.0f}" for label, value in rule.class_counts.items())
    lines.append(f"{pad}     leaf holds {rule.records:,.0f} records ({counts}); "
                 f"confidence {_pct(rule.confidence)}, coverage {_pct(rule.coverage)}")
    if item.path:
        lines.append("  path from the root:")
        width = max(len(s.test) for s in item.path)
        for k, step in enumerate(item.path, 1):
            note = "  -> busiest branch" if step.by_default else ""
            lines.append(f"    {k:>2}. {step.test:<{width}}   value {step.value}{note}")
    return "\n".join(lines) + "\n"


def render_match(origin: str, matches: list[Rule], target: str) -> str:
    """What :func:`match_rules` found, as text (no path: that needs the model)."""
    if not matches:
        return f"{origin}: no rule's conditions hold (are these rules of one tree?)\n"
    lines = []
    for rule in matches:
        outcome = "(no records yet)" if rule.predict is None else f"{target} = {rule.predict}"
        lines.append(f"{origin}: rule {rule.id}: {outcome}, confidence "
                     f"{_pct(rule.confidence)}, coverage {_pct(rule.coverage)}, "
                     f"{rule.records:,.0f} records")
        for group in _groups(rule.conditions):
            lines.append(f"    {format_condition(group)}")
    if len(matches) > 1:
        lines.append(f"{origin}: {len(matches)} rules hold; the rules of one tree never "
                     f"overlap, so these come from different trees")
    return "\n".join(lines) + "\n"


def _groups(conditions: Sequence[Condition]) -> list[list[Condition]]:
    groups: dict[str, list[Condition]] = {}
    for c in conditions:
        groups.setdefault(c.feature, []).append(c)
    return list(groups.values())
