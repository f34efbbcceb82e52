"""stream/jit.py: the ``borrows`` mark compiles a function without reference counting."""

import numpy as np
import pytest
from numba.core.errors import TypingError

from stream.jit import njit


@njit(borrows=True, cache=False)
def _add_into(out, values) -> None:
    for i in range(values.shape[0]):
        out[i] += values[i]


@njit(cache=False)
def _caller(values):
    out = np.zeros(values.shape[0])
    _add_into(out, values)
    _add_into(out, values)
    return out


def test_a_borrowing_function_works_on_the_arrays_it_is_handed():
    values = np.arange(5.0)
    np.testing.assert_array_equal(_caller(values), 2 * values)


def test_a_borrowing_function_that_makes_an_array_does_not_compile():
    @njit(borrows=True, cache=False)
    def makes_one(n):
        return np.zeros(n)

    with pytest.raises(TypingError):
        makes_one(3)
