"""The float64 working copy every fit makes of its data, and the guard of the sum identities.

Kept apart from :mod:`voxelscope.core.glm` so that :mod:`voxelscope.core.noise` (whose
one-pass sums start from the same copy) and the fits share it without importing each
other.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["RSS_GUARD", "working_copy"]

#: Voxels whose ``1 - R^2`` (residual over total sum of squares) is below this get their
#: residual sum of squares from explicit residuals instead of ``||y||^2 - ||Q'y||^2``:
#: the shortcut's relative error is about ``eps / (1 - R^2)`` (measured: at most 6.4 times
#: that), so it stays below about 1.5e-9 wherever it is used; explicit residuals carry
#: about ``eps / sqrt(1 - R^2)``. tests/core/test_glm.py checks both on near-exact fits.
RSS_GUARD = 1e-6


def working_copy(
    prep: Any, Y: np.ndarray, order: str = "C"
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """The float64 working copy of the kept volumes ``Y`` (n, V) that every fit uses.

    Returns ``(Y, mean, tss, bad)``: the copy (centred when the design has a constant;
    columns with a non-finite sample set to 0), the column means, the column sums of
    squares of the copy, and the columns with a non-finite sample (None when there are
    none).

    Censored rows of a design with indicator columns (``prep.spikes``, see
    :func:`voxelscope.core.glm.censored_design`) are set to the mean of the other rows
    (0 in a centred copy) and count nowhere: their values never matter to the fit, and a
    huge or non-finite value there would only cost digits.

    >>> from voxelscope.core.glm import prepare
    >>> prep = prepare(np.ones((3, 1)))
    >>> Yc, mean, tss, bad = working_copy(prep, np.array([[1.0], [2.0], [3.0]]))
    >>> Yc[:, 0].tolist(), mean.tolist(), tss.tolist(), bad
    ([-1.0, 0.0, 1.0], [2.0], [2.0], None)
    """
    Y = np.array(Y, dtype=np.float64, order=order, copy=True)
    if Y.ndim == 1:
        Y = Y[:, None]
    n = Y.shape[0]
    spikes = getattr(prep, "spikes", None)
    if spikes is not None and spikes.size:
        Y[spikes] = 0.0
        n -= int(spikes.size)
    total = Y.sum(axis=0)
    bad = None
    if not np.isfinite(total).all():  # a NaN or infinity anywhere makes its column's sum so
        bad = ~np.isfinite(total)
        Y[:, bad] = 0.0
        total[bad] = 0.0
    mean = total / n
    if prep.constant_index is not None:
        Y -= mean
        if spikes is not None and spikes.size:
            Y[spikes] = 0.0
    # total sum of squares: centred when the design has a constant, else uncentred
    tss = np.einsum("ij,ij->j", Y, Y)
    return Y, mean, tss, bad
