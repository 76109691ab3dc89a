"""voxelscope.core.blas: BLAS on one thread inside, the previous thread counts after
(read with threadpoolctl, an outside tool)."""

from __future__ import annotations

import numpy as np
from threadpoolctl import threadpool_info

from voxelscope.core.blas import one_blas_thread


def _blas_threads() -> list[int]:
    return [d["num_threads"] for d in threadpool_info() if d["user_api"] == "blas"]


def test_one_thread_inside_and_restored_after_an_error():
    before = _blas_threads()
    try:
        with one_blas_thread():
            assert all(n == 1 for n in _blas_threads())
            np.ones((50, 50)) @ np.ones((50, 50))
            raise RuntimeError("leave early")
    except RuntimeError:
        pass
    assert _blas_threads() == before


def test_the_kept_library_finding_limits_every_time_and_after_new_imports():
    """The libraries found once are used again; an import since makes a new finding."""
    before = _blas_threads()
    for _ in range(3):
        with one_blas_thread():
            assert all(n == 1 for n in _blas_threads())
        assert _blas_threads() == before
    import sys

    sys.modules["_vxs_blas_test_marker"] = sys  # one more module: the finding is made again
    try:
        with one_blas_thread():
            assert all(n == 1 for n in _blas_threads())
    finally:
        del sys.modules["_vxs_blas_test_marker"]
    assert _blas_threads() == before
