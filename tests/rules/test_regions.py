"""Regions of rules: merging per feature, overlap and containment.

No outside reference applies: the cases are small enough to check by hand (interval
arithmetic on half-open intervals lo < x <= hi, set algebra on category labels, and a
"not in" set admitting every label not listed, including labels never seen).
"""

from __future__ import annotations

import pytest

from stream.errors import ConfigError
from stream.rules.regions import overlaps, region_of, shape_of, within
from stream.tree.paths import Condition as C


def test_merging_keeps_the_tightest_bounds_and_set_algebra():
    region = region_of((C("x", ">", 1.0), C("x", "<=", 4.0), C("x", "<=", 3.0),
                        C("c", "in", ("a", "b")), C("c", "not in", ("b",))))
    assert (region["x"].lo, region["x"].hi) == (1.0, 3.0)
    assert (region["c"].op, region["c"].labels) == ("in", frozenset({"a"}))
    assert shape_of(region) == (("c", ("cat", "in")), ("x", ("num", True, True)))
    with pytest.raises(ConfigError, match="mixes numeric and category tests"):
        region_of((C("x", ">", 1.0), C("x", "in", ("a",))))


@pytest.mark.parametrize("a, b, meet", [
    ((C("x", "<=", 3.0),), (C("x", ">", 3.0),), False),           # touching, (.., 3] (3, ..)
    ((C("x", "<=", 3.0),), (C("x", ">", 2.0),), True),
    ((C("x", "<=", 3.0, True),), (C("x", ">", 3.0, True),), True),  # both take missing
    ((C("c", "in", ("a",)),), (C("c", "in", ("b",)),), False),
    ((C("c", "in", ("a",)),), (C("c", "not in", ("a",)),), False),
    ((C("c", "in", ("a", "b")),), (C("c", "not in", ("a",)),), True),
    ((C("c", "not in", ("a",)),), (C("c", "not in", ("b",)),), True),  # e.g. label "z"
    ((C("x", "<=", 3.0),), (C("y", ">", 9.0),), True),              # different features
])
def test_overlaps(a, b, meet):
    assert overlaps(region_of(a), region_of(b)) is meet
    assert overlaps(region_of(b), region_of(a)) is meet


def test_missing_values_can_be_left_out_of_overlap_and_containment():
    a = region_of((C("x", "<=", 3.0, True),))
    b = region_of((C("x", ">", 3.0, True),))
    assert overlaps(a, b) and not overlaps(a, b, missing=False)
    inner = region_of((C("x", ">", 1.0, True), C("x", "<=", 2.0, True)))
    outer = region_of((C("x", "<=", 3.0),))
    assert not within(inner, outer) and within(inner, outer, missing=False)


@pytest.mark.parametrize("inner, outer, inside", [
    ((C("x", ">", 1.0), C("x", "<=", 2.0)), (C("x", "<=", 3.0),), True),
    ((C("x", "<=", 3.0),), (C("x", ">", 1.0), C("x", "<=", 2.0)), False),
    ((C("c", "in", ("a",)), C("y", ">", 0.0)), (C("c", "in", ("a", "b")),), True),
    ((C("c", "in", ("z",)),), (C("c", "not in", ("a",)),), True),
    ((C("c", "not in", ("a",)),), (C("c", "in", ("b", "c")),), False),  # new labels
    ((C("c", "not in", ("a", "b")),), (C("c", "not in", ("a",)),), True),
    ((C("y", ">", 0.0),), (C("c", "in", ("a",)),), False),              # c unconstrained
])
def test_within(inner, outer, inside):
    assert within(region_of(inner), region_of(outer)) is inside
