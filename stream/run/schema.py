"""What each field of a record is: the schema, its file format and its inference.

Inside: the field kinds (``KINDS``), :class:`Field`, :class:`Schema`, the JSON file format
(:func:`load_schema`, :func:`save_schema`) and :func:`infer_schema`, which guesses a schema
from the first records of a stream.

The file format is sapwood's own::

    {"target": "fault", "task": "classification",
     "fields": [{"name": "supply_temp", "kind": "numeric"}, ...]}

Inference rules (applied to a prefix of the stream, in file order)
------------------------------------------------------------------
* id: named ``id``, ``uuid`` or ``*_id``. A field
  that names the unit reporting (``pump_id``, ``container_id``) identifies records, it is
  not a condition: as a category it would invite one branch per unit. Declare it
  ``category`` (``--kind pump_id=category``) when the unit itself matters.
* time: named ``time``, ``timestamp``, ``ts``, ``datetime`` or ``date`` with values that
  read as times (numbers or ISO-8601 text), or any field whose text values are all
  ISO-8601 times.
* Only the first id-like and the first time-like field take those kinds; later ones
  become ``ignore`` (as categories they would hold one value per record).
* numeric: every present value reads as a number; otherwise category. A field with no
  value at all in the prefix is numeric.
* task: classification when the target has text, boolean-like or integer values with at
  most 20 distinct in the prefix; regression otherwise.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import tempfile
from typing import Any

import numpy as np
import pandas as pd

from stream.errors import ConfigError, SchemaError

from .values import missing_mask, parse_numbers, parse_times

KINDS = ("numeric", "category", "target", "id", "time", "ignore")
"""Field kinds. ``numeric`` and ``category`` fields are the features."""

FEATURE_KINDS = ("numeric", "category")
TASKS = ("classification", "regression")

MAX_CLASSES_FOR_INTEGERS = 20
"""An integer-valued target with at most this many distinct values is a class label."""

_ID_NAMES = ("id", "uuid")
_TIME_NAMES = ("time", "timestamp", "ts", "datetime", "date")
_BOOLEAN_TEXT = frozenset({"true", "false", "yes", "no"})
_ISO_8601 = re.compile(
    r"\d{4}-\d{2}-\d{2}"                                # date
    r"(?:[T ]\d{2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?"       # time of day
    r"(?:Z|[+-]\d{2}(?::?\d{2})?)?)?")                  # offset


@dataclasses.dataclass(frozen=True)
class Field:
    """One named field and its kind (one of ``KINDS``)."""

    name: str
    kind: str

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise SchemaError(f"field name must be non-empty text, got {self.name!r}")
        if self.kind not in KINDS:
            raise SchemaError(f"kind of field {self.name!r} must be one of "
                              f"{', '.join(KINDS)}, got {self.kind!r}")


@dataclasses.dataclass(frozen=True)
class Schema:
    """The fields of a stream in file order, which one is the target, and the task.

    Parameters
    ----------
    fields
        Every field, the target included (its kind is ``target``).
    target
        Name of the target field.
    task
        ``classification`` or ``regression``.
    """

    fields: tuple[Field, ...]
    target: str
    task: str

    def __post_init__(self) -> None:
        object.__setattr__(self, "fields", tuple(self.fields))
        names = [f.name for f in self.fields]
        seen: set[str] = set()
        for name in names:
            if name in seen:
                raise SchemaError(f"field {name!r} is listed twice")
            seen.add(name)
        if self.task not in TASKS:
            raise SchemaError(f"task must be one of {', '.join(TASKS)}, got {self.task!r}")
        if self.target not in seen:
            raise SchemaError(not_a_field("target", self.target, names))
        for f in self.fields:
            if (f.kind == "target") != (f.name == self.target):
                raise SchemaError(f"field {f.name!r} has kind {f.kind!r} but the target "
                                  f"is {self.target!r}; only the target has kind 'target'")
        for kind in ("id", "time"):
            of_kind = [f.name for f in self.fields if f.kind == kind]
            if len(of_kind) > 1:
                raise SchemaError(f"only one field may be of kind {kind!r}, got "
                                  f"{', '.join(of_kind)}")
        if not self.feature_names:
            raise SchemaError("no features left: every field other than the target is "
                              "id, time or ignore")

    @property
    def names(self) -> list[str]:
        """Every field name in file order."""
        return [f.name for f in self.fields]

    @property
    def feature_names(self) -> list[str]:
        """Numeric and category fields in file order: the columns of X."""
        return [f.name for f in self.fields if f.kind in FEATURE_KINDS]

    @property
    def feature_kinds(self) -> list[str]:
        """Kind of each feature, aligned with :attr:`feature_names`."""
        return [f.kind for f in self.fields if f.kind in FEATURE_KINDS]

    @property
    def id_field(self) -> str | None:
        return next((f.name for f in self.fields if f.kind == "id"), None)

    @property
    def time_field(self) -> str | None:
        return next((f.name for f in self.fields if f.kind == "time"), None)

    def label_columns(self) -> list[str]:
        """Fields read as labels: the category features, and the target of a
        classification."""
        labels = [f.name for f in self.fields if f.kind == "category"]
        return labels + [self.target] if self.task == "classification" else labels

    def kind_of(self, name: str) -> str:
        """Kind of field ``name``; SchemaError when there is no such field."""
        for f in self.fields:
            if f.name == name:
                return f.kind
        raise SchemaError(not_a_field("field", name, self.names))

    def to_dict(self) -> dict:
        return {"target": self.target, "task": self.task,
                "fields": [{"name": f.name, "kind": f.kind} for f in self.fields]}

    @classmethod
    def from_dict(cls, data: Any) -> "Schema":
        """Build a schema from :meth:`to_dict` output; SchemaError says what is wrong."""
        if not isinstance(data, dict):
            raise SchemaError("a schema must be a JSON object with target, task and fields")
        unknown = sorted(set(data) - {"target", "task", "fields"})
        if unknown:
            raise SchemaError(f"schema has an unknown key {unknown[0]!r}; "
                              "known: fields, target, task")
        for key in ("target", "task", "fields"):
            if key not in data:
                raise SchemaError(f"schema has no {key!r}")
        fields = data["fields"]
        if not isinstance(fields, list) or not all(
                isinstance(f, dict) and set(f) == {"name", "kind"} for f in fields):
            raise SchemaError("schema 'fields' must be a list of {\"name\": ..., "
                              "\"kind\": ...} objects")
        return cls(tuple(Field(f["name"], f["kind"]) for f in fields),
                   data["target"], data["task"])


_NAMES_SHOWN = 30
_NAME_CHARS = 40


def not_a_field(what: str, name: str, names: list[str]) -> str:
    """'target 'y' is not a field; fields are: a, b, c': at most 30 names of at most
    40 characters each (a binary file read as CSV has one endless "name")."""
    shown = [n if len(n) <= _NAME_CHARS else n[:_NAME_CHARS - 3] + "..."
             for n in names[:_NAMES_SHOWN]]
    more = f" and {len(names) - _NAMES_SHOWN:,} more" if len(names) > _NAMES_SHOWN else ""
    listed = ", ".join(shown) + more if names else "none"
    return f"{what} {name!r} is not a field; fields are: {listed}"


def load_schema(path: str) -> Schema:
    """Read a schema file written by :func:`save_schema` (or by hand)."""
    try:
        with open(path, encoding="utf-8") as handle:
            text = handle.read()
    except OSError as exc:
        raise ConfigError(f"cannot read schema {path!r}: {exc.strerror or exc}") from exc
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SchemaError(f"schema {path!r} is not valid JSON: {exc.msg} at line "
                          f"{exc.lineno}, column {exc.colno}") from exc
    try:
        return Schema.from_dict(data)
    except SchemaError as exc:
        raise SchemaError(f"schema {path!r}: {exc}") from exc


def save_schema(schema: Schema, path: str) -> None:
    """Write ``schema`` as JSON, atomically (a reader never sees half a file)."""
    directory = os.path.dirname(os.path.abspath(path))
    handle, tmp = tempfile.mkstemp(prefix=".schema-", suffix=".json", dir=directory)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            json.dump(schema.to_dict(), out, indent=2)
            out.write("\n")
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


# ---------------------------------------------------------------------------------------
# inference
# ---------------------------------------------------------------------------------------

def infer_schema(frame: pd.DataFrame, target: str, task: str | None = None,
                 declared: dict[str, str] | None = None) -> Schema:
    """Guess a schema from the first records of a stream.

    Parameters
    ----------
    frame
        A prefix of the stream, columns as read (not modified).
    target
        Name of the target field.
    task
        ``classification`` or ``regression``; inferred from the target when None.
    declared
        Kinds that override inference, by field name.

    Raises
    ------
    SchemaError
        The target or a declared field is not among the columns, a declared kind is
        unknown, or no feature is left.
    """
    names = [str(c) for c in frame.columns]
    if target not in names:
        raise SchemaError(not_a_field("target", target, names))
    declared = dict(declared or {})
    for name, kind in declared.items():
        if name not in names:
            raise SchemaError(not_a_field("declared field", name, names))
        Field(name, kind)  # validates the kind
        if name == target and kind != "target":
            raise SchemaError(f"field {name!r} is the target; it cannot be declared {kind!r}")
        if kind == "target" and name != target:
            raise SchemaError(f"field {name!r} is declared as the target but the target "
                              f"is {target!r}")
    if task is not None and task not in TASKS:
        raise SchemaError(f"task must be one of {', '.join(TASKS)}, got {task!r}")

    taken = {kind for kind in declared.values() if kind in ("id", "time")}
    fields = []
    for column, name in zip(frame.columns, names):
        if name in declared:
            kind = declared[name]
        elif name == target:
            kind = "target"
        else:
            kind = _infer_kind(name, frame[column])
            if kind in ("id", "time"):
                if kind in taken:
                    kind = "ignore"
                taken.add(kind)
        fields.append(Field(name, kind))
    target_values = frame[frame.columns[names.index(target)]]
    resolved = _infer_task(target, target_values) if task is None else task
    if resolved == "regression":
        _, bad = parse_numbers(target_values)
        if bad.any():
            example = _as_list(target_values)[int(np.flatnonzero(bad)[0])]
            raise SchemaError(f"target {target!r} has values that are not numbers "
                              f"(e.g. {str(example)!r}); regression needs numbers")
    return Schema(tuple(fields), target, resolved)


def _as_list(values: pd.Series) -> list:
    return values.to_numpy(dtype=object).tolist()


def _distinct(values: pd.Series) -> tuple[np.ndarray, int]:
    """Distinct present values (in the column's own dtype) and how many are present.

    Inference looks at distinct values only: a prefix of 65536 rows of a few sensors
    holds a few thousand numbers and a handful of labels.
    """
    present = values.to_numpy()[~missing_mask(values)]
    if present.dtype.kind == "O" and _all_bools(present):
        return np.array([False, True])[np.isin([False, True], present)], len(present)
    return pd.unique(present), len(present)


def _all_bools(present: np.ndarray) -> bool:
    # JSON true/false arrive as Python bools, which also read as the numbers 1 and 0
    kinds = set(map(type, present))
    return bool(kinds) and kinds <= {bool, np.bool_}


def _infer_kind(name: str, values: pd.Series) -> str:
    distinct, count = _distinct(values)
    if count == 0:
        return "numeric"
    lowered = name.lower()
    if lowered in _ID_NAMES or lowered.endswith("_id"):
        return "id"
    if distinct.dtype.kind == "b":
        return "category"
    _, bad = parse_numbers(distinct)
    numeric = not bad.any()
    if lowered in _TIME_NAMES:
        _, bad_time = parse_times(distinct)
        if not bad_time.any():
            return "time"
    elif not numeric and _all_iso_times(distinct):
        return "time"
    return "numeric" if numeric else "category"


def _all_iso_times(distinct: np.ndarray) -> bool:
    if not all(isinstance(v, str) for v in distinct):
        return False
    if not pd.Series(distinct, dtype=object).str.fullmatch(_ISO_8601).all():
        return False
    _, bad = parse_times(distinct)
    return not bad.any()


def _infer_task(target: str, values: pd.Series) -> str:
    distinct, count = _distinct(values)
    if count == 0:
        raise SchemaError(f"target {target!r} has no value in the first {len(values)} "
                          "records; give the task")
    if distinct.dtype.kind == "b":
        return "classification"
    if all(str(v).strip().lower() in _BOOLEAN_TEXT for v in distinct):  # stops early
        return "classification"
    numbers, bad = parse_numbers(distinct)
    if bad.any():
        return "classification"
    finite = numbers[np.isfinite(numbers)]
    if (len(finite) and np.all(finite == np.round(finite))
            and len(np.unique(finite)) <= MAX_CLASSES_FOR_INTEGERS):
        return "classification"
    return "regression"
