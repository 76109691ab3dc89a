"""Opening real runs (issue 3): voxel time series and first open of a compressed run.

Setting: a synthetic 64x64x40 run of 400 volumes, int16 with scl_slope/scl_inter (131 MB
uncompressed), written as .nii.gz and .nii in a temporary folder; the cache goes to a
temporary folder too.

Rows:
- ``timeseries .nii.gz``: ``Run.timeseries`` after open (served from the voxel-major cache),
  median over random voxels; reference: nibabel's ``img.dataobj[i, j, k, :]`` on the same
  .nii.gz (a few voxels: each decompresses the stream). Goal: at most 1 ms.
- ``timeseries .nii``: the same on the uncompressed file (memory map); reference nibabel's
  memory-mapped ``img.dataobj[i, j, k, :]``. Goal: at most 1 ms.
- ``first open .nii.gz``: ``open_run`` with an empty cache (decompress, scale, write the
  voxel-major cache, mean image); reference: nibabel's full decompression
  ``np.asanyarray(img.dataobj)``. Goal: at most 1.5x.
- ``brain pass``: every brain voxel through ``Run.iter_chunks`` (from the cache, and from
  the .nii memory map); reference: the same full decompression (for scale only).
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


def main():
    import nibabel as nib

    from voxelscope.core.run import open_run

    folder = Path(tempfile.mkdtemp(prefix="vxs-bench-"))
    rows = []
    try:
        gz_path, nii_path = _make(folder)
        cache_dir = folder / "cache"
        x, y, z, t = SHAPE

        # first open, ours (cache empty) and the reference, alternating, best of three each
        # (the minimum is the least disturbed by other work on the machine)
        ours_open, ref_open = [], []
        for _ in range(3):
            shutil.rmtree(cache_dir, ignore_errors=True)
            t0 = time.perf_counter()
            run = open_run(gz_path, cache_dir=cache_dir)
            ours_open.append(time.perf_counter() - t0)
            del run
            t0 = time.perf_counter()
            full = np.asanyarray(nib.load(str(gz_path)).dataobj)
            ref_open.append(time.perf_counter() - t0)
            del full
        o, r = min(ours_open), min(ref_open)
        rows.append(("first open .nii.gz (cache build)", o, r, o / r, "<= 1.5x", o / r <= 1.5))

        rng = random.Random(5)
        voxels = [(rng.randrange(x), rng.randrange(y), rng.randrange(z)) for _ in range(300)]
        run = open_run(gz_path, cache_dir=cache_dir)
        assert run.storage == "cache"
        for v in voxels[:20]:
            run.timeseries(v)  # warm the page cache, as after the first open
        ours = _median_time(run.timeseries, voxels)
        img = nib.load(str(gz_path))
        ref = _median_time(lambda v: img.dataobj[v[0], v[1], v[2], :], voxels[:3])
        rows.append(
            ("timeseries .nii.gz (after open)", ours, ref, ours / ref, "<= 1 ms", ours <= 1e-3)
        )

        t0 = time.perf_counter()
        n = sum(idx.size for idx, _ in run.iter_chunks())
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
        n = sum(idx.size for idx, _ in plain.iter_chunks())
        brain = time.perf_counter() - t0
        rows.append((f"brain pass, {n} voxels (.nii memmap)", brain, r, brain / r, "-", None))

        extra_mb = _peak_growth_mb(gz_path, folder / "cache-mem")
        print(
            f"run {x}x{y}x{z}x{t} int16: {os.path.getsize(gz_path) / 1e6:.0f} MB .nii.gz, "
            f"{x * y * z * t * 2 / 1e6:.0f} MB raw, cache {x * y * z * t * 4 / 1e6:.0f} MB; "
            f"peak resident growth during a first open {extra_mb:.0f} MB (separate process; "
            f"includes the cache file's mapped pages)"
        )
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return rows


if __name__ == "__main__":
    for row in main():
        print(row)
