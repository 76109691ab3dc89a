"""Tests of voxelscope.core.mask helpers that are not exercised through a run.

Outside reference: ``numpy.percentile`` (default linear method) for the robust maximum
of the intensity rule.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from voxelscope.core.mask import percentile_of


@settings(max_examples=300, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(1, 3000),
    percentile=st.one_of(
        st.sampled_from([0.0, 2.0, 50.0, 98.0, 99.9, 100.0]), st.floats(0.0, 100.0)
    ),
    ties=st.booleans(),
)
def test_percentile_equals_numpy_bit_for_bit(seed, n, percentile, ties):
    """The mask's robust maximum equals np.percentile (reference library) exactly, so the
    mask does not change: random sizes, percentiles, spreads and tied values."""
    rng = np.random.default_rng(seed)
    values = rng.lognormal(5, 2, n)
    if ties:
        values = np.round(values / 50) * 50
    ours = percentile_of(values, percentile)
    ref = float(np.percentile(values, percentile))
    assert ours == ref or (ours != ours and ref != ref), (ours, ref)
