"""colonies.flags: the array form of out_of_target, which the record rules use, agrees with the one-value form."""
import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from colonies.flags import Target, out_of_target, sides

value = st.one_of(st.none(), st.floats(min_value=-100, max_value=100))


@given(st.lists(st.tuples(value, value, value), min_size=1, max_size=30))
def test_sides_over_arrays_agree_with_out_of_target_value_by_value(rows):
    # None (a missing value or an open end) becomes NaN in the arrays.
    values, lows, highs = (np.array([math.nan if v is None else v for v in column], dtype=float)
                           for column in zip(*rows))
    got = sides(values, lows, highs)
    for (v, low, high), side in zip(rows, got):
        expected = out_of_target(v, Target(low, high))
        assert side == {None: 0, "low": -1, "high": 1}[expected], (v, low, high)
