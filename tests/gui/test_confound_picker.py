"""The confound picker (voxelscope/gui/confound_picker.py) and the window's confound and
left-out-volume controls, on the pipeline-style table built in tests/confound_tables.py.

What the window shows is compared with the core's own answers (Analysis.excluded_volumes,
the design columns), which the core tests check against statsmodels.
"""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt

from tests.confound_tables import MOTION6, write_pipeline_table
from tests.gui.conftest import write_events
from voxelscope.core.confounds import read_confounds


@pytest.fixture
def table(tmp_path):
    p = tmp_path / "sub-01_task-x_desc-confounds_timeseries.tsv"
    write_pipeline_table(p, n=80, tr=2.0, outlier_volumes=(30, 31))
    return p


def test_picker_filter_sets_all_none_and_count(qtbot, table):
    from voxelscope.gui.confound_picker import ConfoundPicker

    conf = read_confounds(table)
    p = ConfoundPicker()
    qtbot.addWidget(p)
    p.set_table(conf)
    total = len(conf.file_columns)
    assert total >= 110 and p.list.count() == total
    assert p.count.text() == f"0 of {total} chosen"
    seen = []
    p.chosen_changed.connect(seen.append)
    # one click on a named set
    p.set_buttons["motion24"].click()
    assert set(seen[-1]) == set(conf.resolve("motion24")) and len(seen[-1]) == 24
    assert p.count.text() == f"24 of {total} chosen"
    # a wildcard filter, then everything shown
    p.filter.setText("a_comp_cor_0[0-4]")
    shown = [p.list.item(r).text() for r in range(total) if not p.list.item(r).isHidden()]
    assert shown == [f"a_comp_cor_{k:02d}" for k in range(5)]
    p.all_button.click()
    assert len(seen[-1]) == 29 and p.count.text() == f"29 of {total} chosen, 5 shown"
    # plain text matches anywhere, case-insensitively
    p.filter.setText("WHITE")
    shown = [p.list.item(r).text() for r in range(total) if not p.list.item(r).isHidden()]
    assert shown and all("white_matter" in n for n in shown)
    p.none_button.click()
    assert seen[-1] == () and p.count.text().startswith(f"0 of {total} chosen")
    # a set the table cannot give is offered disabled
    small = read_confounds(_small_table(table.parent))
    p.set_table(small)
    assert not p.set_buttons["acompcor5"].isEnabled() and p.set_buttons["csf"].isEnabled()


def _small_table(folder):
    path = folder / "small.tsv"
    rows = np.random.default_rng(2).standard_normal((80, 2))
    path.write_text("csf\tother\n" + "".join(f"{a:.6g}\t{b:.6g}\n" for a, b in rows))
    return path


@pytest.fixture
def pipeline_window(window, ras_run, tmp_path):
    """The synthetic R-A-S run (80 volumes) with a pipeline table beside it."""
    run = ras_run["run"]
    conf = tmp_path / run.name.replace("_bold.nii", "_desc-confounds_timeseries.tsv")
    (tmp_path / run.name.replace("_bold.nii", "_confounds.tsv")).unlink()
    write_pipeline_table(conf, n=80, tr=2.0, outlier_volumes=(30, 31))
    assert window.open_run(run, voxel=ras_run["hot"], background=False), window.last_error
    return window, conf


def test_window_offers_the_table_and_leaves_out_its_volumes(pipeline_window):
    w, _conf = pipeline_window
    st = w.state
    panel = w.model_panel
    picker = panel.picker
    assert picker.list.count() >= 110 and picker.chosen() == ()
    assert st.settings.confound_columns == ()
    # the non-steady-state volumes leave the fit from the start, and Signal greys them
    assert st.analysis.excluded_volumes(st.settings) == {
        0: "non-steady-state (non_steady_state_outlier00)",
        1: "non-steady-state (non_steady_state_outlier01)",
    }
    fit = st.fits.fits[0]
    assert fit.result.df == 80 - 2 - len(fit.design.names)  # n - rank of the kept volumes
    sig = w.signal
    assert sig.left_out.tolist() == [0, 1]
    xs, _ys = sig.left_out_points.getData()
    assert len(xs) == 2
    _t, y = sig.data_curve.getData()
    assert np.isnan(y[:2]).all() and np.isfinite(y[2:]).all()
    assert "2 of 80 volumes left out (non-steady-state 2)" in panel.left_out.text()
    # one click on motion6: the columns enter the model
    picker.set_buttons["motion6"].click()
    assert st.settings.confound_columns == MOTION6
    assert st.settle_fits()  # a model change refits in the background; here at once
    assert set(MOTION6) <= set(st.fits.fits[0].design.names)
    # the outlier set censors its volumes
    picker.set_buttons["outliers"].click()
    assert set(st.analysis.excluded_volumes(st.settings)) == {0, 1, 30, 31}
    assert st.settle_fits()
    assert not any(n.startswith("motion_outlier") for n in st.fits.fits[0].design.names)
    # drop and censor controls
    panel.drop.setValue(5)
    assert st.settings.drop_volumes == 5
    assert set(st.analysis.excluded_volumes(st.settings)) >= {0, 1, 2, 3, 4, 30, 31}
    panel.censor_on.setChecked(True)
    assert st.settings.censor_fd_mm == pytest.approx(panel.censor.value())
    fd = st.analysis.confounds.column("framewise_displacement")
    want = set(np.flatnonzero(fd > st.settings.censor_fd_mm).tolist())
    assert want <= set(st.analysis.excluded_volumes(st.settings))
    assert st.settle_fits()
    assert sig.left_out.tolist() == sorted(st.analysis.excluded_volumes(st.settings))


def test_open_confounds_and_events_keep_the_table(pipeline_window, tmp_path):
    w, _conf = pipeline_window
    st = w.state
    small = _small_table(tmp_path)
    assert w.open_confounds(small), w.last_error
    assert st.bundle.confounds_path == small
    assert w.model_panel.picker.list.count() == 2
    assert w.model_panel.picker.chosen() == ()
    assert "File > Open confounds" not in w.model_panel.confounds_note.text()
    # new events: the table stays offered
    ev = write_events(tmp_path / "other_events.tsv", [(10, 12, "tone"), (50, 12, "tone")])
    assert w.open_events(ev), w.last_error
    assert st.bundle.confounds_path == small
    assert w.model_panel.picker.list.count() == 2
    # a table with the wrong number of rows: one line, nothing changes
    bad = tmp_path / "bad.tsv"
    bad.write_text("a\n1\n2\n")
    assert not w.open_confounds(bad)
    assert "rows" in w.last_error and st.bundle.confounds_path == small
    item = w.model_panel.picker.list.item(0)
    item.setCheckState(Qt.CheckState.Checked)
    assert st.settings.confound_columns == ("csf",)
