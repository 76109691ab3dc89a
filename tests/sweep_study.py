"""A small generated BIDS study for the sweep's tests and benchmark (invented data).

Raw dataset (events, the task's sidecar with RepetitionTime, the raw runs) and a
derivatives dataset ``derivatives/prep`` (preprocessed runs as ``.nii``, brain masks,
confounds tables with the six motion parameters and framewise displacement). Each run is
a 3 mm grid with an ellipsoid brain and block events of one condition ``go``. Planted:

- a real response (double-gamma shaped, from scipy's gamma density, not voxelscope's
  kernels) in a 3x3x3 blob at the centre of the brain, in every run of every subject;
- in the first run of subject ``02`` (``ARTIFACT``): head motion locked to the task
  (``trans_x`` drifts during each block and settles after it) that shows as signal at a
  small patch on the brain's edge (``EDGE_PATCH``), the way a moving head changes the
  intensity at a boundary.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
from scipy import stats

SHAPE = (14, 14, 10)
VOXEL_MM = 3.0
TR = 2.0
N_VOLUMES = 100
ONSETS = (10.0, 40.0, 70.0, 100.0, 130.0, 160.0)
DURATION = 12.0
CENTRE = (7, 7, 5)  # the real response's blob (voxel indices)
EDGE_PATCH = ((12, 6, 4), (12, 7, 4), (12, 6, 5), (12, 7, 5), (11, 6, 4), (11, 7, 4))
ARTIFACT = ("02", "1")  # subject, run
AFFINE = np.array(
    [[VOXEL_MM, 0, 0, -20.0], [0, VOXEL_MM, 0, -20.0], [0, 0, VOXEL_MM, -10.0], [0, 0, 0, 1]]
)


def brain_mask(shape: tuple[int, int, int] = SHAPE) -> np.ndarray:
    """The ellipsoid brain (every run's mask), filling most of the grid."""
    i, j, k = np.indices(shape, dtype=float)
    c = (np.array(shape) - 1) / 2.0
    radii = c * np.array([6.0 / 6.5, 6.0 / 6.5, 4.4 / 4.5])
    r = ((i - c[0]) / radii[0]) ** 2 + ((j - c[1]) / radii[1]) ** 2 + ((k - c[2]) / radii[2]) ** 2
    return r <= 1.0


def _onsets(n_volumes: int) -> tuple[float, ...]:
    """The blocks every 30 s that fit in the run (``ONSETS`` for the default length)."""
    return tuple(float(on) for on in np.arange(10.0, n_volumes * TR - 20.0, 30.0))


def _boxcar(n_volumes: int = N_VOLUMES) -> np.ndarray:
    t = np.arange(n_volumes) * TR
    box = np.zeros(n_volumes)
    for on in _onsets(n_volumes):
        box[(t >= on) & (t < on + DURATION)] = 1.0
    return box


def _response(n_volumes: int = N_VOLUMES) -> np.ndarray:
    """Block regressor: the boxcar on a 0.1 s grid convolved with a double-gamma shape
    (peak 6 s, undershoot 16 s, ratio 1/6; common practice), sampled at each volume."""
    dt = 0.1
    t = np.arange(0, n_volumes * TR, dt)
    box = np.zeros(t.size)
    for on in _onsets(n_volumes):
        box[(t >= on) & (t < on + DURATION)] = 1.0
    h_t = np.arange(0, 32, dt)
    h = stats.gamma.pdf(h_t, 6) - stats.gamma.pdf(h_t, 16) / 6.0
    x = np.convolve(box, h)[: t.size] * dt
    x = x[:: round(TR / dt)][:n_volumes]
    return x / x.max()


def _write_json(path: Path, obj) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj))


def make_study(
    root: Path,
    subjects: int = 3,
    runs: int = 2,
    broken: bool = False,
    seed: int = 7,
    shape: tuple[int, int, int] = SHAPE,
    n_volumes: int = N_VOLUMES,
) -> Path:
    """Write the study under ``root`` (created); returns ``root``.

    ``broken`` adds subject ``09`` whose only preprocessed run is not a NIfTI file. Another
    ``shape`` or ``n_volumes`` (the benchmark's bigger runs) keeps the real response at the
    grid's centre and plants no artifact.
    """
    assert np.allclose(_onsets(N_VOLUMES), ONSETS)
    rng = np.random.default_rng(seed)
    root = Path(root)
    _write_json(root / "dataset_description.json", {"Name": "sweep test", "BIDSVersion": "1.8.0"})
    _write_json(root / "task-go_bold.json", {"RepetitionTime": TR, "TaskName": "go"})
    prep = root / "derivatives" / "prep"
    _write_json(
        prep / "dataset_description.json",
        {"Name": "prep", "BIDSVersion": "1.8.0", "DatasetType": "derivative"},
    )
    mask = brain_mask(shape)
    x = _response(n_volumes)
    centre = tuple(n // 2 for n in shape)
    artifact = ARTIFACT if tuple(shape) == SHAPE else None
    # the head drifts during each block and settles after it: the boxcar 4 s later, smoothed
    drift = np.convolve(np.roll(_boxcar(n_volumes), 2), [0.25, 0.5, 0.25], mode="same")
    events = "onset\tduration\ttrial_type\n" + "".join(
        f"{on:g}\t{DURATION:g}\tgo\n" for on in _onsets(n_volumes)
    )
    for s in range(1, subjects + 1):
        sub = f"{s:02d}"
        for r in range(1, runs + 1):
            stem = f"sub-{sub}_task-go_run-{r}"
            raw_func = root / f"sub-{sub}" / "func"
            raw_func.mkdir(parents=True, exist_ok=True)
            (raw_func / f"{stem}_events.tsv").write_text(events)
            noise = rng.normal(0.0, 1.0, (*shape, n_volumes)).astype(np.float32)
            data = 100.0 + noise
            ci, cj, ck = centre
            data[ci - 1 : ci + 2, cj - 1 : cj + 2, ck - 1 : ck + 2, :] += 1.6 * x
            motion = rng.normal(0.0, 0.02, (n_volumes, 6))
            if (sub, str(r)) == artifact:
                motion[:, 0] += 0.6 * drift  # trans_x follows the blocks
                for v in EDGE_PATCH:
                    data[v] += 4.0 * motion[:, 0] / 0.6
            data[~mask] = 0.0
            img = nib.Nifti1Image(data.astype(np.float32), AFFINE)
            img.header.set_xyzt_units("mm", "sec")
            img.header["pixdim"][4] = TR
            nib.save(img, raw_func / f"{stem}_bold.nii.gz")
            func = prep / f"sub-{sub}" / "func"
            func.mkdir(parents=True, exist_ok=True)
            nib.save(img, func / f"{stem}_space-T1w_desc-preproc_bold.nii")
            m = nib.Nifti1Image(mask.astype(np.uint8), AFFINE)
            nib.save(m, func / f"{stem}_space-T1w_desc-brain_mask.nii.gz")
            names = ["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"]
            diff = np.vstack([np.zeros((1, 6)), np.diff(motion, axis=0)])
            fd = np.abs(diff[:, :3]).sum(axis=1) + 50.0 * np.abs(diff[:, 3:]).sum(axis=1)
            lines = ["\t".join([*names, "framewise_displacement"])]
            for t in range(n_volumes):
                fd_text = "n/a" if t == 0 else f"{fd[t]:.6f}"
                lines.append("\t".join([*(f"{v:.6f}" for v in motion[t]), fd_text]))
            (func / f"{stem}_desc-confounds_timeseries.tsv").write_text("\n".join(lines) + "\n")
    if broken:
        sub = "09"
        stem = f"sub-{sub}_task-go_run-1"
        raw_func = root / f"sub-{sub}" / "func"
        raw_func.mkdir(parents=True, exist_ok=True)
        (raw_func / f"{stem}_events.tsv").write_text(events)
        func = prep / f"sub-{sub}" / "func"
        func.mkdir(parents=True, exist_ok=True)
        (func / f"{stem}_space-T1w_desc-preproc_bold.nii").write_bytes(b"not an image" * 40)
    return root
