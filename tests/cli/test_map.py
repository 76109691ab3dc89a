"""Tests of ``voxelscope map`` (voxelscope/cli/map.py) through ``voxelscope.cli.main``.

The written map is read back with nibabel (reference library): float32, the run's affine
(``nibabel`` reload, compared with ``img.affine``) and spatial header; its values equal a
statsmodels OLS fit at a sampled voxel. The input run is hashed before and after.
"""

from __future__ import annotations

import hashlib
import subprocess
import sys

import nibabel as nib
import numpy as np
import pytest

from tests.cli.runs import write_run
from voxelscope.cli import main

TR = 1.5
T = 90
AFFINE = np.array(
    [[-3.0, 0.1, 0.0, 60.0], [0.0, 3.0, 0.0, -80.0], [0.0, 0.0, 3.5, -30.0], [0, 0, 0, 1]]
)


def _write_run(tmp_path, seed=0, shape=(5, 6, 4), name="sub-01_task-x_bold.nii"):
    rng = np.random.default_rng(seed)
    data = 10000 + rng.standard_normal((*shape, T)) * 20
    data[0, 0, 0, :] = 10000.0  # a constant voxel
    path, events = write_run(tmp_path, data, TR, affine=AFFINE, name=name)
    return path, events, data.astype(np.float32)


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_map_writes_float32_with_run_affine_and_leaves_input(tmp_path, capsys):
    """float32, affine and zooms survive the round trip (nibabel reload); input unchanged;
    the constant voxel is 0; t equals statsmodels OLS at a voxel (reference library)."""
    sm = pytest.importorskip("statsmodels.api")
    path, events, data = _write_run(tmp_path)
    before = _sha(path)
    out = tmp_path / "tone_t.nii.gz"
    mask = np.ones(data.shape[:3], dtype=np.float32)
    mask_path = tmp_path / "mask.nii"
    nib.save(nib.Nifti1Image(mask, AFFINE), mask_path)
    argv = [
        "map",
        str(path),
        "--events",
        str(events),
        "--kernel",
        "gamma",
        "--contrast",
        "tone - tap",
        "--mask",
        str(mask_path),
        "--noise",
        "ols",
        "-o",
        str(out),
        "--no-cache",
    ]
    assert main(argv) == 0, capsys.readouterr().err
    assert "wrote" in capsys.readouterr().out
    assert _sha(path) == before
    img = nib.load(out)
    assert img.get_data_dtype() == np.float32 and img.shape == data.shape[:3]
    np.testing.assert_allclose(img.affine, AFFINE, atol=1e-6)
    np.testing.assert_allclose(img.header.get_zooms()[:3], nib.load(path).header.get_zooms()[:3])
    t = np.asarray(img.dataobj)
    assert t[0, 0, 0] == 0.0 and np.all(np.isfinite(t))
    # statsmodels on the same design (built by the core; checked against statsmodels there).
    from voxelscope.core.events import read_events
    from voxelscope.core.model import Analysis, ModelSettings

    a = Analysis(read_events(events), T, TR)
    s = ModelSettings(contrast="tone - tap")
    X = a.design("gamma", s).X
    res = sm.OLS(data[2, 3, 1].astype(np.float64), X).fit()
    t_ref = float(res.t_test(a.contrast_weights("gamma", s)).tvalue.squeeze())
    assert t[2, 3, 1] == pytest.approx(t_ref, rel=1e-5)
    # z map: same sign, and |z| < |t| where |t| > 1 for a t with finite df (scipy.stats)
    out_z = tmp_path / "z.nii"
    assert main([*argv[:-3], "--stat", "z", "-o", str(out_z), "--no-cache"]) == 0
    z = np.asarray(nib.load(out_z).dataobj)
    big = np.abs(t) > 1
    assert np.all(np.sign(z[big]) == np.sign(t[big])) and np.all(np.abs(z[big]) < np.abs(t[big]))
    # the contrast estimate c'b (statsmodels t_test's effect); 'beta', its earlier name, too
    effect = float(res.t_test(a.contrast_weights("gamma", s)).effect.squeeze())
    for name in ("estimate", "beta"):
        out_e = tmp_path / f"{name}.nii"
        capsys.readouterr()
        assert main([*argv[:-3], "--stat", name, "-o", str(out_e), "--no-cache"]) == 0
        est = nib.load(out_e)
        assert np.asarray(est.dataobj)[2, 3, 1] == pytest.approx(effect, rel=1e-5)
        # the file is the one -o names; header and message say the statistic's one name
        assert est.header["descrip"].tobytes().startswith(b"voxelscope estimate gamma")
        assert f"wrote {out_e}: estimate map" in capsys.readouterr().out


def test_map_help_lists_the_estimate_and_hides_the_earlier_name(capsys):
    with pytest.raises(SystemExit):
        main(["map", "--help"])
    text = capsys.readouterr().out
    assert "estimate" in text and "beta" not in text
    with pytest.raises(SystemExit) as stop:
        main(["map", "run.nii", "--stat", "effect", "-o", "x.nii"])
    err = capsys.readouterr().err
    assert stop.value.code == 2 and "--stat" in err and "effect" in err
    assert len(err.strip().splitlines()) == 1 and "beta" not in err


def test_map_refuses_to_overwrite_input_and_existing_output(tmp_path, capsys):
    path, events, _ = _write_run(tmp_path)
    before = _sha(path)
    code = main(["map", str(path), "--events", str(events), "-o", str(path), "--force"])
    err = capsys.readouterr().err
    assert code == 2 and "is an input" in err and err.count("\n") == 1
    assert _sha(path) == before
    out = tmp_path / "m.nii"
    assert main(["map", str(path), "--events", str(events), "-o", str(out)]) == 0
    capsys.readouterr()
    code = main(["map", str(path), "--events", str(events), "-o", str(out)])
    assert code == 2 and "--force" in capsys.readouterr().err
    assert main(["map", str(path), "--events", str(events), "-o", str(out), "--force"]) == 0
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".")]
    assert leftovers == []
    code = main(["map", str(path), "--events", str(events), "-o", str(tmp_path / "m.txt")])
    assert code == 2 and ".nii" in capsys.readouterr().err


def test_map_clusters_and_compare(tmp_path, capsys):
    path, events, _ = _write_run(tmp_path, seed=1)
    out = tmp_path / "t.nii"
    table = tmp_path / "clusters.tsv"
    assert (
        main(
            [
                "map",
                str(path),
                "--events",
                str(events),
                "-o",
                str(out),
                "--clusters",
                str(table),
                "--threshold",
                "1.0",
                "--connectivity",
                "6",
            ]
        )
        == 0
    )
    lines = table.read_text().splitlines()
    assert lines[0].startswith("cluster\tsign\tvoxels") and len(lines) > 1
    capsys.readouterr()
    out2 = tmp_path / "t2.nii"
    assert (
        main(
            [
                "map",
                str(path),
                "--events",
                str(events),
                "-o",
                str(out2),
                "--compare",
                str(out),
                "--explain",
            ]
        )
        == 0
    )
    text = capsys.readouterr().out
    assert "agreement with" in text and "r 1.000" in text and "The maps agree" in text
    code = main(["map", str(path), "--events", str(events), "-o", str(out2), "--clusters", "c.tsv"])
    assert code == 2 and "--threshold" in capsys.readouterr().err


def test_map_path_never_imports_qt(tmp_path):
    """The command-line map path loads no Qt module (project rule)."""
    path, events, _ = _write_run(tmp_path)
    out = tmp_path / "q.nii"
    code = (
        "import sys, voxelscope.cli; "
        f"rc = voxelscope.cli.main(['map', {str(path)!r}, '--events', {str(events)!r}, "
        f"'-o', {str(out)!r}]); "
        "assert rc == 0, rc; "
        "bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))]; "
        "assert not bad, bad"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert out.exists()


def test_ols_t_map_imports_no_scipy_subpackage(tmp_path):
    """An OLS t map needs no scipy (the brain mask's connected parts and the gamma kernels
    are numpy only): importing scipy.special or scipy.ndimage cost about a third of the
    whole command on this machine; nor numpy.ma (np.percentile's import, about 15 ms).
    nibabel itself loads the bare ``scipy`` package."""
    path, events, _ = _write_run(tmp_path)
    out = tmp_path / "s.nii"
    code = (
        "import sys, voxelscope.cli; "
        f"rc = voxelscope.cli.main(['map', {str(path)!r}, '--events', {str(events)!r}, "
        f"'--noise', 'ols', '-o', {str(out)!r}]); "
        "assert rc == 0, rc; "
        "heavy = ('scipy.special.', 'scipy.ndimage.', 'scipy.stats.', 'scipy.linalg.', "
        "'scipy.signal.', 'scipy.sparse.', 'numpy.ma.'); "
        "bad = sorted({m for m in sys.modules if (m + '.').startswith(heavy)}); "
        "assert not bad, bad"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert out.exists()


def test_map_of_a_plain_nii_reads_it_once(tmp_path, monkeypatch):
    """No separate summary pass: the volumes summarised apart from the map are only the
    first few its mask guess is taken from; the map equals the one the same command
    writes when the summary pass comes first (one pass switched off)."""
    from voxelscope.core import maps
    from voxelscope.core import run as run_module

    path, events, _ = _write_run(tmp_path)
    seen = []
    real = run_module.summarize_volumes

    def counting(volumes, layout):
        volumes = list(volumes)
        seen.append(sum(v.shape[0] for v in volumes))
        return real(iter(volumes), layout)

    monkeypatch.setattr(run_module, "summarize_volumes", counting)
    once, twice = tmp_path / "once.nii", tmp_path / "twice.nii"
    argv = ["map", str(path), "--events", str(events), "--noise", "ols", "-o"]
    assert main([*argv, str(once)]) == 0
    assert seen and sum(seen) <= maps.GUESS_VOLUMES, seen
    monkeypatch.setattr(maps, "ONE_PASS_SHARE", 2.0)  # never: the summary pass first
    seen.clear()
    assert main([*argv, str(twice)]) == 0
    assert sum(seen) > maps.GUESS_VOLUMES
    a, b = (np.asarray(nib.load(p).dataobj) for p in (once, twice))
    np.testing.assert_allclose(a, b, rtol=2.5e-7, atol=0)
    assert np.count_nonzero(a) == np.count_nonzero(b) > 100


def test_explain_rounds_say_what_they_build_on():
    """Issue 17 item 10: a label repeated in the second round is introduced as built on the
    first round's kept change."""
    from types import SimpleNamespace

    from voxelscope.cli.map import explain_lines
    from voxelscope.core.agreement import Alternative
    from voxelscope.core.model import ModelSettings

    s = ModelSettings()
    kept = "onsets are shifted by +1.25 s"
    alts = (
        Alternative("as given", "as given", "gamma", s, 0.5, 1.0),
        Alternative("shift", kept, "gamma", s, 0.8, 1.0, 1),
        Alternative("kernel", "the boxcar kernel is used", "boxcar", s, 0.6, 1.0, 1),
        Alternative("kernel", "the boxcar kernel is used", "boxcar", s, 0.9, 1.0, 2, (kept,)),
    )
    lines = explain_lines(SimpleNamespace(alternatives=alts))
    assert lines[0] == "our map as given:"
    assert lines[2] == "round 1: one change at a time:"
    assert lines[5] == (
        f"round 2: keeping the best change so far (when {kept}), one more change on top:"
    )
    assert lines[6].endswith("the boxcar kernel is used") and len(lines) == 7
