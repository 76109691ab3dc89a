"""Make the voxelscope demo data set: a made-up study of hearing and hand movement.

The study is laid out as a preprocessing pipeline leaves it (see ``FILES`` and the folder's
README): a raw BIDS dataset ``study/`` with the events of two runs, a dataset-level sidecar
(``RepetitionTime`` and the acquisition's ``SliceTiming``) and the anatomy; a derivatives
dataset ``study/derivatives/prep`` with the two preprocessed runs, their sidecars
(``SliceTimingCorrected``, ``StartTime`` = half a TR), brain masks and pipeline-style confound
tables (39 columns, ``n/a`` first rows). Run 1 is described below; run 2 (``N_VOLUMES_2``
volumes, ``BLOCK_ORDER_2``) has the same head, clusters and noise levels, its own blocks and
noise, and no head jolt. Because the runs are slice-time corrected to ``START_TIME_S``, the
events files give each onset ``START_TIME_S`` later than the block timing used below to plant
the responses (which are sampled at ``n * TR``), so that a model sampling at
``n * TR + StartTime`` sees exactly the planted responses.

Run it as ``python sample_data/make_demo.py [--out DIR]`` (default: the folder this script is
in). It needs only numpy, scipy and nibabel, it is deterministic (one fixed seed, numpy's
``default_rng``; gzip streams written with ``mtime=0`` and no file name, so a rerun on the same
machine gives byte-identical files) and it takes a few seconds.

Everything below is synthetic. It is not data from any person, and nothing in it is meant for
clinical use.

The run
-------
* Grid ``SHAPE = (40, 48, 36)`` voxels of ``VOXEL_MM = 4`` mm, ``N_VOLUMES = 224`` volumes,
  ``TR = 1.25`` s (280 s of scanning). Volume ``n`` is taken as acquired at ``n * TR`` seconds;
  there is no slice timing (the sidecar has no ``SliceTiming`` on purpose: every slice is
  treated as acquired at the start of its volume).
* Affine (voxel -> world mm, RAS+): ``diag(4, 4, 4)`` with the world position of voxel (0, 0, 0)
  at ``ORIGIN_MM = (-78, -110, -62)``. So i runs left -> right, j posterior -> anterior, k
  inferior -> superior, and the grid centre (19.5, 23.5, 17.5) sits at world (0, -16, 8) mm.
  qform and sform hold the same affine, both with code 2 ("aligned"); ``xyzt_units`` is mm + s;
  ``pixdim[4] = 1.25``.
* Stored as int16 with ``scl_slope = BOLD_SLOPE = 0.25`` and ``scl_inter = 0``: the stored
  integer times 0.25 is the intensity. Voxels outside the head are exactly 0 in every volume.

Conditions and timing (``sub-demo_task-tonetap_events.tsv``)
-------------------------------------------------------------
Eight 15 s blocks (``BLOCK_S``) in the fixed order ``BLOCK_ORDER`` (tap, tap, tone, tap, tone,
tone, tone, tap: tone leans towards the second half of the run, so a slow trend can leak into
it). The first block starts at ``FIRST_ONSET_S = 10`` s; between blocks there are 12 to 18 s of
rest, drawn from the seeded generator in 0.5 s steps (``REST_CHOICES_S``). Rest is not listed in
the events file (BIDS: only the conditions). The last block ends 40 s before the end of the run.

The phantom (underlay)
----------------------
An ellipsoidal head centred at ``HEAD_CENTRE_MM = (0, -16, 8)`` with semi-axes
``HEAD_SEMI_MM = (68, 84, 60)``, defined as a function of world position so that the run and
the anatomical-like image agree in world space. With ``r`` the normalised ellipsoid radius:

* ``0.90 < r <= 1``: an outer fluid-like layer (zone 1);
* ``0.72 + wobble < r <= 0.90``: grey-matter-like cortex (zone 2); ``wobble`` is a smooth
  sum of sines of the direction (up to about +-0.05) that folds the inner boundary;
* inside that: white-matter-like core (zone 3), with two small fluid-filled "ventricles"
  (zone 4, ellipsoids of semi-axes ``VENTRICLE_SEMI_MM`` at ``VENTRICLE_OFFSETS_MM`` from the
  centre).

Run baseline intensities (``BOLD_LEVELS``): outer 1150, grey 1000, white 850, ventricle 1200,
times a smooth world-space field ``1 + 0.05 * field`` (field in [-1, 1]), averaged over 3x3x3
sub-voxel points so that edge voxels get partial-volume values. Zero outside the head.

Noise and slow signals everywhere in the head
---------------------------------------------
* White Gaussian noise, standard deviation ``WHITE_NOISE_FRAC = 1 %`` of the voxel's baseline.
* A global linear drift of ``GLOBAL_DRIFT_FRAC = 0.3 %`` end to end.

Responses
---------
Double-gamma HRF of our own (``double_gamma``): ``gamma.pdf(t, 6) - gamma.pdf(t, 16) / 6``
(scale 1 s; peak at 5 s, undershoot ratio 1/6). A block regressor is the boxcar convolved with
it on a 1/20 TR grid and divided by the HRF area, so that a sustained block reaches a plateau of
1.0; an amplitude of 2.5 % therefore means 2.5 % signal change at the plateau. Each cluster is a
ball of radius ``radius_vox`` voxels; inside it a feature's weight is
``exp(-d**2 / (2 * (radius / 1.5)**2))`` at distance ``d`` voxels from the centre (1 at the
centre, about 0.32 at the edge), 0 outside.

Planted features (``FEATURES``; also in ``demo_truth.json`` and ``demo_marks.tsv``)
------------------------------------------------------------------------------------
``tone_cluster``   voxel (6, 23, 15), radius 2.5: responds to ``tone``, 2.5 % signal change
                   (``RESPONSE_FRAC``), canonical double-gamma.
``tap_cluster``    voxel (13, 25, 28), radius 2.5: responds to ``tap``, 2.5 %, canonical.
``late_cluster``   voxel (33, 23, 15), radius 2.5: responds to ``tone``, 3 %
                   (``LATE_RESPONSE_FRAC``), with the double-gamma delayed by
                   ``LATE_DELAY_S = 3`` s (impulse peak about 8 s), so the canonical kernel
                   underfits and an FIR model shows the late peak.
``rim_motion``     voxel (26, 40, 25), radius 3: not brain activity. The head "jolts" forward at
                   the start of the 2nd and 4th ``tone`` blocks (``SPIKE_TONE_BLOCKS``): in the
                   first three volumes of those blocks (``SPIKE_OFFSETS``, counted from the
                   first volume at or after the onset) the forward displacement is
                   ``SPIKE_PROFILE = (1.0, 0.3, 0.75)`` times ``SPIKE_MOVE_MM = 1.6`` mm; then
                   the head stays ``HOLD_FRAC = 0.6`` of that forward until the block ends and
                   drifts back over ``RETURN_VOLUMES = 6`` volumes. Edge voxels of the head
                   (in-head voxels with a 6-neighbour outside the head) within 3 voxels of that
                   point change in proportion: ``SPIKE_JUMP_FRAC = 30 %`` per 1.6 mm, times the
                   ball weight. The spike volumes (``spike_volumes`` in the truth file) are
                   exactly the volumes with a frame-to-frame motion above 1 mm in the confounds
                   file, so the rim "activation" for tone is a motion artefact.
``drift_cluster``  voxel (21, 10, 17), radius 3: no task response; a strong slow trend,
                   ``DRIFT_LINEAR_FRAC = 5 %`` end to end (linear, rising) plus
                   ``DRIFT_QUAD_FRAC = -4 %`` times ``tau**2 - mean(tau**2)`` with ``tau``
                   running from -1 to 1 over the run (dome-shaped); a model without drift terms
                   mistakes it for signal (t about +3 for tone, -3 for tap here).
``noisy_cluster``  voxel (28, 37, 20), radius 2.5: extra AR(1) noise (``AR_RHO = 0.8``,
                   marginal standard deviation ``AR_SD_FRAC = 2 %`` of baseline, independent
                   per voxel, scaled by the ball weight) on top of the white noise, plus a
                   real response to ``tap`` of ``AR_RESPONSE_FRAC = 2.5 %``, weak against that
                   noise. OLS t is inflated here compared with an AR(1) fit.

Confounds (``sub-demo_task-tonetap_confounds.tsv``)
---------------------------------------------------
Columns ``move_x``, ``move_y``, ``move_z`` (mm), ``turn_x``, ``turn_y``, ``turn_z`` (degrees)
and ``motion_step_mm``. Each motion column is a slow, smoothed random wander (a few tenths of a
mm or degree) plus the forward jolt of ``rim_motion`` in ``move_y`` (times
``SPIKE_MOVE_MM = 1.6`` mm) and, with the same time course, a nod in ``turn_x`` (times
``SPIKE_TURN_DEG = 0.9`` degrees). ``motion_step_mm`` is the frame-to-frame displacement: the
sum of absolute changes of the three moves plus, for the turns, the arc length on a 50 mm
sphere (common practice; 0 for the first volume). The slow wander is not put into the images;
the jolts are.

The earlier "pipeline" t map (``sub-demo_task-tonetap_pipeline-t.nii.gz``)
--------------------------------------------------------------------------
A float32 t map on the run's grid and affine, as if an earlier analysis had read every onset
one TR (1.25 s) too late. Plain numpy OLS on the run as stored, fitted at every in-head voxel
(0 outside): double-gamma block regressors for tone and tap (onsets + ``PIPELINE_SHIFT_S``),
an intercept, and a discrete cosine drift basis ``cos(pi * k * (2n + 1) / (2N))`` for
``k = 1 .. floor(2 N TR / 128)`` (128 s cutoff, so 4 regressors); contrast: tone.

The anatomical-like image (``sub-demo_T1w.nii.gz``)
---------------------------------------------------
The same phantom sampled on a finer grid, ``T1_SHAPE = (80, 100, 76)`` at 2 mm, with a
different affine: the first voxel axis is flipped (i runs right -> left), the grid is tilted
``T1_TILT_DEG = 6`` degrees about the left-right axis, and its centre sits 3 mm anterior to the
head centre. T1-like contrast (``T1_LEVELS``): outer 350, grey 620, white 880, ventricle 180,
with its own smooth field (6 %) and Gaussian noise of sd ``T1_NOISE = 12``; int16, slope 1.
qform and sform codes 2 (aligned), so it lines up with the run in world space.

Other files
-----------
``sub-demo_task-tonetap_bold.json`` (RepetitionTime, TaskName, TaskDescription),
``demo_truth.json`` (every feature with centre voxel, world position, radius and what it is;
plus TR, number of volumes, shape, affines, spike volumes, block table) and ``demo_marks.tsv``
(x_mm, y_mm, z_mm, title, note: one prepared mark per planted feature).
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import sys
import tempfile
from pathlib import Path

import nibabel as nib
import numpy as np
from scipy import stats

# --------------------------------------------------------------------------- parameters

SEED = 20251201
TR = 1.25
N_VOLUMES = 224
SHAPE = (40, 48, 36)
VOXEL_MM = 4.0
ORIGIN_MM = (-78.0, -110.0, -62.0)
BOLD_SLOPE = 0.25

BLOCK_S = 15.0
FIRST_ONSET_S = 10.0
BLOCK_ORDER = ("tap", "tap", "tone", "tap", "tone", "tone", "tone", "tap")
REST_CHOICES_S = np.arange(12.0, 18.0 + 0.25, 0.5)

HEAD_CENTRE_MM = np.array([0.0, -16.0, 8.0])
HEAD_SEMI_MM = np.array([68.0, 84.0, 60.0])
VENTRICLE_OFFSETS_MM = (np.array([-9.0, 4.0, 6.0]), np.array([9.0, 4.0, 6.0]))
VENTRICLE_SEMI_MM = np.array([5.0, 18.0, 9.0])
ZONE_NAMES = {0: "outside", 1: "outer", 2: "grey", 3: "white", 4: "ventricle"}
BOLD_LEVELS = {1: 1150.0, 2: 1000.0, 3: 850.0, 4: 1200.0}
BOLD_FIELD_FRAC = 0.05

WHITE_NOISE_FRAC = 0.01
GLOBAL_DRIFT_FRAC = 0.003

RESPONSE_FRAC = 0.025
LATE_RESPONSE_FRAC = 0.03
LATE_DELAY_S = 3.0
DRIFT_LINEAR_FRAC = 0.05
DRIFT_QUAD_FRAC = -0.04
AR_RHO = 0.8
AR_SD_FRAC = 0.02
AR_RESPONSE_FRAC = 0.025

SPIKE_TONE_BLOCKS = (1, 3)  # 0-based index among the tone blocks: the 2nd and the 4th
SPIKE_OFFSETS = (0, 1, 2)  # counted from the first volume at or after the block onset
SPIKE_PROFILE = (1.0, 0.3, 0.75)
SPIKE_JUMP_FRAC = 0.30
HOLD_FRAC = 0.6
RETURN_VOLUMES = 6
SPIKE_MOVE_MM = 1.6
SPIKE_TURN_DEG = 0.9
HEAD_RADIUS_FOR_TURNS_MM = 50.0

PIPELINE_SHIFT_S = TR
HIGHPASS_CUTOFF_S = 128.0

T1_SHAPE = (80, 100, 76)
T1_VOXEL_MM = 2.0
T1_TILT_DEG = 6.0
T1_CENTRE_SHIFT_MM = np.array([0.0, 3.0, 0.0])
T1_LEVELS = {1: 350.0, 2: 620.0, 3: 880.0, 4: 180.0}
T1_FIELD_FRAC = 0.06
T1_NOISE = 12.0

HRF_LENGTH_S = 32.0
FINE_STEPS_PER_TR = 20

FEATURES = (
    {
        "name": "tone_cluster",
        "kind": "response",
        "centre_voxel": (6, 23, 15),
        "radius_vox": 2.5,
        "condition": "tone",
        "amplitude_pct": 100 * RESPONSE_FRAC,
        "what": "Real response to tone (left side, temporal), canonical double-gamma, "
        "2.5 % signal change at the block plateau.",
    },
    {
        "name": "tap_cluster",
        "kind": "response",
        "centre_voxel": (13, 25, 28),
        "radius_vox": 2.5,
        "condition": "tap",
        "amplitude_pct": 100 * RESPONSE_FRAC,
        "what": "Real response to tap (left side, top of the head), canonical double-gamma, "
        "2.5 % signal change.",
    },
    {
        "name": "late_cluster",
        "kind": "late_response",
        "centre_voxel": (33, 23, 15),
        "radius_vox": 2.5,
        "condition": "tone",
        "amplitude_pct": 100 * LATE_RESPONSE_FRAC,
        "delay_s": LATE_DELAY_S,
        "what": "Real response to tone (right side, temporal) whose HRF is the canonical one "
        "delayed by 3 s (impulse peak about 8 s): the canonical kernel underfits, FIR shows "
        "the late peak.",
    },
    {
        "name": "rim_motion",
        "kind": "motion_artefact",
        "centre_voxel": (26, 40, 25),
        "radius_vox": 3.0,
        "condition": "tone",
        "amplitude_pct": 100 * SPIKE_JUMP_FRAC,
        "what": "Not brain activity: edge voxels jump in intensity in the first 3 volumes of "
        "the 2nd and 4th tone blocks, when the head jolts forward (and stay a little brighter "
        "while it stays forward until the block ends); the same volumes spike in the "
        "confounds file.",
    },
    {
        "name": "drift_cluster",
        "kind": "drift",
        "centre_voxel": (21, 10, 17),
        "radius_vox": 3.0,
        "condition": None,
        "amplitude_pct": 100 * DRIFT_LINEAR_FRAC,
        "quadratic_pct": 100 * DRIFT_QUAD_FRAC,
        "what": "No task response: strong slow trend (5 % linear rise end to end plus a 4 % "
        "quadratic dome), removed by a drift model, mistaken for signal without one.",
    },
    {
        "name": "noisy_cluster",
        "kind": "autocorrelated_noise",
        "centre_voxel": (28, 37, 20),
        "radius_vox": 2.5,
        "condition": "tap",
        "amplitude_pct": 100 * AR_RESPONSE_FRAC,
        "ar_rho": AR_RHO,
        "ar_sd_pct": 100 * AR_SD_FRAC,
        "what": "Strongly autocorrelated noise (AR(1), rho 0.8, sd 2 % of baseline, per voxel) "
        "plus a real response to tap (2.5 %) that is weak against that noise: OLS t is "
        "inflated compared with an AR(1) fit.",
    },
)

#: The study folder (a raw BIDS dataset with a derivatives dataset under it).
STUDY = "study"
#: The preprocessed runs were slice-time corrected to this time into each volume (BIDS
#: ``StartTime``, with ``SliceTimingCorrected: true``): half a TR.
START_TIME_S = TR / 2
#: Run 2: shorter, its own block order and timing, no head jolt.
N_VOLUMES_2 = 112
BLOCK_ORDER_2 = ("tone", "tap", "tap", "tone")
#: The raw acquisition's slice order (interleaved, odd slices first), for the raw sidecar.
N_SLICES = SHAPE[2]
SPACE = "phantom"
N_COMPCOR = 5

_RAW_FUNC = f"{STUDY}/sub-demo/func"
_PREP_FUNC = f"{STUDY}/derivatives/prep/sub-demo/func"


def _run_files(r: int) -> dict[str, str]:
    stem = f"sub-demo_task-tonetap_run-{r}"
    suffix = "" if r == 1 else str(r)
    return {
        f"bold{suffix}": f"{_PREP_FUNC}/{stem}_space-{SPACE}_desc-preproc_bold.nii.gz",
        f"bold_sidecar{suffix}": f"{_PREP_FUNC}/{stem}_space-{SPACE}_desc-preproc_bold.json",
        f"mask{suffix}": f"{_PREP_FUNC}/{stem}_space-{SPACE}_desc-brain_mask.nii.gz",
        f"confounds{suffix}": f"{_PREP_FUNC}/{stem}_desc-confounds_timeseries.tsv",
        f"events{suffix}": f"{_RAW_FUNC}/{stem}_events.tsv",
    }


FILES = {
    **_run_files(1),
    **_run_files(2),
    "description": f"{STUDY}/dataset_description.json",
    "sidecar": f"{STUDY}/task-tonetap_bold.json",
    "sidecar_events": f"{STUDY}/task-tonetap_events.json",
    "prep_description": f"{STUDY}/derivatives/prep/dataset_description.json",
    "anat": f"{STUDY}/sub-demo/anat/sub-demo_T1w.nii.gz",
    "pipeline_t": "sub-demo_task-tonetap_run-1_pipeline-t.nii.gz",
    "truth": "demo_truth.json",
    "marks": "demo_marks.tsv",
}

# --------------------------------------------------------------------------- geometry


def bold_affine() -> np.ndarray:
    """Voxel -> world (mm) affine of the run: 4 mm, RAS+, origin at ``ORIGIN_MM``."""
    aff = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    aff[:3, 3] = ORIGIN_MM
    return aff


def t1_affine() -> np.ndarray:
    """Voxel -> world affine of the anatomical-like image: 2 mm, i flipped, tilted about x."""
    a = np.deg2rad(T1_TILT_DEG)
    rot = np.array([[1.0, 0.0, 0.0], [0.0, np.cos(a), -np.sin(a)], [0.0, np.sin(a), np.cos(a)]])
    lin = rot @ np.diag([-T1_VOXEL_MM, T1_VOXEL_MM, T1_VOXEL_MM])
    centre_vox = (np.array(T1_SHAPE) - 1) / 2.0
    aff = np.eye(4)
    aff[:3, :3] = lin
    aff[:3, 3] = HEAD_CENTRE_MM + T1_CENTRE_SHIFT_MM - lin @ centre_vox
    return aff


def voxel_to_world(aff: np.ndarray, ijk: np.ndarray) -> np.ndarray:
    """Apply ``aff`` to voxel coordinates of shape (..., 3)."""
    ijk = np.asarray(ijk, dtype=float)
    return ijk @ aff[:3, :3].T + aff[:3, 3]


def grid_world(aff: np.ndarray, shape: tuple[int, int, int], sub: int) -> np.ndarray:
    """World positions of ``sub**3`` sub-voxel points per voxel: array (*shape, sub**3, 3)."""
    offs = (np.arange(sub) + 0.5) / sub - 0.5
    so = np.stack(np.meshgrid(offs, offs, offs, indexing="ij"), axis=-1).reshape(-1, 3)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), axis=-1)
    pts = ijk[..., None, :] + so
    return voxel_to_world(aff, pts)


# --------------------------------------------------------------------------- phantom


def zones(xyz: np.ndarray) -> np.ndarray:
    """Tissue zone (0 outside, 1 outer, 2 grey, 3 white, 4 ventricle) at world points (..., 3)."""
    u = (xyz - HEAD_CENTRE_MM) / HEAD_SEMI_MM
    r = np.sqrt(np.sum(u * u, axis=-1))
    n = u / np.maximum(r, 1e-9)[..., None]
    wobble = 0.03 * np.sin(7.0 * n[..., 0] + 1.3) * np.cos(6.0 * n[..., 1] + 0.4) + 0.02 * np.sin(
        9.0 * n[..., 2] + 2.1
    ) * np.cos(5.0 * n[..., 0])
    z = np.zeros(r.shape, dtype=np.int8)
    z[r <= 1.0] = 1
    z[r <= 0.90] = 2
    z[r <= 0.72 + wobble] = 3
    for off in VENTRICLE_OFFSETS_MM:
        v = (xyz - HEAD_CENTRE_MM - off) / VENTRICLE_SEMI_MM
        z[np.sum(v * v, axis=-1) <= 1.0] = 4
    return z


def smooth_field(xyz: np.ndarray, rng: np.random.Generator, n_terms: int = 4) -> np.ndarray:
    """A smooth field in [-1, 1]: mean of a few random low-frequency plane waves (world space)."""
    out = np.zeros(xyz.shape[:-1])
    for _ in range(n_terms):
        direction = rng.normal(size=3)
        direction /= np.linalg.norm(direction)
        wavelength = rng.uniform(120.0, 260.0)
        phase = rng.uniform(0.0, 2 * np.pi)
        out += np.cos(2 * np.pi * (xyz @ direction) / wavelength + phase)
    return out / n_terms


def phantom_image(
    aff: np.ndarray,
    shape: tuple[int, int, int],
    levels: dict[int, float],
    field_frac: float,
    sub: int,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    """Partial-volume phantom intensities and the zone at each voxel centre."""
    pts = grid_world(aff, shape, sub)
    z = zones(pts)
    lut = np.zeros(5)
    for key, val in levels.items():
        lut[key] = val
    inten = lut[z] * (1.0 + field_frac * smooth_field(pts, rng))
    img = inten.mean(axis=-1)
    centre = zones(
        voxel_to_world(
            aff, np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), axis=-1)
        )
    )
    return img, centre


# --------------------------------------------------------------------------- timing


def make_blocks(
    rng: np.random.Generator, order: tuple[str, ...] = BLOCK_ORDER, n_volumes: int = N_VOLUMES
) -> list[tuple[float, float, str]]:
    """(onset, duration, trial_type) of the blocks, in seconds."""
    blocks = []
    onset = FIRST_ONSET_S
    for i, cond in enumerate(order):
        blocks.append((onset, BLOCK_S, cond))
        if i < len(order) - 1:
            onset += BLOCK_S + float(rng.choice(REST_CHOICES_S))
    end = blocks[-1][0] + BLOCK_S
    if end > n_volumes * TR - 15.0:
        raise RuntimeError("blocks run past the end of the scan; change the seed or N_VOLUMES")
    return blocks


def double_gamma(t: np.ndarray) -> np.ndarray:
    """Our double-gamma HRF: gamma(6) minus gamma(16)/6 densities, scale 1 s; 0 for t < 0."""
    t = np.asarray(t, dtype=float)
    return stats.gamma.pdf(t, 6.0) - stats.gamma.pdf(t, 16.0) / 6.0


def block_regressor(
    blocks: list[tuple[float, float, str]],
    condition: str,
    n_volumes: int = N_VOLUMES,
    tr: float = TR,
    shift_s: float = 0.0,
    delay_s: float = 0.0,
) -> np.ndarray:
    """Boxcar of ``condition`` convolved with the double-gamma, plateau 1, at ``n * tr``.

    ``shift_s`` moves every onset; ``delay_s`` delays the HRF itself.
    """
    dt = tr / FINE_STEPS_PER_TR
    n_fine = n_volumes * FINE_STEPS_PER_TR
    t_fine = np.arange(n_fine) * dt
    box = np.zeros(n_fine)
    for onset, dur, cond in blocks:
        if cond == condition:
            on = onset + shift_s
            box[(t_fine >= on - 1e-9) & (t_fine < on + dur - 1e-9)] = 1.0
    th = np.arange(0.0, HRF_LENGTH_S + delay_s, dt)
    h = double_gamma(th - delay_s)
    conv = np.convolve(box, h)[:n_fine] / h.sum()
    return conv[::FINE_STEPS_PER_TR].copy()


def cosine_drift(n_volumes: int, tr: float, cutoff_s: float) -> np.ndarray:
    """Discrete cosine basis cos(pi*k*(2n+1)/(2N)), k = 1..floor(2*N*tr/cutoff)."""
    k_max = int(np.floor(2.0 * n_volumes * tr / cutoff_s))
    n = np.arange(n_volumes)
    return np.stack(
        [np.cos(np.pi * k * (2 * n + 1) / (2 * n_volumes)) for k in range(1, k_max + 1)], axis=1
    )


def jolt_series(blocks: list[tuple[float, float, str]], n_volumes: int = N_VOLUMES) -> np.ndarray:
    """Forward head displacement in units of ``SPIKE_MOVE_MM``: the jolts and the holds."""
    out = np.zeros(n_volumes)
    tone_blocks = [b for b in blocks if b[2] == "tone"]
    times = np.arange(n_volumes) * TR
    for which in SPIKE_TONE_BLOCKS:
        onset, dur, _ = tone_blocks[which]
        first = int(np.ceil(onset / TR - 1e-9))
        inside = np.flatnonzero((times >= onset) & (times < onset + dur))
        out[inside] = HOLD_FRAC
        back = inside[-1] + 1 + np.arange(RETURN_VOLUMES)
        out[back] = HOLD_FRAC * (1.0 - (np.arange(RETURN_VOLUMES) + 1.0) / RETURN_VOLUMES)
        for off, p in zip(SPIKE_OFFSETS, SPIKE_PROFILE):
            out[first + off] = p
    return out


def spike_volumes(blocks: list[tuple[float, float, str]]) -> list[int]:
    """Volume indices of the motion spikes (after the start of the chosen tone blocks)."""
    tone_onsets = [b[0] for b in blocks if b[2] == "tone"]
    vols = []
    for which in SPIKE_TONE_BLOCKS:
        first = int(np.ceil(tone_onsets[which] / TR - 1e-9))
        vols.extend(first + o for o in SPIKE_OFFSETS)
    return vols


# --------------------------------------------------------------------------- building


def ball_weights(centre: tuple[int, int, int], radius: float) -> np.ndarray:
    """Feature weight on the run grid: Gaussian taper inside a ball, 0 outside."""
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in SHAPE], indexing="ij"), axis=-1)
    d2 = np.sum((ijk - np.asarray(centre)) ** 2, axis=-1)
    w = np.exp(-d2 / (2.0 * (radius / 1.5) ** 2))
    w[d2 > radius**2] = 0.0
    return w


def rim_voxels(head: np.ndarray) -> np.ndarray:
    """In-head voxels with at least one 6-neighbour outside the head (or off the grid)."""
    pad = np.pad(head, 1, constant_values=False)
    inner = np.ones_like(head)
    for ax in range(3):
        for step in (-1, 1):
            inner &= np.roll(pad, step, axis=ax)[1:-1, 1:-1, 1:-1]
    return head & ~inner


def ar1(rng: np.random.Generator, n_series: int, n_time: int, rho: float) -> np.ndarray:
    """Stationary AR(1) series with unit marginal variance, shape (n_series, n_time)."""
    e = rng.normal(size=(n_series, n_time))
    out = np.empty_like(e)
    out[:, 0] = e[:, 0]
    scale = np.sqrt(1.0 - rho**2)
    for t in range(1, n_time):
        out[:, t] = rho * out[:, t - 1] + scale * e[:, t]
    return out


def make_confounds(rng: np.random.Generator, jolt: np.ndarray) -> np.ndarray:
    """Motion parameters (3 moves in mm, 3 turns in degrees) and frame-to-frame motion."""
    n_volumes = jolt.size
    kernel = np.hanning(25)
    kernel /= kernel.sum()
    walk = np.cumsum(rng.normal(scale=0.02, size=(n_volumes + 24, 6)), axis=0)
    slow = np.stack([np.convolve(walk[:, c], kernel, mode="valid") for c in range(6)], axis=1)
    slow -= slow[0]
    motion = slow[:n_volumes].copy()
    motion[:, 1] += jolt * SPIKE_MOVE_MM
    motion[:, 3] += jolt * SPIKE_TURN_DEG
    step = np.zeros(n_volumes)
    d = np.abs(np.diff(motion, axis=0))
    step[1:] = d[:, :3].sum(axis=1) + np.deg2rad(d[:, 3:]).sum(axis=1) * HEAD_RADIUS_FOR_TURNS_MM
    return np.column_stack([motion, step])


def confound_table(
    motion: np.ndarray, series: np.ndarray, zone: np.ndarray
) -> tuple[list[str], list[list[str]]]:
    """A confounds table as preprocessing pipelines write them (BIDS derivatives style).

    ``motion``: the (T, 7) array of :func:`make_confounds`; ``series``: (in-head voxels, T)
    intensities; ``zone``: their zone (1 outer, 2 grey, 3 white, 4 ventricle). Columns:

    * ``global_signal``, ``csf`` (ventricles), ``white_matter``: mean intensity per volume;
    * ``trans_x/y/z`` (mm) and ``rot_x/y/z`` (radians), with ``_derivative1`` (backward
      difference, ``n/a`` in the first row), ``_power2`` and ``_derivative1_power2``: the
      24-parameter motion model (Friston et al. 1996, with differences in place of the
      values one volume earlier, common practice);
    * ``framewise_displacement``: sum of absolute differences of the translations plus the
      rotations as arc length on a 50 mm sphere (Power et al. 2012); ``n/a`` first;
    * ``dvars`` (root mean square over the head of the volume-to-volume change) and
      ``std_dvars`` (divided by its median); ``n/a`` first;
    * ``a_comp_cor_00`` .. : the first principal components of the white-matter and
      ventricle time series after removing their means and linear trends (Behzadi et al.
      2007), unit variance;
    * ``cosine00`` ..: the discrete cosine drift basis for a 128 s cutoff.
    """
    n = motion.shape[0]
    trans = motion[:, 0:3]
    rot = np.deg2rad(motion[:, 3:6])
    cols: list[tuple[str, np.ndarray]] = []
    cols.append(("global_signal", series.mean(axis=0)))
    cols.append(("csf", series[zone == 4].mean(axis=0)))
    cols.append(("white_matter", series[zone == 3].mean(axis=0)))
    names = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z")
    values = np.column_stack([trans, rot])
    for j, name in enumerate(names):
        v = values[:, j]
        d = np.concatenate([[np.nan], np.diff(v)])
        cols += [
            (name, v),
            (f"{name}_derivative1", d),
            (f"{name}_power2", v**2),
            (f"{name}_derivative1_power2", d**2),
        ]
    fd = np.concatenate(
        [
            [np.nan],
            np.abs(np.diff(trans, axis=0)).sum(axis=1)
            + HEAD_RADIUS_FOR_TURNS_MM * np.abs(np.diff(rot, axis=0)).sum(axis=1),
        ]
    )
    cols.append(("framewise_displacement", fd))
    dv = np.sqrt(np.mean(np.diff(series, axis=1) ** 2, axis=0))
    cols.append(("dvars", np.concatenate([[np.nan], dv])))
    cols.append(("std_dvars", np.concatenate([[np.nan], dv / np.median(dv)])))
    noise = series[(zone == 3) | (zone == 4)].astype(np.float64)
    tt = np.column_stack([np.ones(n), np.linspace(-1.0, 1.0, n)])
    resid = noise.T - tt @ np.linalg.lstsq(tt, noise.T, rcond=None)[0]
    u, _, _ = np.linalg.svd(resid, full_matrices=False)
    for k in range(N_COMPCOR):
        comp = u[:, k] * np.sign(u[np.argmax(np.abs(u[:, k])), k])  # a fixed sign
        cols.append((f"a_comp_cor_{k:02d}", comp / comp.std()))
    for k, c in enumerate(cosine_drift(n, TR, HIGHPASS_CUTOFF_S).T):
        cols.append((f"cosine{k:02d}", c))
    header = [c[0] for c in cols]
    rows = [
        ["n/a" if not np.isfinite(c[1][t]) else f"{c[1][t]:.6g}" for c in cols] for t in range(n)
    ]
    return header, rows


def ols_t(y: np.ndarray, x: np.ndarray, contrast: np.ndarray) -> np.ndarray:
    """Plain OLS t of ``contrast`` for each column of ``y`` (time x voxels)."""
    xtx_inv = np.linalg.inv(x.T @ x)
    beta = xtx_inv @ (x.T @ y)
    resid = y - x @ beta
    df = x.shape[0] - np.linalg.matrix_rank(x)
    s2 = np.sum(resid**2, axis=0) / df
    var_c = float(contrast @ xtx_inv @ contrast)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (contrast @ beta) / np.sqrt(s2 * var_c)
    return np.where(s2 > 0, t, 0.0)


# --------------------------------------------------------------------------- writing


def _atomic_write(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.name, suffix=".part")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _nifti_gz_bytes(img: nib.Nifti1Image) -> bytes:
    # gzip without time stamp or file name: reproducible bytes
    return gzip.compress(img.to_bytes(), compresslevel=9, mtime=0)


def _nifti(
    data: np.ndarray,
    aff: np.ndarray,
    zooms: tuple[float, ...],
    slope: float | None,
    descrip: str,
) -> nib.Nifti1Image:
    img = nib.Nifti1Image(data, aff)
    hdr = img.header
    hdr.set_qform(aff, code=2)
    hdr.set_sform(aff, code=2)
    hdr.set_xyzt_units("mm", "sec")
    hdr.set_zooms(zooms)
    if slope is not None:
        hdr.set_slope_inter(slope, 0.0)
    hdr["descrip"] = descrip.encode("ascii")
    return img


def _tsv(header: list[str], rows: list[list[str]]) -> bytes:
    lines = ["\t".join(header)] + ["\t".join(r) for r in rows]
    return ("\n".join(lines) + "\n").encode("utf-8")


def _marks(features: list[dict], spikes: list[int]) -> list[list[str]]:
    notes = {
        "tone_cluster": (
            "Hearing area, left",
            "A clean response to tone: the signal rises about 5 s after each tone block "
            "starts and the double-gamma fit follows it closely.",
        ),
        "tap_cluster": (
            "Hand area, left",
            "Responds to tap only. Compare the kernels here: boxcar fits worst, the smooth "
            "kernels agree.",
        ),
        "late_cluster": (
            "Hearing area, right: late peak",
            "Responds to tone but about 3 s later than the left side. The canonical fit "
            "lags the data; FIR (on for this mark) shows the peak near 8 s.",
        ),
        "rim_motion": (
            "Edge blob: motion, not brain",
            "Looks like a tone activation at the front edge. Open the confounds: volumes "
            + ", ".join(str(v) for v in spikes)
            + " spike right after two tone blocks start. Check which volumes drive the t.",
        ),
        "drift_cluster": (
            "Back of the head: slow drift",
            "No task response, just a slow trend. Turn the drift model off and it shows up "
            "in the map; turn it back on and it goes away.",
        ),
        "noisy_cluster": (
            "Right front: noisy, weak tap",
            "Strongly autocorrelated residuals. The OLS t looks good, the AR(1) t is "
            "clearly smaller: trust the AR(1) one here.",
        ),
    }
    # the model each mark was made under (only the settings that differ from the defaults;
    # no confound columns, as the window starts)
    tone = {"contrast": "tone", "confound_columns": []}
    tap = {"contrast": "tap", "confound_columns": []}
    models = {
        "tone_cluster": tone,
        "tap_cluster": tap,
        "late_cluster": {**tone, "kernels": ["boxcar", "gaussian", "gamma", "double-gamma", "fir"]},
        "rim_motion": tone,
        "drift_cluster": tone,
        "noisy_cluster": {**tap, "noise": "ar1"},
    }
    aff = bold_affine()
    rows = []
    for f in features:
        x, y, z = voxel_to_world(aff, np.array(f["centre_voxel"]))
        title, note = notes[f["name"]]
        rows.append([f"{x:.1f}", f"{y:.1f}", f"{z:.1f}", title, note, _model(models[f["name"]])])
    # the earlier t map, at the late cluster where the shift matters most
    x, y, z = voxel_to_world(aff, np.array(FEATURES[2]["centre_voxel"]))
    rows.append(
        [
            f"{x:.1f}",
            f"{y:.1f}",
            f"{z:.1f}",
            "Earlier t map: timing off by one TR",
            "Load the pipeline t map beside our fit. It was made with every onset 1.25 s late, "
            "so it disagrees with us most where the timing matters.",
            _model(tone),
        ]
    )
    # the anatomical underlay: a ventricle is an easy landmark
    vx, vy, vz = HEAD_CENTRE_MM + VENTRICLE_OFFSETS_MM[0]
    rows.append(
        [
            f"{vx:.1f}",
            f"{vy:.1f}",
            f"{vz:.1f}",
            "Underlay check: left ventricle",
            "The fine anatomical image has its own grid (2 mm, flipped and tilted). The "
            "ventricle should sit in the same place in both images.",
            _model(tone),
        ]
    )
    return rows


def _model(settings: dict) -> str:
    """A mark's model cell: one line of JSON (the marks file's ``model`` column)."""
    return json.dumps(settings, separators=(",", ":"))


def generate(out_dir: Path) -> dict[str, Path]:
    """Build every demo file into ``out_dir``; return the written paths by role.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> paths = generate(pathlib.Path(tempfile.mkdtemp()))  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['anat', 'bold', 'confounds', 'events', 'marks', 'pipeline_t', 'sidecar', 'truth']
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    # --- timing
    blocks = make_blocks(rng)
    spikes = spike_volumes(blocks)
    reg = {c: block_regressor(blocks, c) for c in ("tone", "tap")}
    reg_late = block_regressor(blocks, "tone", delay_s=LATE_DELAY_S)
    tau = np.linspace(-1.0, 1.0, N_VOLUMES)

    # --- phantom
    aff = bold_affine()
    s0, centre_zone = phantom_image(aff, SHAPE, BOLD_LEVELS, BOLD_FIELD_FRAC, 3, rng)
    head = s0 > 0
    rim_grid = rim_voxels(head)
    for f in FEATURES:
        c = tuple(f["centre_voxel"])
        ok = rim_grid[c] if f["kind"] == "motion_artefact" else centre_zone[c] in (2, 3)
        if not ok:
            raise RuntimeError(
                f"feature {f['name']} centre is in zone {ZONE_NAMES[int(centre_zone[c])]}"
            )
    idx = np.flatnonzero(head.ravel())
    base = s0.ravel()[idx]

    # --- relative signal change, (voxels, time)
    rel = np.zeros((idx.size, N_VOLUMES))
    rel += GLOBAL_DRIFT_FRAC * tau / 2.0
    weights = {
        f["name"]: ball_weights(f["centre_voxel"], f["radius_vox"]).ravel()[idx] for f in FEATURES
    }
    rel += np.outer(weights["tone_cluster"], RESPONSE_FRAC * reg["tone"])
    rel += np.outer(weights["tap_cluster"], RESPONSE_FRAC * reg["tap"])
    rel += np.outer(weights["late_cluster"], LATE_RESPONSE_FRAC * reg_late)
    rel += np.outer(weights["noisy_cluster"], AR_RESPONSE_FRAC * reg["tap"])
    trend = DRIFT_LINEAR_FRAC * tau / 2.0 + DRIFT_QUAD_FRAC * (tau**2 - np.mean(tau**2))
    rel += np.outer(weights["drift_cluster"], trend)
    rim = rim_grid.ravel()[idx]
    w_rim = weights["rim_motion"] * rim
    jolt = jolt_series(blocks)
    rel += np.outer(w_rim, SPIKE_JUMP_FRAC * jolt)

    # --- noise
    white = rng.normal(size=(idx.size, N_VOLUMES)) * WHITE_NOISE_FRAC
    w_ar = weights["noisy_cluster"]
    in_ar = np.flatnonzero(w_ar > 0)
    coloured = np.zeros_like(white)
    coloured[in_ar] = ar1(rng, in_ar.size, N_VOLUMES, AR_RHO) * AR_SD_FRAC * w_ar[in_ar, None]
    series = base[:, None] * (1.0 + rel + white + coloured)

    stored = np.round(series / BOLD_SLOPE)
    if stored.max() > np.iinfo(np.int16).max or stored.min() < 0:
        raise RuntimeError("run intensities do not fit int16 with the chosen slope")
    vol = np.zeros((int(np.prod(SHAPE)), N_VOLUMES), dtype=np.int16)
    vol[idx] = stored.astype(np.int16)

    # --- confounds
    conf = make_confounds(rng, jolt)

    # --- earlier "pipeline" t map: onsets one TR late, OLS on the stored values
    x = np.column_stack(
        [
            block_regressor(blocks, "tone", shift_s=PIPELINE_SHIFT_S),
            block_regressor(blocks, "tap", shift_s=PIPELINE_SHIFT_S),
            np.ones(N_VOLUMES),
            cosine_drift(N_VOLUMES, TR, HIGHPASS_CUTOFF_S),
        ]
    )
    contrast = np.zeros(x.shape[1])
    contrast[0] = 1.0
    y = (vol[idx].astype(np.float64) * BOLD_SLOPE).T
    tmap = np.zeros(int(np.prod(SHAPE)), dtype=np.float32)
    tmap[idx] = ols_t(y, x, contrast).astype(np.float32)
    tmap = tmap.reshape(SHAPE)

    # --- anatomical-like image
    taff = t1_affine()
    t1, _ = phantom_image(taff, T1_SHAPE, T1_LEVELS, T1_FIELD_FRAC, 2, rng)
    t1_in = t1 > 0
    t1 = t1 + T1_NOISE * rng.normal(size=t1.shape) * t1_in
    t1 = np.where(t1_in, np.clip(np.round(t1), 1, None), 0).astype(np.int16)

    # --- run 2: the same head and clusters, its own blocks and noise, no jolt
    blocks2 = make_blocks(rng, BLOCK_ORDER_2, N_VOLUMES_2)
    reg2 = {c: block_regressor(blocks2, c, n_volumes=N_VOLUMES_2) for c in ("tone", "tap")}
    reg2_late = block_regressor(blocks2, "tone", n_volumes=N_VOLUMES_2, delay_s=LATE_DELAY_S)
    tau2 = np.linspace(-1.0, 1.0, N_VOLUMES_2)
    rel2 = np.zeros((idx.size, N_VOLUMES_2))
    rel2 += GLOBAL_DRIFT_FRAC * tau2 / 2.0
    rel2 += np.outer(weights["tone_cluster"], RESPONSE_FRAC * reg2["tone"])
    rel2 += np.outer(weights["tap_cluster"], RESPONSE_FRAC * reg2["tap"])
    rel2 += np.outer(weights["late_cluster"], LATE_RESPONSE_FRAC * reg2_late)
    rel2 += np.outer(weights["noisy_cluster"], AR_RESPONSE_FRAC * reg2["tap"])
    trend2 = DRIFT_LINEAR_FRAC * tau2 / 2.0 + DRIFT_QUAD_FRAC * (tau2**2 - np.mean(tau2**2))
    rel2 += np.outer(weights["drift_cluster"], trend2)
    white2 = rng.normal(size=(idx.size, N_VOLUMES_2)) * WHITE_NOISE_FRAC
    coloured2 = np.zeros_like(white2)
    coloured2[in_ar] = ar1(rng, in_ar.size, N_VOLUMES_2, AR_RHO) * AR_SD_FRAC * w_ar[in_ar, None]
    stored2 = np.round(base[:, None] * (1.0 + rel2 + white2 + coloured2) / BOLD_SLOPE)
    if stored2.max() > np.iinfo(np.int16).max or stored2.min() < 0:
        raise RuntimeError("run 2 intensities do not fit int16 with the chosen slope")
    vol2 = np.zeros((int(np.prod(SHAPE)), N_VOLUMES_2), dtype=np.int16)
    vol2[idx] = stored2.astype(np.int16)
    conf2 = make_confounds(rng, np.zeros(N_VOLUMES_2))

    # --- write
    paths = {role: out_dir / name for role, name in FILES.items()}
    for p in paths.values():
        p.parent.mkdir(parents=True, exist_ok=True)
    zone_in = centre_zone.ravel()[idx]
    head_mask = _nifti(
        head.astype(np.uint8), aff, (VOXEL_MM,) * 3, None, "brain mask (synthetic phantom)"
    )
    for suffix, v, n_vol, conf_run, blocks_run in (
        ("", vol, N_VOLUMES, conf, blocks),
        ("2", vol2, N_VOLUMES_2, conf2, blocks2),
    ):
        run_no = 1 if not suffix else 2
        _atomic_write(
            paths[f"bold{suffix}"],
            _nifti_gz_bytes(
                _nifti(
                    v.reshape(*SHAPE, n_vol),
                    aff,
                    (VOXEL_MM,) * 3 + (TR,),
                    BOLD_SLOPE,
                    f"voxelscope demo run {run_no} (synthetic)",
                )
            ),
        )
        _atomic_write(paths[f"mask{suffix}"], _nifti_gz_bytes(head_mask))
        prep_sidecar = {
            "RepetitionTime": TR,
            "SliceTimingCorrected": True,
            "StartTime": START_TIME_S,
            "SkullStripped": False,
            "Description": "Synthetic preprocessed run (made by make_demo.py): slice-time "
            "corrected to the middle of each volume.",
        }
        _atomic_write(
            paths[f"bold_sidecar{suffix}"],
            (json.dumps(prep_sidecar, indent=2) + "\n").encode("utf-8"),
        )
        _atomic_write(
            paths[f"events{suffix}"],
            _tsv(
                ["onset", "duration", "trial_type"],
                [[f"{on + START_TIME_S:.3f}", f"{du:.2f}", c] for on, du, c in blocks_run],
            ),
        )
        series_run = v[idx].astype(np.float64) * BOLD_SLOPE
        header, rows = confound_table(conf_run, series_run, zone_in)
        _atomic_write(paths[f"confounds{suffix}"], _tsv(header, rows))
    _atomic_write(
        paths["pipeline_t"],
        _nifti_gz_bytes(
            _nifti(
                tmap, aff, (VOXEL_MM,) * 3, None, "earlier t map, tone, onsets +1 TR (synthetic)"
            )
        ),
    )
    _atomic_write(
        paths["anat"],
        _nifti_gz_bytes(
            _nifti(t1, taff, (T1_VOXEL_MM,) * 3, 1.0, "voxelscope demo anatomy (synthetic)")
        ),
    )
    order = list(range(0, N_SLICES, 2)) + list(range(1, N_SLICES, 2))
    slice_timing = [0.0] * N_SLICES
    for pos, k in enumerate(order):
        slice_timing[k] = round(pos * TR / N_SLICES, 6)
    sidecar = {
        "TaskName": "tonetap",
        "TaskDescription": "Synthetic demo run: listen to tones or tap a finger in 15 s blocks.",
        "RepetitionTime": TR,
        "SliceTiming": slice_timing,
    }
    _atomic_write(paths["sidecar"], (json.dumps(sidecar, indent=2) + "\n").encode("utf-8"))
    # the events' own description (BIDS): the conditions in the study's order, tone first
    events_sidecar = {
        "trial_type": {
            "Description": "What the participant did in the block",
            "Levels": {
                "tone": "listen to a sequence of tones",
                "tap": "tap the right index finger",
            },
        }
    }
    _atomic_write(
        paths["sidecar_events"], (json.dumps(events_sidecar, indent=2) + "\n").encode("utf-8")
    )
    description = {
        "Name": "voxelscope demo: tone and tap (synthetic)",
        "BIDSVersion": "1.8.0",
        "DatasetType": "raw",
        "License": "CC0",
    }
    _atomic_write(paths["description"], (json.dumps(description, indent=2) + "\n").encode("utf-8"))
    prep_description = {
        "Name": "voxelscope demo: preprocessed runs (synthetic)",
        "BIDSVersion": "1.8.0",
        "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "make_demo.py", "Description": "synthetic, no processing"}],
    }
    _atomic_write(
        paths["prep_description"],
        (json.dumps(prep_description, indent=2) + "\n").encode("utf-8"),
    )

    features = []
    for f in FEATURES:
        g = dict(f)
        g["centre_voxel"] = [int(v) for v in f["centre_voxel"]]
        g["centre_mm"] = [round(float(v), 3) for v in voxel_to_world(aff, f["centre_voxel"])]
        g["radius_mm"] = f["radius_vox"] * VOXEL_MM
        g["n_voxels"] = int(
            np.count_nonzero(w_rim if f["kind"] == "motion_artefact" else weights[f["name"]])
        )
        features.append(g)
    features[3]["spike_volumes"] = spikes
    truth = {
        "description": "Synthetic demo run for voxelscope; made by make_demo.py. Not real data.",
        "seed": SEED,
        "tr": TR,
        "n_volumes": N_VOLUMES,
        "shape": list(SHAPE),
        "voxel_mm": VOXEL_MM,
        "affine": aff.tolist(),
        "start_time_s": START_TIME_S,
        "volume_time": "the preprocessed runs are slice-time corrected: volume n shows the "
        "head at n * tr + StartTime seconds; event onsets count from the start of volume 0",
        "bold_scl_slope": BOLD_SLOPE,
        "hrf": "gamma.pdf(t, 6) - gamma.pdf(t, 16) / 6, scale 1 s; block plateau normalised to 1",
        "blocks": [
            {"onset": on + START_TIME_S, "duration": du, "trial_type": c} for on, du, c in blocks
        ],
        "spike_volumes": spikes,
        "runs": [
            {
                "run": 1,
                "n_volumes": N_VOLUMES,
                "bold": FILES["bold"],
                "events": FILES["events"],
                "spike_volumes": spikes,
                "what": "the main run: every feature, head jolts in two tone blocks",
            },
            {
                "run": 2,
                "n_volumes": N_VOLUMES_2,
                "bold": FILES["bold2"],
                "events": FILES["events2"],
                "blocks": [
                    {"onset": on + START_TIME_S, "duration": du, "trial_type": c}
                    for on, du, c in blocks2
                ],
                "spike_volumes": [],
                "what": "a shorter second run: the same responses, drift and noise, no head "
                "jolt, so the rim 'activation' of run 1 is absent (runs disagree there)",
            },
        ],
        "features": features,
        "pipeline_t_map": {
            "file": FILES["pipeline_t"],
            "onset_shift_s": PIPELINE_SHIFT_S,
            "model": "OLS; double-gamma tone and tap, intercept, cosine drift (128 s cutoff, "
            f"{x.shape[1] - 3} regressors); contrast tone; 0 outside the head",
            "what": "t map as if from an earlier analysis whose onsets were one TR late",
        },
        "anatomy": {
            "file": FILES["anat"],
            "shape": list(T1_SHAPE),
            "voxel_mm": T1_VOXEL_MM,
            "affine": taff.tolist(),
            "what": "same phantom on a 2 mm grid, first axis flipped, tilted 6 degrees about "
            "x, centre 3 mm anterior; T1-like contrast",
        },
        "phantom": {
            "head_centre_mm": HEAD_CENTRE_MM.tolist(),
            "head_semi_axes_mm": HEAD_SEMI_MM.tolist(),
            "ventricle_centres_mm": [(HEAD_CENTRE_MM + o).tolist() for o in VENTRICLE_OFFSETS_MM],
            "ventricle_semi_axes_mm": VENTRICLE_SEMI_MM.tolist(),
            "bold_levels": {ZONE_NAMES[k]: v for k, v in BOLD_LEVELS.items()},
            "t1_levels": {ZONE_NAMES[k]: v for k, v in T1_LEVELS.items()},
        },
        "files": dict(FILES),
    }
    _atomic_write(paths["truth"], (json.dumps(truth, indent=2) + "\n").encode("utf-8"))
    _atomic_write(
        paths["marks"],
        _tsv(["x_mm", "y_mm", "z_mm", "title", "note", "model"], _marks(features, spikes)),
    )
    return paths


def main(argv: list[str] | None = None) -> int:
    """Command-line entry: ``python make_demo.py [--out DIR]``."""
    parser = argparse.ArgumentParser(description="Make the voxelscope demo data set.")
    parser.add_argument(
        "--out",
        type=Path,
        default=Path(__file__).resolve().parent,
        help="folder to write into (default: the folder of this script)",
    )
    args = parser.parse_args(argv)
    paths = generate(args.out)
    for p in paths.values():
        print(p)
    return 0


if __name__ == "__main__":
    sys.exit(main())
