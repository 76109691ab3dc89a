"""Benchmarks of whole-volume maps (voxelscope.core.maps and ``voxelscope map``).

Rows (``name, ours_s, reference_s, ratio, goal, ok``), all measured in this run:

* OLS map of a 64x64x40x300 float32 ``.nii`` run (memory-mapped, every voxel) against one
  streaming pass over the same array (``data.sum(axis=-1)``): goal ratio <= 4. Not
  reachable with two matrix products over the data on a 2-core machine; the info row
  "two GEMMs floor vs sum" times the least any such fit does (plain NumPy on an in-memory
  voxel-major float32 copy, 512-voxel chunks, float64, one BLAS thread: convert, centre,
  total sum of squares, ``B = pinv @ Y``, ``R = Y - X @ B`` in place, residual sum of
  squares; no t, no output maps), and "OLS t map vs floor" says how close the map is.
* The same map against the plain NumPy script a user would write (load with nibabel in
  float64, pinv of the design times the data reshaped to (T, V), residuals, t): goal >= 20x.
* AR(1) map (exact per-voxel rho) against a per-voxel statsmodels GLSAR loop, timed on 50 voxels
  and extrapolated to the mask: goal >= 100x.
* Peak memory of ``voxelscope map`` in a subprocess on the uncompressed run, relative to
  the data size, two ways. The peak RSS (``VmHWM``) counts the pages of the memory-mapped
  run, which are the kernel's page cache (file-backed, shared, reclaimable), not memory the
  program allocated; the anonymous peak (``RssAnon`` of ``/proc/<pid>/status``, sampled
  every few ms) is the program's own memory. Goal <= 1.25 for each; the anonymous peak is
  also given net of the interpreter's own (the same imports, no work), for information.
* The same map and memory rows for a larger 97x115x97x200 run (about 0.87 GB).

Run: ``python tests/benchmarks/run.py maps`` or ``python tests/benchmarks/bench_maps.py``.
"""

from __future__ import annotations

import gc
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

TR = 2.0


def _events(n_volumes: int) -> str:
    rows = ["onset\tduration\ttrial_type"]
    t, k = 8.0, 0
    while t + 15 < n_volumes * TR:
        rows.append(f"{t:g}\t15\t{'tone' if k % 2 == 0 else 'tap'}")
        t += 15 + 12 + (k % 3) * 3
        k += 1
    return "\n".join(rows) + "\n"


def _make_run(folder: Path, shape: tuple[int, int, int], n: int, seed: int = 0) -> Path:
    """Raw-BOLD-like float32 run: mean ~10000, noise, a response in one block of voxels."""
    rng = np.random.default_rng(seed)
    data = np.empty((*shape, n), dtype=np.float32, order="F")
    base = rng.normal(10000, 300, shape).astype(np.float32)
    for t in range(n):  # volume by volume, to keep the generator's memory small
        data[..., t] = base + rng.standard_normal(shape, dtype=np.float32) * 40
    x0, y0, z0 = (s // 3 for s in shape)
    data[x0 : 2 * x0, y0 : 2 * y0, z0 : 2 * z0, :] += np.float32(30) * np.sin(
        np.arange(n, dtype=np.float32) * 0.2
    )
    name = f"sub-b{shape[0]}_task-x_bold.nii"
    img = nib.Nifti1Image(data, np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    path = folder / name
    nib.save(img, path)
    (folder / name.replace("_bold.nii", "_events.tsv")).write_text(_events(n))
    del data, img
    gc.collect()
    return path


def _best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def _setup(path: Path):
    from voxelscope.core.events import read_events
    from voxelscope.core.model import Analysis, ModelSettings
    from voxelscope.core.run import open_run

    run = open_run(path, use_cache=False)
    a = Analysis(
        read_events(path.with_name(path.name.replace("_bold.nii", "_events.tsv"))),
        run.n_volumes,
        run.tr,
    )
    return run, a, ModelSettings(contrast="tone")


def _user_script(path: Path, X: np.ndarray, c: np.ndarray) -> np.ndarray:
    """What a user would write: nibabel in float64, pinv, residuals, t for every voxel."""
    img = nib.load(path)
    data = img.get_fdata()
    n = data.shape[-1]
    Y = data.reshape(-1, n).T
    pinv = np.linalg.pinv(X)
    B = pinv @ Y
    R = Y - X @ B
    df = n - np.linalg.matrix_rank(X)
    sigma2 = (R**2).sum(axis=0) / df
    var = sigma2 * (c @ np.linalg.inv(X.T @ X) @ c)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (c @ B) / np.sqrt(var)
    return t.reshape(data.shape[:3])


def _glsar_per_voxel(run, a, s, n_sample: int = 50) -> float:
    import statsmodels.api as sm

    X = a.design("double-gamma", s).X
    w = a.contrast_weights("double-gamma", s)
    rng = np.random.default_rng(1)
    flat = np.sort(rng.choice(int(np.prod(run.shape)), n_sample, replace=False))
    Y = run.timeseries_many(flat).astype(np.float64)
    t0 = time.perf_counter()
    for y in Y:
        g = sm.GLSAR(y, X, rho=1).iterative_fit(maxiter=2)
        g.t_test(w)
    return (time.perf_counter() - t0) / n_sample


def _status_kb(pid: int) -> dict[str, int]:
    try:
        with open(f"/proc/{pid}/status") as fh:
            lines = fh.read().splitlines()
    except OSError:
        return {}
    out = {}
    for line in lines:
        key, _, rest = line.partition(":")
        if key in ("VmHWM", "VmRSS", "RssAnon", "RssFile", "RssShmem"):
            out[key] = int(rest.split()[0])
    return out


def _peak_memory(args: list[str]) -> dict[str, int]:
    """Peak memory (bytes) of a child process: ``hwm`` (peak RSS, VmHWM, with file-backed
    pages), ``anon`` (peak RssAnon, sampled every 2 ms) and ``file`` (RssFile at that peak
    of RSS), read from /proc/<pid>/status while the child runs."""
    proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak = {"hwm": 0, "anon": 0, "file": 0, "rss": 0}
    while proc.poll() is None:
        st = _status_kb(proc.pid)
        if st:
            peak["hwm"] = max(peak["hwm"], st.get("VmHWM", 0))
            peak["anon"] = max(peak["anon"], st.get("RssAnon", 0))
            if st.get("VmRSS", 0) > peak["rss"]:
                peak["rss"], peak["file"] = st["VmRSS"], st.get("RssFile", 0)
        time.sleep(0.002)
    err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
    if proc.returncode != 0:
        raise RuntimeError(f"child failed: {err[-2000:]}")
    return {k: v * 1024 for k, v in peak.items()}


def _memory_rows(path: Path, label: str) -> list[tuple]:
    data_bytes = int(np.prod(nib.load(path).shape)) * 4
    out = path.with_name(path.name.replace("_bold.nii", "_t.nii"))
    cmd = [sys.executable, "-m", "voxelscope.cli", "map", str(path), "-o", str(out), "--force"]
    peak = _peak_memory(cmd)
    base = _peak_memory(
        [
            sys.executable,
            "-c",
            "import time, voxelscope.cli.map, voxelscope.core.maps, "
            "voxelscope.core.run, voxelscope.core.events, scipy.stats, scipy.ndimage; "
            "time.sleep(0.2)",
        ]
    )
    mb = 2**20
    hwm = peak["hwm"] / data_bytes
    anon = peak["anon"] / data_bytes
    net = (peak["anon"] - base["anon"]) / data_bytes
    return [
        (
            f"{label}: voxelscope map peak RSS {peak['hwm'] / mb:.0f} MB (with "
            f"{peak['file'] / mb:.0f} MB file-backed run pages) / data {data_bytes / mb:.0f} MB",
            None,
            None,
            hwm,
            "<= 1.25",
            hwm <= 1.25,
        ),
        (
            f"{label}: voxelscope map anonymous peak {peak['anon'] / mb:.0f} MB / data",
            None,
            None,
            anon,
            "<= 1.25",
            anon <= 1.25,
        ),
        (
            f"{label}: anonymous peak net of interpreter+imports ({base['anon'] / mb:.0f} MB "
            f"anon, {base['hwm'] / mb:.0f} MB RSS) / data",
            None,
            None,
            net,
            "(info)",
            None,
        ),
    ]


def _floor(arr: np.ndarray, X: np.ndarray, chunk: int = 512) -> float:
    """Two-GEMM floor: the least work of any fit, on an in-memory voxel-major copy."""
    from threadpoolctl import threadpool_limits

    T = arr.shape[-1]
    rows = np.ascontiguousarray(arr.reshape(-1, T))  # voxel-major float32, in memory
    pinv = np.linalg.pinv(X)

    def once() -> None:
        R = np.empty((T, chunk))
        for v0 in range(0, rows.shape[0], chunk):
            Y = rows[v0 : v0 + chunk].T.astype(np.float64, order="K")
            Y -= Y.sum(axis=0) / T
            np.einsum("ij,ij->j", Y, Y)
            B = pinv @ Y
            out = R[:, : Y.shape[1]]
            np.matmul(X, B, out=out)
            np.subtract(Y, out, out=out)
            np.einsum("ij,ij->j", out, out)

    with threadpool_limits(1, user_api="blas"):
        once()
        return _best(once, 3)


def _map_rows(path: Path, label: str, with_reference: bool) -> list[tuple]:
    from voxelscope.core.maps import compute_map

    run, a, s = _setup(path)
    mask = np.ones(run.shape, dtype=bool)
    arr = np.asarray(nib.load(path).dataobj)  # the same memory-mapped array
    arr.sum(axis=-1)  # page cache warm for both
    t_sum = _best(lambda: arr.sum(axis=-1), 3)
    compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",))  # warm-up
    t_map = _best(lambda: compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",)), 5)
    rows = [
        (
            f"{label}: OLS t map vs one pass data.sum(axis=-1)",
            t_map,
            t_sum,
            t_map / t_sum,
            "<= 4",
            t_map / t_sum <= 4,
        ),
    ]
    if with_reference:
        X = a.design("double-gamma", s).X
        c = a.contrast_weights("double-gamma", s)
        t_floor = _floor(arr, X)
        rows += [
            (
                f"{label}: two GEMMs floor (numpy, in memory, 1 thread) vs sum",
                t_floor,
                t_sum,
                t_floor / t_sum,
                "(info)",
                None,
            ),
            (
                f"{label}: OLS t map vs two GEMMs floor",
                t_map,
                t_floor,
                t_map / t_floor,
                "(info)",
                None,
            ),
        ]
        t_user = _best(lambda: _user_script(path, X, c), 1)
        ours = compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",)).t
        ref = _user_script(path, X, c)
        assert np.allclose(ours, np.nan_to_num(ref), rtol=1e-4, atol=1e-4), "maps differ"
        rows.append(
            (
                f"{label}: OLS t map vs user numpy script (float64 pinv)",
                t_map,
                t_user,
                t_user / t_map,
                ">= 20x",
                t_user / t_map >= 20,
            )
        )
        s1 = s.with_(noise="ar1")
        t_ar1 = _best(lambda: compute_map(run, a, s1, "double-gamma", mask=mask, stats=("t",)), 2)
        per_voxel = _glsar_per_voxel(run, a, s1)
        t_glsar = per_voxel * int(mask.sum())
        rows.append(
            (
                f"{label}: AR(1) map (exact per-voxel rho) vs GLSAR loop (50 voxels, extrap.)",
                t_ar1,
                t_glsar,
                t_glsar / t_ar1,
                ">= 100x",
                t_glsar / t_ar1 >= 100,
            )
        )
    return rows


def main() -> list[tuple]:
    rows: list[tuple] = []
    with tempfile.TemporaryDirectory(prefix="vxs-bench-maps-") as tmp:
        folder = Path(tmp)
        small = _make_run(folder, (64, 64, 40), 300)
        rows += _map_rows(small, "64x64x40x300", with_reference=True)
        rows += _memory_rows(small, "64x64x40x300")
        small.unlink()
        large = _make_run(folder, (97, 115, 97), 200, seed=2)
        rows += _map_rows(large, "97x115x97x200", with_reference=False)
        rows += _memory_rows(large, "97x115x97x200")
    return rows


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from run import _print_rows

    t0 = time.perf_counter()
    _print_rows(main())
    print(f"({time.perf_counter() - t0:.1f} s)")
