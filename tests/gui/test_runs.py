"""Several runs in the window (voxelscope/gui/runs.py and the several-run parts of the state,
Signal, Fits, Checks, the live map, sessions and the report), driven with pytest-qt.

References: the combined numbers are checked against the fixed-effects formulas (common
practice) on statsmodels OLS fits of each run (reference library), and the live map
against :func:`voxelscope.core.combine.compute_combined_map`.
"""

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from PySide6.QtCore import QSettings

from tests.gui.conftest import _synthetic
from voxelscope.core.combine import compute_combined_map
from voxelscope.gui.runs import add_run
from voxelscope.gui.session_io import open_session, save_window_session


@pytest.fixture
def three_runs(tmp_path):
    aff = np.diag([3.0, 3.0, 3.5, 1.0])
    aff[:3, 3] = (-12.0, -15.0, -9.0)
    other = aff.copy()
    other[:3, 3] += (1.0, -1.0, 0.5)  # another grid: centres 1 mm off
    return [
        _synthetic(tmp_path, aff, "01_run-1", seed=1),
        _synthetic(tmp_path, aff, "01_run-2", seed=2),
        _synthetic(tmp_path, other, "01_run-3", seed=3),
    ]


def _open_three(window, runs):
    hot = runs[0]["hot"]
    assert window.open_run(runs[0]["run"], voxel=hot, background=False), window.last_error
    for r in runs[1:]:
        assert add_run(window, r["run"], background=False), window.last_error
    return hot


def test_add_runs_fits_every_run_and_combines_them(window, three_runs):
    hot = _open_three(window, three_runs)
    st = window.state
    st.update_settings(noise="ols")  # statsmodels OLS is the reference below
    assert st.settle_fits()
    assert [r.label for r in st.run_fits] == ["run-1", "run-2", "run-3"]
    assert [c.kernel for c in st.combined] == list(st.settings.kernels)
    # run-3 is on another grid: its voxel is the one nearest the same place in mm
    mm = st.run.voxel_to_mm(hot)
    assert st.run_fits[2].voxel == st.extra[1].run.mm_to_voxel(tuple(mm))
    # combined t of every kernel from statsmodels fits of each run (outside reference)
    for k, c in enumerate(st.combined):
        b, v, d = [], [], []
        for rf in st.run_fits:
            f = rf.fits.fits[k]
            res = sm.OLS(rf.series, f.design.X).fit()
            tt = res.t_test(f.result.weights)
            b.append(float(np.squeeze(tt.effect)))
            v.append(float(np.squeeze(tt.sd)) ** 2)
            d.append(res.df_resid)
        w = 1 / np.asarray(v)
        assert c.t == pytest.approx(np.sum(w * b) / np.sqrt(w.sum()), rel=1e-9)
        assert c.df == sum(d)
    # Fits: a row per run and a combined row per kernel
    model = window.fits.model
    assert "run" in model.columns() and "Q p" in model.columns()
    assert model.rowCount() == 4 * len(st.combined)
    runs_col = [model.raw(r, "run") for r in range(4)]
    assert runs_col == ["run-1", "run-2", "run-3", "combined"]
    assert model.raw(3, "t") == st.combined[0].t
    assert "Runs</b> 3" in window.fits.caption.text()
    # Checks says whether the runs agree
    window.checks.request()
    assert "Cochran's Q" in window.checks.runs_note.text()
    assert window.close_runs_action.isEnabled()


def test_signal_draws_the_chosen_run(window, qtbot, three_runs):
    _open_three(window, three_runs)
    st = window.state
    box = window.signal.run_box
    assert box.isVisibleTo(window) and box.count() == 3
    st.set_signal_run(2)
    _x, y = window.signal.data_curve.getData()
    np.testing.assert_allclose(y, st.run_fits[2].series)
    st.set_signal_run(0)
    _x, y = window.signal.data_curve.getData()
    np.testing.assert_allclose(y, st.series)
    # a click keeps every run in step
    st.set_voxel((3, 3, 3))
    assert st.run_fits[1].voxel == (3, 3, 3)


def test_live_map_is_the_fixed_effects_map(window, qtbot, three_runs):
    _open_three(window, three_runs)
    live = window.live_map
    assert live.flush(30000)
    st = window.state
    req = live.request()
    assert len(req.runs) == 3
    ref = compute_combined_map(
        [b.run for b in st.bundles],
        [b.analysis for b in st.bundles],
        st.settings,
        req.kernel,
        stats=req.stats,
    )
    np.testing.assert_allclose(window.state.model_map.t, ref.t, rtol=1e-6, atol=1e-6)
    assert "3 runs" in st.overlay.title
    st.remove_runs()
    assert live.flush(30000)
    assert not live.request().runs and st.run_fits == []
    assert window.fits.model.rowCount() == len(st.settings.kernels)


def test_runs_without_events_or_twice_are_refused(window, tmp_path, three_runs):
    _open_three(window, three_runs[:2])
    st = window.state
    bare = Path(three_runs[2]["run"])
    (bare.parent / bare.name.replace("_bold.nii", "_events.tsv")).unlink()
    assert not add_run(window, bare, background=False)
    assert "events" in window.last_error and len(st.extra) == 1
    assert not add_run(window, three_runs[1]["run"], background=False)
    assert "already open" in window.last_error


def test_session_remembers_the_runs(window, qtbot, tmp_path, three_runs):
    _open_three(window, three_runs)
    path = save_window_session(window, tmp_path / "s.voxelscope.json")
    from voxelscope.gui.main_window import MainWindow

    w2 = MainWindow(settings=QSettings(str(tmp_path / "s2.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w2)
    assert open_session(w2, path, locate=None, geometry=False)
    assert [Path(b.run.path).name for b in w2.state.bundles] == [
        Path(r["run"]).name for r in three_runs
    ]
    assert w2.state.voxel == window.state.voxel
    assert [c.t for c in w2.state.combined] == [c.t for c in window.state.combined]


def test_report_from_the_window_covers_every_run(window, tmp_path, three_runs):
    from voxelscope.gui.export import write_window_report

    _open_three(window, three_runs)
    result = write_window_report(window, tmp_path / "rep", background=False)
    assert result is not None, window.last_error
    names = {p.name for p in result.files}
    assert {"combined.csv", "runs.png", "run-3.png", "report.html"} <= names
    assert "position" in result.sections[0].title  # runs on different grids: by mm


def test_open_runs_at_once_in_the_background(window, qtbot, three_runs):
    from voxelscope.gui.runs import open_runs

    assert open_runs(window, [r["run"] for r in three_runs])
    qtbot.waitUntil(lambda: len(window.state.bundles) == 3, timeout=60000)
    qtbot.waitUntil(lambda: not getattr(window, "runs_jobs", []), timeout=60000)
    assert [r.label for r in window.state.run_fits] == ["run-1", "run-2", "run-3"]


def test_demo_study_runs_disagree_at_the_rim_and_agree_at_the_tone_cluster(window, demo_files):
    """Planted in the demo (sample_data/README.md): the rim 'activation' is a head jolt in
    run 1 only, so the runs disagree there; the tone cluster responds in both runs."""
    from voxelscope.gui.app import demo_paths

    d = demo_paths()
    assert window.open_run(d["run"], voxel=(26, 40, 25), background=False), window.last_error
    assert add_run(window, d["run2"], background=False), window.last_error
    window.set_contrast_text("tone")
    st = window.state
    dg = next(c for c in st.combined if c.kernel == "double-gamma")
    # Q p about 0.02 under the default AR(p) model (below 1e-4 under OLS, whose t is
    # inflated by the rim's autocorrelated residuals)
    assert dg.q_p < 0.05 and "runs-disagree" in {f.id for f in dg.flags}
    window.checks.set_kernel("double-gamma")
    assert "they disagree" in window.checks.runs_note.text()
    st.set_voxel((6, 23, 15))
    dg = next(c for c in st.combined if c.kernel == "double-gamma")
    assert dg.t > 10 and dg.q_p > 0.05 and not dg.flags
