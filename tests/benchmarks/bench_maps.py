"""Benchmarks of whole-volume maps (voxelscope.core.maps and ``voxelscope map``).

Rows (``name, ours_s, reference_s, ratio, goal, ok``), all measured in this run, each
comparing like with like:

* Whole-process, side by side (``wholeprocess.py``: fresh interpreters in alternation,
  medians, quartiles of the pairwise ratios): ``voxelscope map`` (OLS t, 64x64x40x300
  float32 ``.nii``) against a script that loads the run with nibabel, makes one pass over
  it (the mean over time) and saves a float32 map: goal <= 2. Info: the same command
  against the plain NumPy script a user would write (nibabel in float64, pinv, residuals,
  t, save), also whole-process; and, against the one-pass script, the default AR(p) map of
  the same run and the OLS map of a run with background (a third of the grid bright: the
  command then keeps the summary pass before the map), and the default map against the
  OLS map, both ``voxelscope map`` (issue 14's ratio as a command has it, whole-process).
* In-process on the same loaded, memory-mapped data (page cache warm for both): the OLS t
  map (``compute_map``) against one streaming pass ``data.sum(axis=-1)``: goal <= 4. Info
  rows give the floors: the least work of a fit with one matrix product over the data
  (centre, total sum of squares, ``Q'Y``, ``rss = tss - ||Q'Y||^2``) and with two
  (``B = pinv Y``, ``R = Y - X B``), both plain NumPy on an in-memory voxel-major copy,
  float64, one BLAS thread, no t, no output maps; and the map against the one-product floor.
* AR(1) map (exact per-voxel rho) against a per-voxel statsmodels GLSAR loop, both
  in-process on the same loaded data, timed on 50 voxels and extrapolated to the mask:
  goal >= 100x.
* Peak memory of ``voxelscope map`` in a subprocess on the uncompressed run, relative to
  the data size, two ways. The peak RSS (``VmHWM``) counts the pages of the memory-mapped
  run, which are the kernel's page cache (file-backed, shared, reclaimable), not memory the
  program allocated; the anonymous peak (``RssAnon`` of ``/proc/<pid>/status``, sampled
  every few ms) is the program's own memory. Goal <= 1.25 for each; the anonymous peak is
  also given net of the interpreter's own (the same imports, no work), for information.
* The in-process map and memory rows for a larger 97x115x97x200 run (about 0.87 GB).

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


def _make_run(
    folder: Path, shape: tuple[int, int, int], n: int, seed: int = 0, bright: float = 1.0
) -> Path:
    """Raw-BOLD-like float32 run: mean ~10000, noise, a response in one block of voxels.

    ``bright < 1``: only an ellipsoid holding about that share of the grid is bright; the
    rest is dim noise (mean 50-400), as around the head of a run in native space.
    """
    rng = np.random.default_rng(seed)
    data = np.empty((*shape, n), dtype=np.float32, order="F")
    base = rng.normal(10000, 300, shape).astype(np.float32)
    sd = np.full(shape, 40, dtype=np.float32)
    if bright < 1.0:
        g = np.meshgrid(*(np.linspace(-1, 1, k) for k in shape), indexing="ij")
        r = (bright * 6 / np.pi) ** (1 / 3)  # an ellipsoid of radius r in the unit cube
        out = sum(gi * gi for gi in g) >= r * r
        base[out] = rng.uniform(50, 400, int(out.sum()))
        sd[out] = 30
    for t in range(n):  # volume by volume, to keep the generator's memory small
        data[..., t] = base + rng.standard_normal(shape, dtype=np.float32) * sd
    x0, y0, z0 = (s // 3 for s in shape)
    data[x0 : 2 * x0, y0 : 2 * y0, z0 : 2 * z0, :] += np.float32(30) * np.sin(
        np.arange(n, dtype=np.float32) * 0.2
    )
    name = f"sub-b{shape[0]}{'' if bright >= 1 else 'bg'}_task-x_bold.nii"
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
    return run, a, ModelSettings(contrast="tone", noise="ols")  # OLS rows; AR rows say so


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


ONE_PASS_SCRIPT = """
import sys

import nibabel as nib
import numpy as np

img = nib.load(sys.argv[1])
data = np.asarray(img.dataobj)  # memory-mapped
mean = (data.sum(axis=-1) / data.shape[-1]).astype(np.float32)  # one pass over the run
nib.save(nib.Nifti1Image(mean, img.affine), sys.argv[2])
"""

USER_SCRIPT = """
import sys

import nibabel as nib
import numpy as np

img = nib.load(sys.argv[1])
X = np.load(sys.argv[2])
c = np.load(sys.argv[3])
data = img.get_fdata()
n = data.shape[-1]
Y = data.reshape(-1, n).T
B = np.linalg.pinv(X) @ Y
R = Y - X @ B
df = n - np.linalg.matrix_rank(X)
var = (R**2).sum(axis=0) / df * (c @ np.linalg.inv(X.T @ X) @ c)
with np.errstate(divide="ignore", invalid="ignore"):
    t = np.nan_to_num((c @ B) / np.sqrt(var)).astype(np.float32)
nib.save(nib.Nifti1Image(t.reshape(data.shape[:3]), img.affine), sys.argv[4])
"""


def _wholeprocess_rows(path: Path, X: np.ndarray, c: np.ndarray, label: str) -> list[tuple]:
    """``voxelscope map`` against the one-pass script and the user's script, whole-process."""
    from wholeprocess import row, side_by_side, voxelscope_cmd

    folder = path.parent
    (folder / "one_pass.py").write_text(ONE_PASS_SCRIPT)
    (folder / "user_script.py").write_text(USER_SCRIPT)
    np.save(folder / "X.npy", X)
    np.save(folder / "c.npy", c)
    ours = voxelscope_cmd(
        "map", str(path), "--kernel", "double-gamma", "--contrast", "tone", "--noise", "ols",
        "-o", str(folder / "ours_t.nii"), "--force",
    )  # fmt: skip
    one = [sys.executable, str(folder / "one_pass.py"), str(path), str(folder / "mean.nii")]
    user = [
        sys.executable, str(folder / "user_script.py"), str(path),
        str(folder / "X.npy"), str(folder / "c.npy"), str(folder / "user_t.nii"),
    ]  # fmt: skip
    pair = side_by_side(ours, one, repeats=11)
    rows = [row(f"{label}: voxelscope map vs load + one pass + save, whole-process", pair, 2.0)]
    pair = side_by_side(ours, user, repeats=3)
    rows.append(row(f"{label}: voxelscope map vs user numpy script, whole-process", pair, None))
    ours_t = np.asarray(nib.load(folder / "ours_t.nii").dataobj)
    user_t = np.asarray(nib.load(folder / "user_t.nii").dataobj)
    assert np.allclose(ours_t, user_t, rtol=1e-4, atol=1e-4), "maps differ"
    return rows


def _info_wholeprocess_rows(path: Path, background: Path, label: str) -> list[tuple]:
    """Info rows, whole-process against the same one-pass script: the default AR(p) map of
    the same run, and the OLS map of a run with background (about a third of the grid
    bright), which keeps the summary's own pass before the map (see DEVELOPERS.md)."""
    from wholeprocess import row, side_by_side, voxelscope_cmd

    folder = path.parent
    rows = []
    for run, noise, what in (
        (path, "arp", "default AR(p) map"),
        (background, "ols", "OLS map of a run with background (1/3 bright, two passes)"),
    ):
        ours = voxelscope_cmd(
            "map", str(run), "--kernel", "double-gamma", "--contrast", "tone", "--noise", noise,
            "-o", str(folder / "info_t.nii"), "--force",
        )  # fmt: skip
        one = [sys.executable, str(folder / "one_pass.py"), str(run), str(folder / "mean.nii")]
        pair = side_by_side(ours, one, repeats=5)
        rows.append(row(f"{label}: {what} vs load + one pass + save", pair, None))
        if noise == "arp":  # like with like for the command: the OLS map, whole-process
            ols = [*ours]
            ols[ols.index("arp")] = "ols"
            pair = side_by_side(ours, ols, repeats=5)
            rows.append(row(f"{label}: {what} vs the OLS map, voxelscope map both", pair, None))
    return rows


def _floor_one(arr: np.ndarray, X: np.ndarray, chunk: int = 1024) -> float:
    """One-product floor: centre, total sum of squares, ``Q'Y`` and ``tss - ||Q'Y||^2``."""
    from threadpoolctl import threadpool_limits

    T = arr.shape[-1]
    rows = np.ascontiguousarray(arr.reshape(-1, T))  # voxel-major float32, in memory
    q = np.linalg.qr(X)[0]

    def once() -> None:
        for v0 in range(0, rows.shape[0], chunk):
            Y = rows[v0 : v0 + chunk].T.astype(np.float64, order="K")
            Y -= Y.sum(axis=0) / T
            tss = np.einsum("ij,ij->j", Y, Y)
            z = q.T @ Y
            tss - np.einsum("ij,ij->j", z, z)

    with threadpool_limits(1, user_api="blas"):
        once()
        return _best(once, 3)


def _floor(arr: np.ndarray, X: np.ndarray, chunk: int = 512) -> float:
    """Two-GEMM floor: the least work of a fit with explicit residuals, on an in-memory
    voxel-major copy."""
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
        t_one = _floor_one(arr, X)
        t_two = _floor(arr, X)
        rows += [
            (
                f"{label}: floor, one product (numpy, in memory, 1 thread) vs sum",
                t_one,
                t_sum,
                t_one / t_sum,
                "(info)",
                None,
            ),
            (
                f"{label}: floor, two products (numpy, in memory, 1 thread) vs sum",
                t_two,
                t_sum,
                t_two / t_sum,
                "(info)",
                None,
            ),
            (
                f"{label}: OLS t map vs one-product floor",
                t_map,
                t_one,
                t_map / t_one,
                "(info)",
                None,
            ),
        ]
        ours = compute_map(run, a, s, "double-gamma", mask=mask, stats=("t",)).t
        ref = _user_script(path, X, a.contrast_weights("double-gamma", s))
        assert np.allclose(ours, np.nan_to_num(ref), rtol=1e-4, atol=1e-4), "maps differ"
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


def main(large: bool = True) -> list[tuple]:
    from wholeprocess import machine_load

    print(machine_load())
    rows: list[tuple] = []
    with tempfile.TemporaryDirectory(prefix="vxs-bench-maps-") as tmp:
        folder = Path(tmp)
        small = _make_run(folder, (64, 64, 40), 300)
        run, a, s = _setup(small)
        X = a.design("double-gamma", s).X
        c = a.contrast_weights("double-gamma", s)
        del run
        rows += _wholeprocess_rows(small, X, c, "64x64x40x300")
        background = _make_run(folder, (64, 64, 40), 300, seed=3, bright=0.35)
        rows += _info_wholeprocess_rows(small, background, "64x64x40x300")
        background.unlink()
        rows += _map_rows(small, "64x64x40x300", with_reference=True)
        rows += _memory_rows(small, "64x64x40x300")
        small.unlink()
        if not large:
            print(machine_load())
            return rows
        large = _make_run(folder, (97, 115, 97), 200, seed=2)
        rows += _map_rows(large, "97x115x97x200", with_reference=False)
        rows += _memory_rows(large, "97x115x97x200")
    print(machine_load())
    return rows


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from run import _print_rows

    t0 = time.perf_counter()
    _print_rows(main(large="--small" not in sys.argv))
    print(f"({time.perf_counter() - t0:.1f} s)")
