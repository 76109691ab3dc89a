"""Benchmark of the fixed-effects map across runs (voxelscope.core.combine).

Row (``name, ours_s, reference_s, ratio, goal, ok``), measured side by side in this run:

* fixed-effects t map over 4 runs (48x48x32x200 float32 ``.nii`` each, memory-mapped, every
  voxel of each run's mask) against the sum of the four single-run t maps
  (:func:`voxelscope.core.maps.compute_map` with ``stats=("t",)``, as ``voxelscope map``
  writes a t map) on the same runs, like with like (both without p and z), each
  timed as the best of several alternating repeats: goal ratio <= 1.10.
* the same with runs on different grids (runs 2-4 shifted by half a voxel, so they are
  sampled at the first run's voxel centres), against the same goal.
* the combination alone (:func:`voxelscope.core.combine.combine_maps`: sampling, fixed
  effects, output volumes) against the four single-run maps it combines, timed back to back
  (less sensitive to other load on the machine than the end-to-end rows): goal <= 0.10.

Run: ``python tests/benchmarks/run.py runs`` or ``python tests/benchmarks/bench_runs.py``.
"""

from __future__ import annotations

import gc
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

TR = 2.0
SHAPE = (48, 48, 32)
N = 200


def _make_run(folder: Path, i: int, shift_mm: float) -> Path:
    rng = np.random.default_rng(100 + i)
    data = np.empty((*SHAPE, N), dtype=np.float32, order="F")
    base = rng.normal(10000, 300, SHAPE).astype(np.float32)
    for t in range(N):
        data[..., t] = base + rng.standard_normal(SHAPE, dtype=np.float32) * 40
    aff = np.diag([3.0, 3.0, 3.0, 1.0])
    aff[:3, 3] = shift_mm
    img = nib.Nifti1Image(data, aff)
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    path = folder / f"sub-b_task-x_run-{i + 1}_bold.nii"
    nib.save(img, path)
    del data, img
    gc.collect()
    return path


def _conditions():
    from voxelscope.core.events import Condition

    return [
        Condition("tone", list(np.arange(8.0, N * TR - 20, 54.0)), [15.0] * 7),
        Condition("tap", list(np.arange(35.0, N * TR - 20, 54.0)), [15.0] * 7),
    ]


def _measure(runs, analyses, settings, repeat: int = 5) -> tuple[float, float, float, float]:
    from voxelscope.core.combine import combine_maps, compute_combined_map
    from voxelscope.core.maps import compute_map

    single, combined, maps_bv, combine_only = [], [], [], []
    labels = [f"run-{i + 1}" for i in range(len(runs))]
    for _ in range(repeat):
        t0 = time.perf_counter()
        for r, a in zip(runs, analyses):
            compute_map(r, a, settings, stats=("t",))
        single.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        compute_combined_map(runs, analyses, settings, stats=("t",))
        combined.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ms = [
            compute_map(r, a, settings, stats=("estimate", "variance"))
            for r, a in zip(runs, analyses)
        ]
        t1 = time.perf_counter()
        combine_maps(runs, ms, labels, stats=("t",))
        t2 = time.perf_counter()
        maps_bv.append(t1 - t0)
        combine_only.append(t2 - t1)
    return min(combined), min(single), min(combine_only), min(maps_bv)


def main() -> list[tuple]:
    from voxelscope.core.model import Analysis, ModelSettings
    from voxelscope.core.run import open_run

    rows = []
    settings = ModelSettings(kernels=("double-gamma",))
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for label, shift in (("same grid", 0.0), ("other grids", 1.5)):
            sub = folder / label.replace(" ", "_")
            sub.mkdir()
            runs = [open_run(_make_run(sub, i, shift if i else 0.0)) for i in range(4)]
            for r in runs:
                r.mask()  # the brain mask is computed once per run, outside the timing
            analyses = [Analysis(_conditions(), N, TR) for _ in runs]
            ours, ref, comb, maps = _measure(runs, analyses, settings)
            ratio = ours / ref
            rows.append(
                (
                    f"fixed-effects t map, 4 runs ({label}) vs sum of 4 single-run maps",
                    ours,
                    ref,
                    ratio,
                    "<= 1.10",
                    ratio <= 1.10,
                )
            )
            rows.append(
                (
                    f"  combination alone ({label}) vs the 4 maps it combines",
                    comb,
                    maps,
                    comb / maps,
                    "<= 0.10",
                    comb / maps <= 0.10,
                )
            )
            del runs
            gc.collect()
    return rows


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from run import _print_rows  # type: ignore[import-not-found]

    _print_rows(main())
