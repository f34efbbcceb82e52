"""What a run says once per field when the data strays from what the schema expects.

Each notice is said the first time, with the record and the way out, and counted for
the summary: text in a numeric field (a column inferred numeric, e.g. empty in the
first records, that later carries labels), a field the schema does not have (a key
first seen after the schema was inferred), a category field whose values reached the
category cap (later new values share one code), and target values beyond the class cap.
"""

from __future__ import annotations

from typing import Callable, Iterable

from connectors.base import Reject
from stream.shown import printable

from .encoding import BEYOND_CLASS_CAP, NOT_A_NUMBER, OTHER_VALUES, Encoder

#: A field whose values were new in at least this share of its records until it
#: reached its cap is said to look like an identifier (a category with many values
#: repeats some early on: 4,000 equally likely values repeat in about 12% of the first
#: 1,100 records).
ID_LIKE_SHARE = 0.95


class FieldNotices:
    """Once-per-field warnings and their counts (``text_in_numbers`` is checkpointed)."""

    def __init__(self, warn: Callable[[str], None]) -> None:
        self.warn = warn
        self.text_in_numbers: dict[str, int] = {}   # field -> values refused as text
        self.beyond_class_cap = 0                   # records refused for a new class
        self._pooled_said: set[str] = set()
        self._unknown_said: set[str] = set()

    def restored(self, encoder: Encoder, text_in_numbers: dict[str, int]) -> None:
        """After a resume: counts as checkpointed; fields pooled before were said."""
        self.text_in_numbers = dict(text_in_numbers)
        self._pooled_said = set(encoder.pooled)
        self._unknown_said = set(encoder.unknown_fields)

    def note(self, rejects: Iterable[Reject], encoder: Encoder) -> None:
        """Look at one encoded batch: its rejects, and the encoder's pooled fields."""
        for reject in rejects:
            if reject.field is None:
                continue
            if reject.reason == NOT_A_NUMBER:
                self._text_in_number(reject)
            elif reject.reason.startswith(BEYOND_CLASS_CAP):
                if not self.beyond_class_cap:
                    self.warn(f"{reject.origin} line {reject.line}: target "
                              f"{reject.field!r} holds {reject.value!r}, a new class beyond "
                              f"the class cap of {encoder.class_cap:,}; records with new "
                              f"classes go to the quarantine. A target with this many "
                              f"values is usually a number (--task regression) or an "
                              f"identifier; otherwise raise --class-cap")
                self.beyond_class_cap += 1
        for field in encoder.unknown_fields:
            if field not in self._unknown_said:
                self._unknown_said.add(field)
                self.warn(f"field {printable(field)!r} is not in the schema (no record the "
                          f"schema was inferred from had a value for it); its values are "
                          f"not learned (count in the summary, 'unknown_fields'). To learn "
                          f"from it, start a fresh run declaring it: --kind "
                          f"{printable(field)}=KIND")
        for field, pooled in encoder.pooled.items():
            if field not in self._pooled_said:
                self._pooled_said.add(field)
                self.warn(self._pooled_message(field, pooled["first"], encoder.category_cap,
                                               pooled["after"]))

    def _text_in_number(self, reject: Reject) -> None:
        seen = self.text_in_numbers.get(reject.field, 0)
        self.text_in_numbers[reject.field] = seen + 1
        if not seen:
            self.warn(f"{reject.origin} line {reject.line}: field {reject.field!r} holds "
                      f"{reject.value!r}, but the field is numeric; records like it go "
                      f"to the quarantine (count in the summary, 'text_in_numbers'). "
                      f"If the field holds labels, declare it: --kind "
                      f"{reject.field}=category")

    @staticmethod
    def _pooled_message(field: str, first: str, cap: int, records: int) -> str:
        said = (f"field {field!r} reached the category cap of {cap:,} distinct values: "
                f"{first!r} and every later new value are learned as one value, "
                f"{OTHER_VALUES!r} (count in the summary, 'pooled_values'). ")
        if cap >= ID_LIKE_SHARE * max(records, 1):
            return said + (f"With {cap:,} values in its first {records:,} records it "
                           f"looks like an identifier: declare it --kind {field}=id (kept "
                           f"with predictions) or --kind {field}=ignore")
        return said + ("If the values matter apart, raise --category-cap (each value costs "
                       "memory in every leaf)")
