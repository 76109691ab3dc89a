"""Opening real runs: voxel time series and the first open of a compressed run.

Rows:

- ``first open .nii.gz, whole process``: a fresh ``python`` that opens an MNI-like run
  (80x96x80x100 float32, 37% brain, zeros outside, gzip) with an empty cache (decompress,
  keep the brain voxels voxel-major, checksums, summary), against a fresh ``python`` that
  runs nibabel's full decompression ``nib.load(p).get_fdata(dtype=np.float32)``; started
  in alternation (``wholeprocess.py``). Goal: at most 1.0x.
- the same with the standard library's inflater (``VOXELSCOPE_INFLATER=zlib``; info): the
  fallback when ISA-L is missing.
- ``cache size / brain data``: bytes of the cache entry over the float32 bytes of the
  run's brain-mask voxels. Goal: at most 1.15x.
- ``timeseries .nii.gz``: ``Run.timeseries`` after open (served from the cache, its block
  checked on first read), median over random voxels; reference: nibabel's
  ``img.dataobj[i, j, k, :]`` on the same .nii.gz (a few voxels: each decompresses the
  stream). Goal: at most 1 ms.
- ``timeseries .nii``: the same on an uncompressed file (memory map); reference nibabel's
  memory-mapped ``img.dataobj[i, j, k, :]``. Goal: at most 1 ms.
- ``brain pass``: every brain voxel through ``Run.iter_rows`` (from the cache, and from
  the .nii memory map); reference: nibabel's full decompression in this process (scale).

Setting for the time-series rows: a synthetic 64x64x40 run of 400 volumes, int16 with
scl_slope/scl_inter (131 MB uncompressed), as .nii.gz and .nii in a temporary folder.
"""

from __future__ import annotations

import os
import random
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SHAPE = (64, 64, 40, 400)


def _make(folder: Path) -> tuple[Path, Path]:
    import nibabel as nib

    rng = np.random.default_rng(3)
    x, y, z, t = SHAPE
    gx, gy, gz = np.meshgrid(
        np.linspace(-1, 1, x), np.linspace(-1, 1, y), np.linspace(-1, 1, z), indexing="ij"
    )
    head = (gx**2 + gy**2 + (1.2 * gz) ** 2) < 0.8
    base = np.where(head, 9000.0, 300.0).astype(np.float32)
    data = np.empty(SHAPE, dtype=np.int16)
    for v in range(t):  # volume by volume keeps the generator's memory small
        noise = rng.normal(0.0, 60.0, (x, y, z)).astype(np.float32)
        data[..., v] = np.clip((base + noise) / 0.5 - 10000, -32768, 32767).astype(np.int16)
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.5, 1.0]))
    img.header.set_slope_inter(0.5, 5000.0)
    img.header.set_zooms((3.0, 3.0, 3.5, 1.25))
    img.header.set_xyzt_units("mm", "sec")
    gz_path, nii_path = folder / "bench_bold.nii.gz", folder / "bench_plain.nii"
    nib.save(img, str(gz_path))
    nib.save(img, str(nii_path))
    return gz_path, nii_path


def _median_time(fn, items) -> float:
    times = []
    for item in items:
        t0 = time.perf_counter()
        fn(item)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


_CHILD = """
import sys
from voxelscope.core.run import open_run


def peak_kb():
    # VmHWM (Linux) starts afresh in a new process; ru_maxrss may carry the parent's peak
    try:
        for line in open("/proc/self/status"):
            if line.startswith("VmHWM:"):
                return float(line.split()[1])
    except OSError:
        pass
    import resource

    scale = 1024 if sys.platform == "darwin" else 1
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / scale


before = peak_kb()
open_run(sys.argv[1], cache_dir=sys.argv[2])
print(peak_kb() - before)
"""


def _peak_growth_mb(gz_path: Path, cache_dir: Path) -> float:
    """Peak resident-memory growth of a first open, measured in a fresh process."""
    root = Path(__file__).resolve().parents[2]
    env = dict(os.environ, PYTHONPATH=str(root))
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, str(gz_path), str(cache_dir)],
        capture_output=True,
        text=True,
        env=env,
        check=True,
    ).stdout
    return float(out.strip().splitlines()[-1]) / 1024


MNI = (80, 96, 80, 100)
REPEATS = 7

_OURS = """
import shutil, sys
shutil.rmtree(sys.argv[2], ignore_errors=True)
from voxelscope.core.run import open_run
open_run(sys.argv[1], cache_dir=sys.argv[2])
"""
_REF = """
import sys, numpy, nibabel
nibabel.load(sys.argv[1]).get_fdata(dtype=numpy.float32)
"""


def _make_mni(folder: Path) -> Path:
    """An MNI-like run: an ellipsoid brain (37% of the grid) in zeros, float32."""
    import nibabel as nib

    rng = np.random.default_rng(4)
    x, y, z, t = MNI
    g = np.meshgrid(*(np.linspace(-1, 1, n) for n in (x, y, z)), indexing="ij")
    brain = (g[0] ** 2 / 0.8 + g[1] ** 2 / 0.9 + g[2] ** 2 / 0.75) < 1.0
    base = np.where(brain, 800.0 + 200.0 * g[0], 0.0).astype(np.float32)
    data = np.zeros(MNI, dtype=np.float32)
    for v in range(t):
        noise = rng.normal(0.0, 20.0, (x, y, z)).astype(np.float32)
        data[..., v] = np.where(brain, base + noise, 0.0)
    img = nib.Nifti1Image(data, np.diag([2.0, 2.0, 2.0, 1.0]))
    img.header.set_zooms((2.0, 2.0, 2.0, 2.0))
    img.header.set_xyzt_units("mm", "sec")
    path = folder / "mni_bold.nii.gz"
    nib.save(img, str(path))
    return path


def _first_open_rows(folder: Path) -> list[tuple]:
    from wholeprocess import child_env, machine_load, python_cmd, row, side_by_side

    from voxelscope.core.cache import cache_info
    from voxelscope.core.rawfile import INFLATER_ENV
    from voxelscope.core.run import open_run

    mni = _make_mni(folder)
    cache_dir = str(folder / "cache-first-open")
    ours = [*python_cmd(_OURS), str(mni), cache_dir]
    ref = [*python_cmd(_REF), str(mni)]
    rows = [row("first open .nii.gz, whole process", side_by_side(ours, ref, REPEATS), 1.0)]
    env = child_env({INFLATER_ENV: "zlib"})
    pair = side_by_side(ours, ref, max(3, REPEATS // 2), env=env)
    rows.append(row("first open .nii.gz, whole process, zlib inflater", pair, None))
    run = open_run(mni, cache_dir=cache_dir)
    brain = int(run.mask().sum()) * run.n_volumes * 4
    size = cache_info(cache_dir).total_bytes
    rows.append(
        (
            f"cache size / brain float32 data ({size / 1e6:.1f} MB / {brain / 1e6:.1f} MB; "
            f"{run.mask().mean():.0%} of the grid in the mask)",
            None,
            None,
            size / brain,
            "<= 1.15",
            size / brain <= 1.15,
        )
    )
    print(f"first-open rows measured at {machine_load()}")
    return rows


def main():
    import nibabel as nib

    from voxelscope.core.run import open_run

    folder = Path(tempfile.mkdtemp(prefix="vxs-bench-"))
    rows = []
    try:
        rows.extend(_first_open_rows(folder))
        gz_path, nii_path = _make(folder)
        cache_dir = folder / "cache"
        x, y, z, t = SHAPE

        t0 = time.perf_counter()
        full = np.asanyarray(nib.load(str(gz_path)).dataobj)
        r = time.perf_counter() - t0
        del full

        rng = random.Random(5)
        voxels = [(rng.randrange(x), rng.randrange(y), rng.randrange(z)) for _ in range(300)]
        run = open_run(gz_path, cache_dir=cache_dir)
        assert run.storage == "cache"
        mask = run.mask()
        inside = [v for v in voxels if mask[v]]
        outside = [v for v in voxels if not mask[v]]
        for v in inside[:20]:
            run.timeseries(v)  # warm the page cache, as after the first open
        ours = _median_time(run.timeseries, inside)
        img = nib.load(str(gz_path))
        ref = _median_time(lambda v: img.dataobj[v[0], v[1], v[2], :], voxels[:3])
        rows.append(
            (
                f"timeseries .nii.gz, brain voxels (after open; {len(inside)} voxels)",
                ours,
                ref,
                ours / ref,
                "<= 1 ms",
                ours <= 1e-3,
            )
        )
        # outside the brain, voxels that vary (noise) are not cached: read from the file
        ours = _median_time(run.timeseries, outside[:3])
        rows.append(
            ("timeseries .nii.gz, noisy voxel outside the brain", ours, ref, ours / ref, "-", None)
        )

        t0 = time.perf_counter()
        n = sum(idx.size for idx, _ in run.iter_rows())
        brain = time.perf_counter() - t0
        rows.append((f"brain pass, {n} voxels (cache)", brain, r, brain / r, "-", None))

        plain = open_run(nii_path)
        assert plain.storage == "memmap"
        for v in voxels[:20]:
            plain.timeseries(v)
        ours = _median_time(plain.timeseries, voxels)
        img = nib.load(str(nii_path), mmap=True)
        ref = _median_time(lambda v: np.asarray(img.dataobj[v[0], v[1], v[2], :]), voxels)
        rows.append(("timeseries .nii (memmap)", ours, ref, ours / ref, "<= 1 ms", ours <= 1e-3))

        plain.mask()  # one pass for the mean image, as the window does on open
        t0 = time.perf_counter()
        n = sum(idx.size for idx, _ in plain.iter_rows())
        brain = time.perf_counter() - t0
        rows.append((f"brain pass, {n} voxels (.nii memmap)", brain, r, brain / r, "-", None))

        extra_mb = _peak_growth_mb(gz_path, folder / "cache-mem")
        print(
            f"run {x}x{y}x{z}x{t} int16: {os.path.getsize(gz_path) / 1e6:.0f} MB .nii.gz, "
            f"{x * y * z * t * 2 / 1e6:.0f} MB raw; peak resident growth during a first "
            f"open {extra_mb:.0f} MB (separate process; includes the cache file's mapped pages)"
        )
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return rows


if __name__ == "__main__":
    for row in main():
        print(row)
