"""Which rules of one snapshot meet which of another: the bounding-box walk against the
pairwise definition, and against records.

Outside reference: records of river's Agrawal generator (tests/operator_runs.py) each
satisfy exactly one rule of a snapshot (the rules partition the input space), so two
rules satisfied by one record must be reported as meeting; the pairwise check of every
pair (stream.rules.regions.overlaps) must agree with the walk exactly.
"""

from __future__ import annotations

import itertools

import pytest
from tests.operator_runs import read_csv_rows, rules_that_hold, shared_run

from stream.rules.overlap import meeting_lists
from stream.rules.regions import overlaps, region_of
from stream.rules.rule import rules_from_payload
from stream.run.snapshots import SnapshotStore


@pytest.fixture(scope="module")
def snapshots():
    run = shared_run("adaptive")
    store = SnapshotStore(run.snapshots)
    documents = [store.load(e["sequence"]) for e in store.entries()]
    return run, documents


def test_the_walk_finds_exactly_the_pairs_that_overlap(snapshots):
    _, documents = snapshots
    for before, after in itertools.pairwise(documents):
        old = [region_of(r.conditions) for r in rules_from_payload(before)]
        new = [region_of(r.conditions) for r in rules_from_payload(after)]
        expected = [[j for j, b in enumerate(new) if overlaps(a, b, False)] for a in old]
        assert meeting_lists(old, new) == expected


def test_rules_a_record_satisfies_in_both_snapshots_are_found_meeting(snapshots):
    run, documents = snapshots
    first, last = documents[0], documents[-1]
    old = [region_of(r.conditions) for r in rules_from_payload(first)]
    new = [region_of(r.conditions) for r in rules_from_payload(last)]
    meets = meeting_lists(old, new)
    ids_old = [r["id"] for r in first["rules"]]
    ids_new = [r["id"] for r in last["rules"]]
    for record in list(read_csv_rows(run.holdout))[:2_000]:
        (a,) = rules_that_hold(first["rules"], record)
        (b,) = rules_that_hold(last["rules"], record)
        if all(v not in ("", None) for v in record.values()):   # every value present
            assert ids_new.index(b["id"]) in meets[ids_old.index(a["id"])]


def test_empty_sides():
    assert meeting_lists([], [{}]) == []
    assert meeting_lists([{}], []) == [[]]
