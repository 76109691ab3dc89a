"""Start-up of the command line, whole-process against whole-process.

Rows (``name, ours_s, reference_s, ratio, goal, ok``); every ratio is ours / reference with
both commands started as fresh processes in alternation (see ``wholeprocess.py``):

* ``voxelscope --version`` against ``python -c "import numpy, nibabel"``: goal <= 1.5.
* ``voxelscope fit --help`` against the same: goal <= 1.5.
* ``voxelscope fit RUN --voxel I J K`` on a compressed run whose cache is built, against
  the same reference: goal <= 2.
* Info: the modules ``voxelscope fit`` imports, alone (``python -c "import ..."``), against
  the reference: what the fit's imports cost before it reads anything.
* Info: ``python -c "import numpy, nibabel, scipy.special"`` against the reference: what a
  fit cost before p and z of a few values stopped needing scipy.special.
* Info: the reference with BLAS on one thread from the start (the thread-count variables
  set before numpy loads, as ``voxelscope fit`` does) against the reference: how much of
  the fit's ratio is OpenBLAS not starting its threads when numpy loads it; and the fit
  against that reference (like with like on this point).

Run: ``python tests/benchmarks/run.py startup``.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from wholeprocess import (
    child_env,
    machine_load,
    python_cmd,
    row,
    side_by_side,
    voxelscope_cmd,
)

REPEATS = 11
REFERENCE = python_cmd("import numpy, nibabel")
#: What ``voxelscope fit RUN --voxel I J K`` imports before it reads the run.
FIT_IMPORTS = (
    "import voxelscope.cli, voxelscope.cli.fit, voxelscope.core.loader, voxelscope.core.run, "
    "voxelscope.core.cache, voxelscope.core.noise, voxelscope.core.headercheck, "
    "voxelscope.core.limits, zipfile"
)


def _make_gz_run(folder: Path) -> Path:
    rng = np.random.default_rng(0)
    shape, n, tr = (40, 48, 36), 200, 2.0
    data = (1000 + 20 * rng.standard_normal((*shape, n))).astype(np.float32)
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = tr
    path = folder / "sub-01_task-x_bold.nii.gz"
    nib.save(img, path)
    rows = ["onset\tduration\ttrial_type"]
    for k, t in enumerate(range(10, 380, 30)):
        rows.append(f"{t}\t12\t{'tone' if k % 2 == 0 else 'tap'}")
    (folder / "sub-01_task-x_events.tsv").write_text("\n".join(rows) + "\n")
    return path


def main() -> list[tuple]:
    print(machine_load())
    rows = []
    pair = side_by_side(voxelscope_cmd("--version"), REFERENCE, REPEATS)
    rows.append(row("voxelscope --version vs python -c 'import numpy, nibabel'", pair, 1.5))
    pair = side_by_side(voxelscope_cmd("fit", "--help"), REFERENCE, REPEATS)
    rows.append(row("voxelscope fit --help vs the same", pair, 1.5))
    with tempfile.TemporaryDirectory(prefix="vxs-bench-startup-") as tmp:
        folder = Path(tmp)
        run = _make_gz_run(folder)
        env = child_env({"XDG_CACHE_HOME": str(folder / "cache")})
        fit = voxelscope_cmd("fit", str(run), "--voxel", "20", "24", "18")
        pair = side_by_side(fit, REFERENCE, REPEATS, env=env, warmup=2)  # 1st builds the cache
        rows.append(row("voxelscope fit on a cached .nii.gz vs the same", pair, 2.0))
        pair = side_by_side(python_cmd(FIT_IMPORTS), REFERENCE, REPEATS, env=env)
        rows.append(row("info: the imports of voxelscope fit alone vs the same", pair, None))
        floor = python_cmd("import numpy, nibabel, scipy.special")
        pair = side_by_side(floor, REFERENCE, REPEATS, env=env)
        rows.append(row("info: import numpy, nibabel, scipy.special vs the same", pair, None))
        one = python_cmd(
            "import os\n"
            "from voxelscope.core.blas import THREAD_VARIABLES\n"
            "os.environ.update(dict.fromkeys(THREAD_VARIABLES, '1'))\n"
            "import numpy, nibabel"
        )
        pair = side_by_side(one, REFERENCE, REPEATS, env=env)
        rows.append(row("info: the same with BLAS on one thread from the start", pair, None))
        pair = side_by_side(fit, one, REPEATS, env=env)
        rows.append(row("info: fit on the cached run vs the one-thread reference", pair, None))
    print(machine_load())
    return rows


if __name__ == "__main__":
    from run import _print_rows

    t0 = time.perf_counter()
    _print_rows(main())
    print(f"({time.perf_counter() - t0:.1f} s)")
