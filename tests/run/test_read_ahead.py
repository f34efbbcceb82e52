"""Reading ahead on a thread: batches and the error that ends a read arrive in order,
closing early stops the reading thread, and batches read after ``prepare_with`` come
with what the function made of them."""

from __future__ import annotations

import threading

import numpy as np
import pandas as pd
import pytest

from connectors.base import RawBatch
from stream.errors import InputError
from stream.run.read_ahead import ReadAhead


def batches(n: int, fail_at: int | None = None, read: list | None = None):
    for i in range(n):
        if i == fail_at:
            raise InputError(f"cannot read at batch {i}")
        if read is not None:
            read.append(i)
        yield RawBatch(pd.DataFrame({"x": [i]}), "f.csv", np.array([i + 2]))


def test_batches_arrive_in_order_and_the_thread_ends():
    ahead = ReadAhead(batches(50))
    assert [int(b.frame["x"][0]) for b, _ in ahead] == list(range(50))
    ahead.close()
    assert not ahead._thread.is_alive()


def test_the_error_ending_a_read_comes_after_the_batches_before_it():
    ahead = ReadAhead(batches(10, fail_at=6))
    seen = []
    with pytest.raises(InputError, match="batch 6"):
        for batch, _ in ahead:
            seen.append(int(batch.frame["x"][0]))
    assert seen == [0, 1, 2, 3, 4, 5]
    ahead.close()


def test_closing_early_stops_reading_one_batch_ahead_at_most():
    read: list[int] = []
    ahead = ReadAhead(batches(1000, read=read))
    first, _ = next(iter(ahead))
    ahead.close()
    assert int(first.frame["x"][0]) == 0
    assert len(read) <= 3                        # the batch given, one held, one in hand
    assert threading.active_count() >= 1 and not ahead._thread.is_alive()


def test_batches_read_after_prepare_with_come_prepared_and_a_failure_gives_none():
    ahead = ReadAhead(batches(40))
    pairs = iter(ahead)
    first, prepared = next(pairs)
    assert prepared is None                     # no function yet

    def prepare(batch):
        value = int(batch.frame["x"][0])
        if value == 30:
            raise ValueError("the run's own thread redoes this one")
        return value * 10

    ahead.prepare_with(prepare)
    rest = list(pairs)
    ahead.close()
    values = [int(b.frame["x"][0]) for b, _ in rest]
    assert values == list(range(1, 40))
    # only batches already read when the function was given (the one held ahead and
    # the one in hand at most) come without it
    unprepared = [int(b.frame["x"][0]) for b, p in rest if p is None]
    assert unprepared[:-1] == list(range(1, len(unprepared)))
    assert len(unprepared) - 1 <= 2 and unprepared[-1] == 30
    assert all(p == int(b.frame["x"][0]) * 10 for b, p in rest if p is not None)
