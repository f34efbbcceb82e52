"""Settings checks with one message template: "grace period must be a whole number >= 1,
got 0".

Every setting a user or a library caller can give is checked once, where it is taken,
by one of these; the message names the setting, the requirement and the value.
"""

from __future__ import annotations

import math
from typing import Any

from .errors import ConfigError

#: Largest magnitude a feature or regression target may have. The trees keep sums of
#: squares of the values they see (variances for splits and leaf models); a value above
#: about 1.3e154 squares to infinity in float64 and poisons every statistic it reaches.
#: 1e100 leaves room for 1e100 records' worth of such squares. Larger values are refused
#: at the edge (quarantined by a run, a ConfigError from the library).
VALUE_LIMIT = 1e100

#: Most codes a category feature may use (codes 0..CATEGORY_LIMIT-1), and most classes.
#: Every leaf holds statistics per code (per class), and a multiway split may create a
#: branch per code, so the tables are sized by this in the worst case; a run pools the
#: values of a field beyond its cap (1,000 unless set) into one code.
CATEGORY_LIMIT = 10_000


def _fail(what: str, requirement: str, value: Any) -> ConfigError:
    return ConfigError(f"{what} must be {requirement}, got {value!r}")


def require_int(what: str, value: Any, minimum: int) -> int:
    """Return ``value`` as int or raise 'X must be a whole number >= m, got v'."""
    if isinstance(value, bool) or not isinstance(value, (int,)) or value < minimum:
        if isinstance(value, float) and value.is_integer() and value >= minimum:
            return int(value)
        raise _fail(what, f"a whole number >= {minimum}", value)
    return int(value)


def require_float(what: str, value: Any, low: float, high: float,
                  low_open: bool = True, high_open: bool = True) -> float:
    """Return ``value`` as float within the interval or raise with the template."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    left = number > low if low_open else number >= low
    right = number < high if high_open else number <= high
    if isinstance(value, bool) or not (left and right):
        interval = f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
        raise _fail(what, f"a number in {interval}", value)
    return number


def require_choice(what: str, value: Any, choices: dict) -> str:
    """Return ``value`` if it names an entry of ``choices``."""
    if value not in choices:
        raise _fail(what, "one of " + ", ".join(sorted(choices)), value)
    return value
