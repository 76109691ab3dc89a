"""Tests of voxelscope.core.workcopy: the working copy every fit makes of its data."""

from __future__ import annotations

import numpy as np

from voxelscope.core.glm import prepare
from voxelscope.core.workcopy import working_copy


def test_centred_only_with_a_constant_and_bad_columns_zeroed():
    """Means and sums of squares by hand (common practice: centre when the design has an
    intercept); a column with a NaN is reported and zeroed; the input is unchanged."""
    Y = np.array([[1.0, 2.0, 5.0], [3.0, np.nan, 7.0]], dtype=np.float32).T.copy()
    before = Y.copy()
    with_const = prepare(np.column_stack([np.ones(3), [0.0, 1.0, 3.0]]))
    Yc, mean, tss, bad = working_copy(with_const, Y)
    assert Yc.dtype == np.float64 and np.array_equal(Y, before, equal_nan=True)
    np.testing.assert_allclose(mean, [8.0 / 3.0, 0.0])
    np.testing.assert_allclose(Yc[:, 0], [1 - 8 / 3, 2 - 8 / 3, 5 - 8 / 3])
    np.testing.assert_allclose(tss[0], np.sum((np.array([1.0, 2.0, 5.0]) - 8 / 3) ** 2))
    assert bad.tolist() == [False, True] and np.all(Yc[:, 1] == 0)
    no_const = prepare(np.array([[0.0], [1.0], [3.0]]))
    Yn, _mean, tss_n, _bad = working_copy(no_const, Y[:, :1])
    np.testing.assert_allclose(Yn[:, 0], [1.0, 2.0, 5.0])
    assert float(tss_n[0]) == 30.0
