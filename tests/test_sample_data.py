"""Checks of the shipped demo data set (sample_data/) and of its generator.

Two kinds of check:

* reproducibility: ``sample_data/make_demo.py`` is run again into a temporary folder and every
  file must come out the same as the shipped one;
* the scenario facts written in ``sample_data/README.md`` and ``demo_truth.json`` are checked
  against computations made here, independently of the generator (our own HRF and designs in
  this file, statsmodels and nibabel as outside references). Nothing is imported from the
  generator.
"""

from __future__ import annotations

import csv
import gzip
import json
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm
from nibabel.affines import apply_affine
from scipy import ndimage, signal, stats
from statsmodels.tsa.stattools import acf

DATA = Path(__file__).resolve().parents[1] / "sample_data"
GENERATOR = DATA / "make_demo.py"
TRUTH = json.loads((DATA / "demo_truth.json").read_text())
FILES = TRUTH["files"]
#: The preprocessed runs are slice-time corrected to StartTime (BIDS): volume n shows the head
#: at n * TR + START seconds after the start of the run, the clock of the events' onsets.
START = TRUTH["start_time_s"]


# --------------------------------------------------------------------------- helpers


def _load_bold() -> nib.Nifti1Image:
    return nib.load(DATA / FILES["bold"])


@pytest.fixture(scope="module")
def bold() -> np.ndarray:
    return _load_bold().get_fdata()


def _read_tsv(path: Path) -> tuple[list[str], list[list[str]]]:
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh, delimiter="\t"))
    return rows[0], rows[1:]


def _events(role: str = "events") -> list[tuple[float, float, str]]:
    header, rows = _read_tsv(DATA / FILES[role])
    i_on, i_du, i_tt = (header.index(c) for c in ("onset", "duration", "trial_type"))
    return [(float(r[i_on]), float(r[i_du]), r[i_tt]) for r in rows]


def _feature(name: str) -> dict:
    return next(f for f in TRUTH["features"] if f["name"] == name)


def _ball_mean(data: np.ndarray, name: str, radius: float = 1.5) -> np.ndarray:
    """Mean time series of the voxels within ``radius`` voxels of a feature's centre."""
    c = np.array(_feature(name)["centre_voxel"])
    ijk = np.indices(data.shape[:3]).reshape(3, -1).T
    near = np.linalg.norm(ijk - c, axis=1) <= radius
    return data.reshape(-1, data.shape[3])[near].mean(axis=0)


def _hrf(t: np.ndarray) -> np.ndarray:
    """Double-gamma, Friston et al. (1998) NeuroImage 7:30-40 (shapes 6 and 16, scale 1 s,
    undershoot ratio 1/6; parameters from memory, see shared/references.md)."""
    return stats.gamma.pdf(t, a=6) - stats.gamma.pdf(t, a=16) / 6.0


def _regressor(
    condition: str, n: int, tr: float, shift: float = 0.0, role: str = "events"
) -> np.ndarray:
    """Boxcar at 50 ms resolution convolved (scipy fftconvolve) with ``_hrf``, read at
    n*tr + START (the sampling reference of a slice-time corrected run)."""
    dt = 0.05
    t = np.arange(0.0, n * tr + tr, dt)
    box = np.zeros_like(t)
    for onset, dur, cond in _events(role):
        if cond == condition:
            box[(t >= onset + shift - 1e-9) & (t < onset + shift + dur - 1e-9)] = 1.0
    h = _hrf(np.arange(0.0, 32.0, dt))
    conv = signal.fftconvolve(box, h)[: t.size] * dt
    return np.interp(np.arange(n) * tr + START, t, conv)


def _boxcar(condition: str, n: int, tr: float) -> np.ndarray:
    t = np.arange(n) * tr + START
    box = np.zeros(n)
    for onset, dur, cond in _events():
        if cond == condition:
            box[(t >= onset) & (t < onset + dur)] = 1.0
    return box


def _cosines(n: int, tr: float, cutoff: float = 128.0) -> np.ndarray:
    """Discrete cosine high-pass basis cos(pi k (2m+1) / (2N)), k = 1..floor(2 N TR / cutoff)
    (published formula, shared/references.md; 128 s cutoff is common practice)."""
    k = np.arange(1, int(np.floor(2 * n * tr / cutoff)) + 1)
    m = np.arange(n)[:, None]
    return np.cos(np.pi * k * (2 * m + 1) / (2 * n))


def _design(n: int, tr: float, shift: float = 0.0, role: str = "events") -> np.ndarray:
    return np.column_stack(
        [
            _regressor("tone", n, tr, shift, role),
            _regressor("tap", n, tr, shift, role),
            np.ones(n),
            _cosines(n, tr),
        ]
    )


# --------------------------------------------------------------------------- reproducibility


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    subprocess.run(
        [sys.executable, str(GENERATOR), "--out", str(out)],
        check=True,
        capture_output=True,
        timeout=120,
    )
    return out


@pytest.mark.slow
@pytest.mark.parametrize("role", sorted(FILES))
def test_regenerated_file_is_identical(regenerated: Path, role: str) -> None:
    """Every file comes out the same again: text files byte for byte; NIfTI files with the same
    uncompressed bytes (header and data), the same array, and a gzip header without a time stamp
    or file name (RFC 1952: MTIME at bytes 4-7, FNAME flag bit 3), so only the compressor build
    could change the compressed bytes. Floating-point data made by matrix products (the outside
    t map) may differ in the last bits with the BLAS build the machine installed (numpy 2.4.6
    with its bundled OpenBLAS moved one float32 value by one unit in the last place), so float
    arrays agree to 4 units in the last place and the headers byte for byte."""
    new = regenerated / FILES[role]
    old = DATA / FILES[role]
    if old.name.endswith(".nii.gz"):
        raw_new, raw_old = new.read_bytes(), old.read_bytes()
        assert raw_old[:2] == b"\x1f\x8b"
        assert int.from_bytes(raw_old[4:8], "little") == 0
        assert raw_old[3] & 0x08 == 0
        un_new, un_old = gzip.decompress(raw_new), gzip.decompress(raw_old)
        assert len(un_new) == len(un_old)
        assert un_new[:348] == un_old[:348]  # the NIfTI-1 header
        a_new = np.asanyarray(nib.load(new).dataobj)
        a_old = np.asanyarray(nib.load(old).dataobj)
        assert a_new.dtype == a_old.dtype
        if np.issubdtype(a_old.dtype, np.floating):
            np.testing.assert_array_max_ulp(a_new, a_old, maxulp=4)
        else:
            np.testing.assert_array_equal(a_new, a_old)
    else:
        assert new.read_text() == old.read_text()
        assert new.read_bytes() == old.read_bytes()


# --------------------------------------------------------------------------- headers and files


def test_run_header_says_tr_125_in_seconds() -> None:
    """NIfTI-1 (shared/references.md): xyzt_units gives the unit of pixdim[4]; sform wins when
    its code is set. BIDS: RepetitionTime in seconds in the sidecar."""
    img = _load_bold()
    hdr = img.header
    assert img.shape == (*TRUTH["shape"], TRUTH["n_volumes"])
    assert hdr.get_zooms() == pytest.approx((4.0, 4.0, 4.0, 1.25))
    assert hdr.get_xyzt_units() == ("mm", "sec")
    assert int(hdr["qform_code"]) == 2 and int(hdr["sform_code"]) == 2
    np.testing.assert_allclose(hdr.get_qform(), hdr.get_sform(), atol=1e-5)
    np.testing.assert_allclose(img.affine, TRUTH["affine"], atol=1e-5)
    assert hdr.get_data_dtype() == np.int16
    assert img.dataobj.slope == pytest.approx(0.25) and img.dataobj.inter == 0.0
    # BIDS: a dataset-level sidecar for the task (raw, with the acquisition's SliceTiming in
    # seconds, one per slice, within the TR) and the preprocessed run's own sidecar
    # (derivatives: SliceTimingCorrected with StartTime below the TR)
    sidecar = json.loads((DATA / FILES["sidecar"]).read_text())
    assert sidecar["RepetitionTime"] == pytest.approx(float(hdr.get_zooms()[3]))
    timing = np.array(sidecar["SliceTiming"])
    assert timing.size == img.shape[2] and timing.min() == 0 and timing.max() < 1.25
    own = json.loads((DATA / FILES["bold_sidecar"]).read_text())
    assert own["SliceTimingCorrected"] is True and own["StartTime"] == START == 0.625
    for name in ("description", "prep_description"):
        desc = json.loads((DATA / FILES[name]).read_text())
        assert desc["BIDSVersion"] and desc["Name"]
    assert json.loads((DATA / FILES["prep_description"]).read_text())["DatasetType"] == (
        "derivative"
    )


def test_the_study_is_laid_out_as_a_pipeline_leaves_it() -> None:
    """Raw events in sub-demo/func, the derivatives' runs, sidecars, masks and confounds in
    derivatives/prep/sub-demo/func, all named by BIDS entities (BIDS specification: file
    names, derivatives); the brain mask is the phantom's head on the run's grid."""
    for role, path in FILES.items():
        if role.startswith(("bold", "mask", "confounds")):
            assert path.startswith("study/derivatives/prep/sub-demo/func/sub-demo_task-tonetap_")
        if role.startswith("events"):
            assert path.startswith("study/sub-demo/func/sub-demo_task-tonetap_run-")
    for suffix in ("", "2"):
        mask = nib.load(DATA / FILES[f"mask{suffix}"])
        run = nib.load(DATA / FILES[f"bold{suffix}"])
        np.testing.assert_allclose(mask.affine, run.affine, atol=1e-6)
        head = np.asarray(run.dataobj[..., 0]) > 0
        np.testing.assert_array_equal(np.asarray(mask.dataobj) > 0, head)


def test_voxelscope_finds_every_companion_of_both_runs() -> None:
    """The one way in finds, for each preprocessed run, its raw events, both sidecars (the
    dataset-level one first), its confounds table and its brain mask, and samples at the
    StartTime."""
    from voxelscope.core.loader import InputRequest, load_inputs

    for suffix in ("", "2"):
        got = load_inputs(InputRequest(DATA / FILES[f"bold{suffix}"], summarize=False))
        used = got.used_files()
        assert used["events"] == str(DATA / FILES[f"events{suffix}"])
        assert used["sidecars"] == [
            str(DATA / FILES["sidecar"]),
            str(DATA / FILES[f"bold_sidecar{suffix}"]),
        ]
        assert used["confounds"] == str(DATA / FILES[f"confounds{suffix}"])
        assert used["mask"] == str(DATA / FILES[f"mask{suffix}"])
        assert got.run.reference_time_s == START and got.run.slice_timing is None


def test_events_follow_the_scenario() -> None:
    """BIDS events.tsv: onset and duration in seconds; 15 s blocks, 12-18 s rest."""
    header, _ = _read_tsv(DATA / FILES["events"])
    assert header == ["onset", "duration", "trial_type"]
    ev = _events()
    assert {c for _, _, c in ev} == {"tone", "tap"}
    assert all(d == 15.0 for _, d, _ in ev)
    rests = [ev[i + 1][0] - (ev[i][0] + ev[i][1]) for i in range(len(ev) - 1)]
    assert min(rests) >= 12.0 and max(rests) <= 18.0
    assert ev[-1][0] + ev[-1][1] <= TRUTH["n_volumes"] * TRUTH["tr"]
    run2 = TRUTH["runs"][1]
    ev2 = _events("events2")
    assert [(e["onset"], e["trial_type"]) for e in run2["blocks"]] == [(o, c) for o, _, c in ev2]
    assert ev2[-1][0] + ev2[-1][1] <= run2["n_volumes"] * TRUTH["tr"]
    assert [(e["onset"], e["trial_type"]) for e in TRUTH["blocks"]] == [(o, c) for o, _, c in ev]


def test_zero_outside_head_and_baseline_in_range(bold: np.ndarray) -> None:
    mean = bold.mean(axis=3)
    outside = mean == 0
    assert outside.sum() > 0.4 * outside.size
    assert np.all(bold[outside] == 0)
    interior = ndimage.binary_erosion(~outside, iterations=2)
    assert 800 <= np.median(mean[interior]) <= 1200
    # white noise about 1 % of baseline: interior voxels away from every planted feature,
    # residuals after removing a straight line
    far = interior.copy()
    ijk = np.indices(mean.shape).reshape(3, -1).T
    for f in TRUTH["features"]:
        d = np.linalg.norm(ijk - np.array(f["centre_voxel"]), axis=1).reshape(mean.shape)
        far &= d > f["radius_vox"] + 1
    y = bold[far][::25].T
    x = np.column_stack([np.ones(y.shape[0]), np.linspace(-1, 1, y.shape[0])])
    resid = y - x @ np.linalg.lstsq(x, y, rcond=None)[0]
    rel = resid.std(axis=0) / y.mean(axis=0)
    assert 0.007 < np.median(rel) < 0.013


def test_total_size_under_15_mb() -> None:
    total = sum(p.stat().st_size for p in DATA.rglob("*") if p.is_file())
    assert total < 15 * 1000 * 1000


# --------------------------------------------------------------------------- planted responses


def test_tone_and_tap_clusters_follow_their_regressors(bold: np.ndarray) -> None:
    """Mean series correlate with the HRF-convolved block regressor (Friston 1998 shape)."""
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    tone, tap = _regressor("tone", n, tr), _regressor("tap", n, tr)
    y_tone = _ball_mean(bold, "tone_cluster")
    y_tap = _ball_mean(bold, "tap_cluster")
    assert np.corrcoef(y_tone, tone)[0, 1] > 0.5
    assert np.corrcoef(y_tap, tap)[0, 1] > 0.5
    # the other condition explains nothing once both are in the model (the two regressors
    # are anti-correlated because blocks never overlap, so a raw correlation would not do)
    x = _design(n, tr)
    assert abs(sm.OLS(y_tone, x).fit().tvalues[1]) < 3.0
    assert abs(sm.OLS(y_tap, x).fit().tvalues[0]) < 3.0
    # amplitude: about 2.5 % at the centre, from an OLS fit (statsmodels)
    c = tuple(_feature("tone_cluster")["centre_voxel"])
    fit = sm.OLS(bold[c], _design(n, tr)).fit()
    pct = 100 * fit.params[0] * _hrf(np.arange(0, 32, 0.05)).sum() * 0.05 / fit.params[2]
    assert 1.8 < pct < 3.2


def test_late_cluster_peaks_later_than_tone_cluster(bold: np.ndarray) -> None:
    """Cross-correlation with the raw tone boxcar peaks 2-4 s later at the late cluster; and an
    FIR model (one regressor per post-onset volume) gains more over the canonical kernel there
    (canonical underfits a delayed response)."""
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    box = _boxcar("tone", n, tr)
    box -= box.mean()
    lags = np.arange(0, 17)

    def best_lag(y: np.ndarray) -> float:
        y = y - y.mean()
        cc = [np.dot(box[: n - k], y[k:]) for k in lags]
        return lags[int(np.argmax(cc))] * tr

    normal = best_lag(_ball_mean(bold, "tone_cluster"))
    late = best_lag(_ball_mean(bold, "late_cluster"))
    assert 2.0 <= late - normal <= 4.0
    assert 3.0 <= normal <= 8.0

    # FIR: 24 post-onset volumes (30 s) for each condition, plus the cosine drift basis
    def fir(condition: str) -> np.ndarray:
        starts = [int(np.ceil((o - START) / tr - 1e-9)) for o, _, c in _events() if c == condition]
        cols = np.zeros((n, 24))
        for s in starts:
            for k in range(24):
                if s + k < n:
                    cols[s + k, k] = 1.0
        return cols

    x_fir = np.column_stack([fir("tone"), fir("tap"), np.ones(n), _cosines(n, tr)])
    x_can = _design(n, tr)
    gain = {}
    peak = {}
    for name in ("tone_cluster", "late_cluster"):
        y = _ball_mean(bold, name)
        r2_fir = sm.OLS(y, x_fir).fit().rsquared
        r2_can = sm.OLS(y, x_can).fit().rsquared
        gain[name] = r2_fir - r2_can
        peak[name] = int(np.argmax(sm.OLS(y, x_fir).fit().params[:24])) * tr
    assert gain["late_cluster"] > gain["tone_cluster"] + 0.05
    assert peak["late_cluster"] - peak["tone_cluster"] >= 2.0


def test_rim_motion_spikes_match_confounds(bold: np.ndarray) -> None:
    """Confound spikes at the documented volumes, which sit at the start of tone blocks; the
    volume-to-volume column is the usual displacement sum with turns as arc length on a 50 mm
    sphere (common practice); the rim voxels jump in those volumes."""
    header, rows = _read_tsv(DATA / FILES["confounds"])
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    assert len(rows) == n and len(header) >= 30  # far more columns than a model should use
    for name in ("trans_x", "rot_x", "framewise_displacement", "a_comp_cor_00", "csf"):
        assert name in header
    conf = {h: np.array([np.nan if r[j] == "n/a" else float(r[j]) for r in rows])
            for j, h in enumerate(header)}  # fmt: skip
    assert np.isnan(conf["framewise_displacement"][0])  # n/a in the first row
    assert np.isnan(conf["trans_x_derivative1"][0]) and np.isfinite(conf["trans_x"][0])
    trans = np.column_stack([conf[f"trans_{a}"] for a in "xyz"])
    rot = np.column_stack([conf[f"rot_{a}"] for a in "xyz"])
    step = np.abs(np.diff(trans, axis=0)).sum(axis=1) + 50.0 * np.abs(np.diff(rot, axis=0)).sum(
        axis=1
    )
    np.testing.assert_allclose(conf["framewise_displacement"][1:], step, atol=5e-5, rtol=1e-5)
    fd = conf["framewise_displacement"]

    spikes = TRUTH["spike_volumes"]
    assert spikes == _feature("rim_motion")["spike_volumes"]
    assert len(spikes) == 6
    others = np.setdiff1d(np.arange(1, n), spikes)
    assert fd[spikes].min() > 1.0
    assert fd[others].max() < 0.5

    tone_onsets = [o for o, _, c in _events() if c == "tone"]
    hit_blocks = set()
    for v in spikes:
        t = v * tr + START
        near = [o for o in tone_onsets if 0 <= t - o < 5.0]
        assert near, f"volume {v} is not at the start of a tone block"
        hit_blocks.add(near[0])
    assert len(hit_blocks) == 2

    y = bold[tuple(_feature("rim_motion")["centre_voxel"])]
    base = np.median(y)
    assert y[spikes].max() > 1.2 * base
    # and the rim looks like a tone "activation" under an ordinary model
    fit = sm.OLS(y, _design(n, tr)).fit()
    assert fit.tvalues[0] > 3.0


def test_run_two_has_the_responses_but_not_the_jolt() -> None:
    """Run 2: shorter, the same tone and tap responses (statsmodels OLS t), no motion jolt
    (framewise displacement below 0.5 mm; Power et al. 2012 for the measure) and so no rim
    "activation": the two runs disagree only there."""
    run2 = TRUTH["runs"][1]
    img = nib.load(DATA / FILES["bold2"])
    assert img.shape == (*TRUTH["shape"], run2["n_volumes"])
    np.testing.assert_allclose(img.affine, _load_bold().affine, atol=1e-6)
    data = img.get_fdata()
    n, tr = run2["n_volumes"], TRUTH["tr"]
    x = _design(n, tr, role="events2")
    t_tone = sm.OLS(data[tuple(_feature("tone_cluster")["centre_voxel"])], x).fit().tvalues[0]
    t_tap = sm.OLS(data[tuple(_feature("tap_cluster")["centre_voxel"])], x).fit().tvalues[1]
    t_rim = sm.OLS(data[tuple(_feature("rim_motion")["centre_voxel"])], x).fit().tvalues[0]
    assert t_tone > 5 and t_tap > 5 and abs(t_rim) < 3
    header, rows = _read_tsv(DATA / FILES["confounds2"])
    fd = np.array([float(r[header.index("framewise_displacement")]) for r in rows[1:]])
    assert len(rows) == n and fd.max() < 0.5


def test_drift_cluster_trend_needs_a_drift_model(bold: np.ndarray) -> None:
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    y = bold[tuple(_feature("drift_cluster")["centre_voxel"])]
    tau = np.linspace(-1, 1, n)
    poly = sm.OLS(y, np.column_stack([np.ones(n), tau, tau**2])).fit()
    assert poly.rsquared > 0.7  # the trend dominates
    with_drift = sm.OLS(y, _design(n, tr)).fit()
    without = sm.OLS(y, _design(n, tr)[:, :3]).fit()
    assert max(abs(without.tvalues[0]), abs(without.tvalues[1])) > 2.5
    assert max(abs(with_drift.tvalues[0]), abs(with_drift.tvalues[1])) < 2.0


def test_noisy_cluster_residuals_autocorrelated_and_ols_t_inflated(bold: np.ndarray) -> None:
    """Lag-1 autocorrelation of OLS residuals via statsmodels acf; AR(1) fit via statsmodels
    GLSAR. Common practice: OLS t is inflated under positive autocorrelation."""
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    x = _design(n, tr)
    c = tuple(_feature("noisy_cluster")["centre_voxel"])
    ols = sm.OLS(bold[c], x).fit()
    assert acf(ols.resid, nlags=1, fft=False)[1] > 0.5
    glsar = sm.GLSAR(bold[c], x, rho=1).iterative_fit(maxiter=10)
    assert ols.tvalues[1] > glsar.tvalues[1] + 1.0
    assert glsar.tvalues[1] > 1.5  # weak but real
    # an ordinary cluster has nearly white residuals
    c0 = tuple(_feature("tap_cluster")["centre_voxel"])
    assert abs(acf(sm.OLS(bold[c0], x).fit().resid, nlags=1, fft=False)[1]) < 0.25


# --------------------------------------------------------------------------- the other images


def test_pipeline_t_map_is_a_one_tr_late_fit() -> None:
    """Recompute t with statsmodels OLS at the feature centres: the stored map matches the
    model with onsets one TR late, not the right one."""
    timg = nib.load(DATA / FILES["pipeline_t"])
    tmap = timg.get_fdata()
    assert timg.header.get_data_dtype() == np.float32
    assert timg.shape == tuple(TRUTH["shape"])
    np.testing.assert_allclose(timg.affine, _load_bold().affine, atol=1e-6)
    bold = _load_bold().get_fdata()
    assert np.all(tmap[bold.mean(axis=3) == 0] == 0)
    n, tr = TRUTH["n_volumes"], TRUTH["tr"]
    assert TRUTH["pipeline_t_map"]["onset_shift_s"] == pytest.approx(tr)
    x_late = _design(n, tr, shift=tr)
    x_right = _design(n, tr)
    for name in ("tone_cluster", "late_cluster", "noisy_cluster", "rim_motion"):
        c = tuple(_feature(name)["centre_voxel"])
        t_late = sm.OLS(bold[c], x_late).fit().tvalues[0]
        t_right = sm.OLS(bold[c], x_right).fit().tvalues[0]
        assert tmap[c] == pytest.approx(t_late, rel=0.02, abs=0.02)
        if name in ("tone_cluster", "late_cluster"):
            assert abs(t_late - t_right) > 1.0  # a disagreement to find


def test_anatomy_lines_up_in_world_space() -> None:
    """Map run voxel centres into the anatomical grid with nibabel apply_affine and compare
    head masks; orientation codes from nibabel aff2axcodes."""
    run = _load_bold()
    anat = nib.load(DATA / FILES["anat"])
    assert nib.aff2axcodes(run.affine) == ("R", "A", "S")
    assert nib.aff2axcodes(anat.affine) == ("L", "A", "S")
    assert anat.header.get_zooms() == pytest.approx((2.0, 2.0, 2.0))
    assert not np.allclose(anat.affine[:3, :3], np.diag(np.diag(anat.affine[:3, :3])))
    np.testing.assert_allclose(anat.affine, TRUTH["anatomy"]["affine"], atol=1e-4)
    head = np.asarray(run.dataobj[..., 0]) > 0
    ijk = np.indices(head.shape).reshape(3, -1).T
    vox = apply_affine(np.linalg.inv(anat.affine), apply_affine(run.affine, ijk))
    t1 = ndimage.map_coordinates(np.asarray(anat.dataobj, dtype=float), vox.T, order=0)
    assert np.mean((t1 > 0) == head.ravel()) > 0.95
    # the ventricles are dark in the anatomy and bright in the run at the same world point
    for centre in TRUTH["phantom"]["ventricle_centres_mm"]:
        a = apply_affine(np.linalg.inv(anat.affine), centre).round().astype(int)
        r = apply_affine(np.linalg.inv(run.affine), centre).round().astype(int)
        assert np.asarray(anat.dataobj)[tuple(a)] < 300
        assert np.asarray(run.dataobj[..., 0])[tuple(r)] > 1050


def test_truth_and_marks_agree_with_the_grid() -> None:
    run = _load_bold()
    _, marks = _read_tsv(DATA / FILES["marks"])
    header, _ = _read_tsv(DATA / FILES["marks"])
    assert header == ["x_mm", "y_mm", "z_mm", "title", "note", "model"]
    mark_xyz = np.array([[float(v) for v in r[:3]] for r in marks])
    assert all(r[3] and r[4] for r in marks)
    for f in TRUTH["features"]:
        xyz = apply_affine(run.affine, f["centre_voxel"])
        np.testing.assert_allclose(f["centre_mm"], xyz, atol=1e-3)
        assert np.min(np.linalg.norm(mark_xyz - xyz, axis=1)) < 0.1, f["name"]
        assert f["radius_mm"] == pytest.approx(4.0 * f["radius_vox"])
        assert all(0 <= v < s for v, s in zip(f["centre_voxel"], run.shape))
    assert len(marks) >= len(TRUTH["features"])
