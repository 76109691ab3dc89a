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


def _in_fresh_process(code: str, env_extra: dict[str, str] | None = None) -> str:
    import os
    import subprocess
    import sys

    from voxelscope.core.blas import THREAD_VARIABLES

    env = {k: v for k, v in os.environ.items() if k not in THREAD_VARIABLES}
    env.update(env_extra or {})
    proc = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120
    )
    assert proc.returncode == 0, proc.stderr
    return proc.stdout.strip().splitlines()[-1]


_WHOLE = (
    "import sys\n"
    "from voxelscope.core.blas import one_thread_process, one_blas_thread\n"
    "took = one_thread_process()\n"
    "import numpy as np\n"
    "with one_blas_thread():\n"
    "    np.ones((300, 300)) @ np.ones((300, 300))\n"
    "loaded = 'threadpoolctl' in sys.modules\n"
    "from threadpoolctl import threadpool_info\n"
    "print([took, loaded, sorted({d['num_threads'] for d in threadpool_info()"
    " if d['user_api'] == 'blas'})])\n"
)


def test_a_short_command_runs_blas_on_one_thread_from_the_start():
    """Before numpy loads, the thread-count variables make every BLAS library of the
    process use one thread (read with threadpoolctl); one_blas_thread then needs
    nothing, and threadpoolctl is not imported for it."""
    took, loaded, threads = eval(_in_fresh_process(_WHOLE))
    assert took and not loaded and threads == [1]


def test_a_users_own_thread_setting_is_kept():
    took, loaded, threads = eval(_in_fresh_process(_WHOLE, {"OPENBLAS_NUM_THREADS": "2"}))
    assert not took and loaded  # one_blas_thread limits as before
    assert threads == [2]  # and the user's setting is back after it
