"""The summary's percentiles are numpy.percentile's (its default "linear" rule) exactly."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st


@settings(max_examples=400, deadline=None, derandomize=True)
@given(values=st.lists(st.floats(-1e9, 1e9, allow_nan=False), min_size=1, max_size=60),
       q=st.one_of(st.sampled_from([0, 1, 25, 50, 75, 99, 100]), st.floats(0, 100)))
def test_percentile_is_numpys_linear_rule(values, q):
    from monitor.decisions.tally import percentile

    assert percentile(values, q) == float(np.percentile(np.float64(values), q))  # numpy
