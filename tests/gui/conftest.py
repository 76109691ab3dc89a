"""Fixtures for the window tests: offscreen Qt, small runs in L-A-S, R-A-S and permuted order."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.testing import data_path

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"
DEMO_PREP = "study/derivatives/prep/sub-demo/func/sub-demo_task-tonetap_run-1"
DEMO_RUN = f"{DEMO_PREP}_space-phantom_desc-preproc_bold.nii.gz"
DEMO_EVENTS = "study/sub-demo/func/sub-demo_task-tonetap_run-1_events.tsv"
DEMO_CONFOUNDS = f"{DEMO_PREP}_desc-confounds_timeseries.tsv"


@pytest.fixture(autouse=True)
def _private_cache(tmp_path_factory, monkeypatch):
    """Keep the run cache of compressed test runs out of the user's cache folder."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path_factory.getbasetemp() / "xdg-cache"))


def write_events(path: Path, rows) -> Path:
    lines = ["onset\tduration\ttrial_type"] + [f"{o}\t{d}\t{c}" for o, d, c in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def las_run(tmp_path):
    """nibabel's real functional.nii (17x21x3x20, 4x4x8 mm, TR 2 s, L-A-S) with our events."""
    run = Path(data_path) / "functional.nii"
    events = write_events(
        tmp_path / "functional_events.tsv",
        [(0, 8, "tone"), (10, 6, "tap"), (20, 8, "tone"), (30, 6, "tap")],
    )
    return {"run": run, "events": events}


def _synthetic(tmp_path: Path, affine: np.ndarray, name: str, gz: bool = False, seed: int = 7):
    """A small run with a block response at a known voxel, events and confounds (BIDS names)."""
    rng = np.random.default_rng(seed)
    shape, n, tr = (9, 11, 7), 80, 2.0
    t = np.arange(n) * tr
    tone = ((t % 40) < 16).astype(float)
    (((t + 20) % 40) < 10).astype(float)
    base = 500 + 50 * rng.random(shape)
    data = base[..., None] + rng.normal(0, 2.0, (*shape, n))
    hot = (2, 3, 4)
    data[hot] += 15 * np.convolve(tone, np.exp(-np.arange(8) / 2.0) / 3.0)[:n]
    data[0, :, :] = 0  # a plane outside the "head"
    img = nib.Nifti1Image(data.astype(np.float32), affine)
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((*np.sqrt((affine[:3, :3] ** 2).sum(0)), tr))
    stem = f"sub-{name}_task-tt"
    path = tmp_path / f"{stem}_bold.nii{'.gz' if gz else ''}"
    nib.save(img, str(path))
    rows = []
    for cycle in range(0, int(n * tr), 40):
        rows.append((cycle, 16, "tone"))
        rows.append((cycle + 20, 10, "tap"))
    write_events(tmp_path / f"{stem}_events.tsv", rows)
    conf = rng.normal(0, 0.1, (n, 2))
    lines = ["move_a\tmove_b"] + [f"{a:.6f}\t{b:.6f}" for a, b in conf]
    (tmp_path / f"{stem}_confounds.tsv").write_text("\n".join(lines) + "\n")
    smap = rng.normal(0, 2, shape).astype(np.float32)
    smap[hot] = 9.0
    map_path = tmp_path / f"{stem}_map.nii"
    nib.save(nib.Nifti1Image(smap, affine), str(map_path))
    return {"run": path, "hot": hot, "map": map_path, "shape": shape, "affine": affine}


@pytest.fixture
def ras_run(tmp_path):
    """Synthetic R-A-S run (3 mm, origin off centre)."""
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    aff[:3, 3] = (-12.0, -15.0, -9.0)
    return _synthetic(tmp_path, aff, "ras")


@pytest.fixture
def permuted_run(tmp_path):
    """Synthetic run stored as P-S-L: i runs posterior, j superior, k left."""
    aff = np.array(
        [[0.0, 0.0, -2.5, 10.0], [-3.0, 0.0, 0.0, 20.0], [0.0, 3.5, 0.0, -8.0], [0, 0, 0, 1]]
    )
    return _synthetic(tmp_path, aff, "psl")


@pytest.fixture
def gz_run(tmp_path):
    aff = np.diag([3.0, 3.0, 3.0, 1.0])
    return _synthetic(tmp_path, aff, "gz", gz=True)


@pytest.fixture
def window(qtbot, tmp_path):
    from PySide6.QtCore import QSettings

    from voxelscope.gui.main_window import MainWindow

    settings = QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat)
    w = MainWindow(settings=settings)
    qtbot.addWidget(w)
    w.resize(1280, 800)
    w.show()
    qtbot.waitExposed(w)
    return w


@pytest.fixture
def demo_files():
    if not (SAMPLE / DEMO_RUN).is_file():
        pytest.skip("sample_data not generated")
    return SAMPLE


@pytest.fixture
def demo_window(qtbot, tmp_path, demo_files):
    """Factory: ``demo_window(size)`` opens the demo run in a shown window of that size."""

    def make(size):
        from PySide6.QtCore import QSettings

        from voxelscope.gui.app import DEMO_CONTRAST, demo_paths
        from voxelscope.gui.main_window import MainWindow

        settings = QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat)
        w = MainWindow(settings=settings)
        qtbot.addWidget(w)
        w.resize(*size)
        w.show()
        qtbot.waitExposed(w)
        d = demo_paths()
        ok = w.open_run(
            d["run"], d["events"], d["confounds"], d["anatomy"], d["map"],
            voxel=d["voxel"], background=False,
        )  # fmt: skip
        assert ok, w.last_error
        w.set_contrast_text(DEMO_CONTRAST)
        return w

    return make
