"""Thinned snapshot history and the snapshot schedule (record count and/or elapsed time).

No outside reference applies: the properties checked are the ones retention promises
(the newest K stay, a dropped snapshot never comes back, the history grows with the
logarithm of the run's length) and are checked by simulation.
"""

from __future__ import annotations

import math
import os

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stream.errors import ConfigError
from stream.run.snapshots import SnapshotSchedule, SnapshotStore, thin_history


@given(st.integers(1, 12), st.integers(1, 400))
def test_thinning_never_needs_a_dropped_snapshot(keep, writes):
    kept: list[int] = []
    for sequence in range(1, writes + 1):
        now = thin_history(kept + [sequence], keep)
        assert set(now) <= set(kept) | {sequence}  # nothing dropped comes back
        assert now[-min(keep, sequence):] == list(range(max(1, sequence - keep + 1),
                                                         sequence + 1))
        kept = now
    # about keep/2 per doubling beyond the newest keep (+1 per band for rounding)
    bands = max(0, math.ceil(math.log2(max(writes / keep, 1)))) + 1
    assert len(kept) <= keep + bands * (keep // 2 + 1)


def test_store_keeps_a_thinned_history(tmp_path):
    store = SnapshotStore(tmp_path, keep=4, history=True)
    for k in range(1, 21):
        store.write(100 * k, {"rules": []}, "", when=1.7e9 + k)
    sequences = [e["sequence"] for e in store.entries()]
    assert sequences == [8, 12, 14, 16, 17, 18, 19, 20] == thin_history(list(range(1, 21)), 4)
    files = sorted(n for n in os.listdir(tmp_path) if n.endswith(".json") and n != "index.json")
    assert files == [f"snapshot-{s:06d}.json" for s in sequences]


def test_history_needs_a_count():
    with pytest.raises(ConfigError, match="a thinned snapshot history needs a number of "
                                          "snapshots to keep, got none"):
        SnapshotStore("x", history=True)


def test_schedule_by_records_and_by_time():
    now = [0.0]
    schedule = SnapshotSchedule(every_records=1000, every_seconds=60, clock=lambda: now[0])
    assert schedule.records_to_boundary(250) == 750
    assert not schedule.due(999) and schedule.due(1000)
    schedule.taken(1000)
    assert not schedule.due(1000)  # never twice at one record count
    now[0] = 59.0
    assert not schedule.due(1500)
    now[0] = 61.0
    assert schedule.due(1500)
    schedule.taken(1500)
    now[0] = 62.0
    assert not schedule.due(1700) and schedule.due(2000)
    timed = SnapshotSchedule(every_seconds=5, clock=lambda: now[0])
    assert timed.records_to_boundary(10) is None


@pytest.mark.parametrize("kwargs, message", [
    ({}, "a snapshot schedule needs a record interval or a time interval, got neither"),
    ({"every_seconds": -1}, "snapshot time interval must be a number of seconds >= 0, got -1"),
    ({"every_records": 1.5}, "snapshot interval must be a whole number >= 0, got 1.5"),
])
def test_schedule_refuses_bad_settings(kwargs, message):
    with pytest.raises(ConfigError) as caught:
        SnapshotSchedule(**kwargs)
    assert str(caught.value) == message


@settings(max_examples=30)
@given(st.integers(1, 50), st.lists(st.integers(1, 400), min_size=1, max_size=40))
def test_record_snapshots_fall_on_multiples_whatever_the_batches(every, batches):
    """Cutting batches where records_to_boundary says gives one snapshot per multiple."""
    schedule = SnapshotSchedule(every_records=every, clock=lambda: 0.0)
    records, taken = 0, []
    for size in batches:
        left = size
        while left:
            step = min(left, schedule.records_to_boundary(records))
            records += step
            left -= step
            if schedule.due(records):
                schedule.taken(records)
                taken.append(records)
    assert taken == list(range(every, records + 1, every))
