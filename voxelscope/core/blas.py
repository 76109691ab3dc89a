"""BLAS on one thread, for the many small matrix products of maps and of a clicked voxel.

A map is many skinny matrix products ((p x T) @ (T x 1024), p ~ 10), and a clicked voxel's
noise estimate a few dozen more (its neighbourhood, the run's smoothness sample, one
design after another). A threaded BLAS splits each one over its threads and then waits
for them; on a 2-core machine this made every product 3-30x slower than one thread, the
more so the busier the machine (a fit's smoothness sample: 0.1 s per kernel on one thread,
0.4 s threaded, at load 8). These computations therefore run with BLAS limited to one
thread (threadpoolctl, which finds every BLAS library loaded in the process) and restore
the previous setting afterwards; a map's parallelism comes from worker threads fitting
blocks side by side instead.

Examples
--------
>>> import numpy as np
>>> with one_blas_thread():
...     float((np.ones((3, 4)) @ np.ones((4, 2))).sum())
24.0
"""

from __future__ import annotations

from typing import Any

__all__ = ["one_blas_thread", "one_thread_process"]


#: threadpoolctl's view of the loaded libraries, and the module count it was made at.
_CONTROLLER: list[Any] = [None, -1]

#: The thread-count variables BLAS libraries read when they load (OpenBLAS, OpenMP
#: builds, MKL, BLIS, Apple's Accelerate).
THREAD_VARIABLES = (
    "OPENBLAS_NUM_THREADS",
    "OMP_NUM_THREADS",
    "MKL_NUM_THREADS",
    "BLIS_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
)
#: Set by :func:`one_thread_process` when the whole process runs BLAS on one thread.
_WHOLE_PROCESS = [False]


def one_thread_process() -> bool:
    """BLAS on one thread for the whole process, for a short command (``voxelscope fit``).

    Sets :data:`THREAD_VARIABLES` to 1, which the BLAS library reads when numpy loads it:
    possible only before numpy is imported, and done only when none of them is set (a
    user's own setting is kept). Then :func:`one_blas_thread` has nothing to do, and
    threadpoolctl (a few milliseconds of imports and a scan of the process's libraries)
    is never loaded. Returns whether it took effect.

    >>> import numpy  # imported already: nothing changes
    >>> one_thread_process()
    False
    """
    import os
    import sys

    if "numpy" in sys.modules or any(v in os.environ for v in THREAD_VARIABLES):
        return False
    for v in THREAD_VARIABLES:
        os.environ[v] = "1"
    _WHOLE_PROCESS[0] = True
    return True


def one_blas_thread() -> Any:
    """Context manager: BLAS on one thread inside, the previous thread counts after.

    threadpoolctl is imported here, not at start-up. Finding the loaded libraries scans
    every shared object of the process (about 4 ms in the window, at every click and every
    step of a drag), so the finding is kept and made again only when modules were imported
    since.
    """
    import sys

    if _WHOLE_PROCESS[0]:
        import contextlib

        return contextlib.nullcontext()
    from threadpoolctl import ThreadpoolController

    n = len(sys.modules)
    if _CONTROLLER[0] is None or _CONTROLLER[1] != n:
        _CONTROLLER[0], _CONTROLLER[1] = ThreadpoolController(), n
    return _CONTROLLER[0].limit(limits=1, user_api="blas")
