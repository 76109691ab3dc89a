"""A sweep's finding opens in the window at its peak, with its run(s) and model
(voxelscope/core/sweep_out.py sessions read by gui/session_io.py)."""

from __future__ import annotations

import csv
import io

from PySide6.QtCore import QSettings

from tests.sweep_study import make_study
from voxelscope.core.model import ModelSettings
from voxelscope.core.sweep import SweepResult, SweepSettings, plan_sweep, sweep_run, sweep_subject
from voxelscope.core.sweep_out import write_outputs
from voxelscope.gui.session_io import open_session


def _sweep_in_process(study, out, settings):
    """The sweep's tasks called directly (no Dask): the same results files."""
    plan = plan_sweep(study, settings)
    (out / "runs").mkdir(parents=True)
    (out / "subjects").mkdir()
    runs = {j.key: sweep_run(j, settings, str(out)) for j in plan.runs}
    subjects = [
        sweep_subject(s, [runs[k] for k in s.run_keys], settings, str(out)) for s in plan.subjects
    ]
    result = SweepResult(plan, [runs[j.key] for j in plan.runs], subjects, [], out)
    write_outputs(result, settings)
    text = (out / "findings.tsv").read_text()
    return list(csv.DictReader(io.StringIO(text), delimiter="\t"))


def test_findings_open_in_the_window_at_their_peak(qtbot, tmp_path):
    from voxelscope.gui.main_window import MainWindow

    study = make_study(tmp_path / "ds", subjects=1, runs=2)
    settings = SweepSettings(ModelSettings(contrast="go", noise="ols"), kernel="gamma")
    rows = _sweep_in_process(study, tmp_path / "out", settings)
    one = next(r for r in rows if r["run"] == "1")
    both = next(r for r in rows if r["run"] == "all")
    for row, n_runs in ((one, 1), (both, 2)):
        qs = QSettings(str(tmp_path / f"{row['run']}.ini"), QSettings.Format.IniFormat)
        w = MainWindow(settings=qs)
        qtbot.addWidget(w)
        w.autosave.directory = tmp_path / f"autosave-{row['run']}"
        path = tmp_path / "out" / row["session_file"]
        assert open_session(w, path, locate=None, background=False, geometry=False)
        state = w.state
        peak = (int(row["peak_i"]), int(row["peak_j"]), int(row["peak_k"]))
        assert tuple(state.voxel) == peak
        assert state.settings.noise == "ols" and state.settings.contrast == "go"
        assert "gamma" in state.settings.kernels
        assert state.map_settings.threshold == settings.threshold
        assert state.map_settings.kernel == "gamma"
        assert 1 + len(state.extra) == n_runs
        assert "sub-01_task-go_run-1" in str(state.bundle.run.path)
        w.close()
