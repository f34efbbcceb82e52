"""Thresholds in the data's resolution (stream/resolution.py, stream/rules/thresholds.py).

The decimals a field carries are checked against Python's decimal module (the decimals
of each value's shortest round-trip text); the claim the text forms rest on, that on
values with d decimals ``x <= t`` and ``x <= floor_d(t)`` select the same records (and so
``x > t`` and ``x > floor_d(t)``), is checked on random grids and thresholds."""

from __future__ import annotations

import decimal

import numpy as np
from hypothesis import assume, given, settings, strategies as st

from stream.resolution import FINE, MAX_DECIMALS, SAMPLE, decimals_of, slack
from stream.rules.thresholds import Thresholds, on_grid


def _decimals_by_text(values: np.ndarray) -> int:
    most = 0
    for v in values.tolist():
        exponent = decimal.Decimal(repr(float(v))).normalize().as_tuple().exponent
        most = max(most, -exponent if exponent < 0 else 0)
    return most if most <= MAX_DECIMALS else FINE


@settings(max_examples=200, deadline=None)
@given(st.integers(0, MAX_DECIMALS), st.integers(1, SAMPLE), st.integers(0, 2**32 - 1))
def test_decimals_of_a_sample_agree_with_the_decimal_module(places, n, seed):
    rng = np.random.default_rng(seed)
    values = rng.integers(-10**6, 10**6, size=n) / 10.0 ** places
    assert decimals_of(values) == _decimals_by_text(values)


def test_computed_values_are_fine_and_missing_values_do_not_count():
    assert decimals_of(np.random.default_rng(1).random(1000)) == FINE
    assert decimals_of(np.array([np.nan, 1.0, 2.0])) == 0
    assert decimals_of(np.array([np.nan])) == 0


@settings(max_examples=300, deadline=None)
@given(st.integers(0, 4), st.integers(0, 2**32 - 1),
       st.floats(-1000, 1000, allow_nan=False))
def test_a_threshold_on_the_grid_selects_the_same_records(places, seed, t):
    # a threshold within the slack below a grid value prints as that value: the
    # tolerance that keeps 0.3 from printing as 0.2 (see on_grid)
    scaled = t * 10.0 ** places
    assume(np.ceil(scaled) - scaled > slack(scaled) or scaled == np.ceil(scaled))
    grid = np.random.default_rng(seed).integers(-10**5, 10**5, size=400) / 10.0 ** places
    grid = np.concatenate([grid, np.round(np.array([t]), places)])
    shown = float(on_grid(t, places))
    assert np.array_equal(grid <= t, grid <= shown)
    assert np.array_equal(grid > t, grid > shown)
    assert shown <= t + 1e-9 * max(abs(t), 1.0)


def test_the_printed_forms():
    style = Thresholds({"minutes": 0, "temp": 1, "ratio": FINE})
    assert style.number("minutes", 13.3636) == "13"
    assert style.number("minutes", -2.5) == "-3"
    assert style.number("temp", 0.3) == "0.3"          # 0.3 * 10 is 2.9999999999999996
    assert style.number("temp", 2.7182) == "2.7"
    assert style.number("ratio", 2.71828) == "2.718"    # four significant digits
    assert style.number("ratio", 126339.93) == "126340"
    assert style.number("other", 13.3636) == "13.3636"  # no resolution known: as before
    assert Thresholds(exact=True).number("minutes", 13.363636363636363) == \
        "13.363636363636363"
    assert style.move("minutes", 12.27, 13.6) == "12 -> 13 (+1)"
    assert style.move("minutes", 12.27, 12.6) == \
        "12 -> 12 (the same at the data's resolution)"
    merged = Thresholds.of_both({"decimals": {"temp": 0}}, {"decimals": {"temp": 2}})
    assert merged.decimals == {"temp": 2}
