"""Checks part: the core's numbers, flags that open their figure, planted demo findings,
no work while hidden, and fits that never wait for the checks."""

import json
import math
import threading

import nibabel as nib
import numpy as np
import pytest
from PySide6.QtCore import Qt

from tests.gui.conftest import DEMO_CONFOUNDS, DEMO_EVENTS, DEMO_RUN, SAMPLE, write_events
from voxelscope.core.checks import voxel_checks
from voxelscope.gui import checks_panel
from voxelscope.gui.checks_figures import FIGURES
from voxelscope.gui.checks_panel import NO_FLAGS, default_kernel

WAIT = 20000


@pytest.fixture
def win(window, qtbot):
    """The window; afterwards its background map job (not this part's) is let finish, so
    it does not report into the next test."""
    yield window
    live = getattr(window, "live_map", None)
    if live is not None and hasattr(live, "wait"):
        live.wait()


def _truth():
    data = json.loads((SAMPLE / "demo_truth.json").read_text(encoding="utf-8"))
    return {f["name"]: f for f in data["features"]}


def _open_demo(window, contrast="tone"):
    d = SAMPLE
    ok = window.open_run(
        d / DEMO_RUN,
        d / DEMO_EVENTS,
        d / DEMO_CONFOUNDS,
        background=False,
    )
    assert ok, window.last_error
    if contrast is not None:
        assert window.set_contrast_text(contrast)
    return window.state


def _show_checks(window, qtbot):
    window.docks["Checks"].show()
    window.docks["Checks"].raise_()
    qtbot.waitUntil(window.checks.wanted, timeout=WAIT)
    return window.checks


def _settle(panel, qtbot):
    qtbot.waitUntil(lambda: panel.is_current() and not panel.computing, timeout=WAIT)
    return panel.checks


def _flag_ids(panel):
    return [lb.ident for lb in panel.flag_items() if lb.ident is not None]


def _same(a, b):
    if a is None or b is None:
        return a is b
    if isinstance(a, tuple):
        return tuple(a) == tuple(b)
    a, b = float(a), float(b)
    return (math.isnan(a) and math.isnan(b)) or a == b


def _clean_run(tmp_path, seed=11):
    """A 15^3 grid of 3 mm voxels, white noise plus a block response at the centre voxel
    (far from the grid border, so not near the brain edge); no confounds file."""
    from voxelscope.core.events import read_events
    from voxelscope.core.model import Analysis, ModelSettings

    rng = np.random.default_rng(seed)
    shape, n, tr = (15, 15, 15), 150, 2.0
    rows = []
    for k, on in enumerate(range(10, 290, 36)):
        rows.append((on, 16, "tone" if k % 2 == 0 else "tap"))
    stem = tmp_path / "sub-clean_task-tt"
    events = write_events(tmp_path / "sub-clean_task-tt_events.tsv", rows)
    a = Analysis(read_events(events), n, tr)
    x = a.design("double-gamma", ModelSettings()).column("tone")
    data = 800 + rng.normal(0, 4.0, (*shape, n))
    hot = (7, 7, 7)
    data[hot] += 12 * x
    img = nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, tr))
    path = tmp_path / f"{stem.name}_bold.nii"
    nib.save(img, str(path))
    return {"run": path, "events": events, "hot": hot}


# ----------------------------------------------------------------------------- pure


def test_default_kernel_rule():
    """The rule of the brief: map kernel, else double-gamma, else the first one on."""
    assert default_kernel(("boxcar", "gamma", "double-gamma")) == "double-gamma"
    assert default_kernel(("boxcar", "gamma")) == "boxcar"
    assert default_kernel(("boxcar", "gamma", "double-gamma"), map_kernel="gamma") == "gamma"
    assert default_kernel(("boxcar",), map_kernel="gamma") == "boxcar"
    assert default_kernel(()) is None


# ----------------------------------------------------------------------------- numbers


def test_numbers_are_the_cores_and_match_statsmodels(win, qtbot, demo_files):
    """Every number of the table is the field of voxel_checks for the same voxel, settings
    and kernel; Durbin-Watson and the Ljung-Box p also match statsmodels' own functions
    (statsmodels.stats.stattools.durbin_watson, statsmodels.stats.diagnostic.acorr_ljungbox)
    on the OLS residuals of the same design (numpy lstsq)."""
    from statsmodels.stats.diagnostic import acorr_ljungbox
    from statsmodels.stats.stattools import durbin_watson

    st = _open_demo(win)
    panel = _show_checks(win, qtbot)
    ijk = tuple(_truth()["late_cluster"]["centre_voxel"])
    st.set_voxel(ijk)
    shown = _settle(panel, qtbot)
    y = st.run.timeseries(ijk)
    kernel = panel.kernel()
    assert kernel == "double-gamma"
    ref = voxel_checks(st.analysis, st.settings, kernel, y, run=st.run, ijk=ijk)
    keys = panel.model.keys()
    for key in (
        "durbin_watson",
        "ar1",
        "ljung_box_p",
        "tsnr",
        "edge_distance_mm",
        "best_shift_s",
        "peak_latency_s",
        "t_without_influential",
        "cooks_distance_max",
    ):
        assert key in keys
        assert _same(panel.model.raw(key), getattr(ref, key)), key
    assert shown.cooks_volume == ref.cooks_volume
    assert shown.flag_ids() == ref.flag_ids()
    # the text shows the value (not some other number)
    row = keys.index("cooks_distance_max")
    text = panel.model.index(row, 1).data()
    assert f"{ref.cooks_distance_max:.3f}" in text and f"volume {ref.cooks_volume}" in text
    # outside reference: statsmodels on OLS residuals of the same design
    X = st.analysis.design(kernel, st.settings).X
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    assert panel.model.raw("durbin_watson") == pytest.approx(durbin_watson(r), rel=1e-9)
    lb = acorr_ljungbox(r, lags=[10], return_df=True)
    assert panel.model.raw("ljung_box_p") == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-6)
    # the Fits table's t for the kernel equals the checks' t
    assert shown.t == pytest.approx(st.fits.by_kernel(kernel).t, rel=1e-12)


def test_settings_and_kernel_changes_recompute(win, qtbot, demo_files):
    st = _open_demo(win)
    panel = _show_checks(win, qtbot)
    ijk = tuple(_truth()["noisy_cluster"]["centre_voxel"])
    st.set_voxel(ijk)
    _settle(panel, qtbot)
    assert "ar1_whitened" not in panel.model.keys()
    assert st.update_settings(noise="ar1")
    c = _settle(panel, qtbot)
    assert c.noise == "ar1" and "ar1_whitened" in panel.model.keys()
    y = st.run.timeseries(ijk)
    ref = voxel_checks(st.analysis, st.settings, "double-gamma", y, run=st.run, ijk=ijk)
    assert panel.model.raw("ar1_whitened") == ref.ar1_whitened
    # another kernel from the selector
    i = panel.kernel_box.findData("gamma")
    assert i >= 0
    panel.kernel_box.activated.emit(i)
    c = _settle(panel, qtbot)
    assert c.kernel == "gamma"
    ref = voxel_checks(st.analysis, st.settings, "gamma", y, run=st.run, ijk=ijk)
    assert panel.model.raw("t") == ref.t
    # switching gamma off falls back to the default rule
    assert st.update_settings(kernels=("boxcar", "gaussian", "double-gamma"))
    c = _settle(panel, qtbot)
    assert c.kernel == "double-gamma"
    assert [panel.kernel_box.itemData(k) for k in range(panel.kernel_box.count())] == [
        "boxcar",
        "gaussian",
        "double-gamma",
    ]


# ----------------------------------------------------------------------------- flags


def test_clicking_a_flag_shows_its_figure(win, qtbot, demo_files):
    st = _open_demo(win)
    st.update_settings(noise="ols")  # the demo's autocorrelation finding is about OLS
    panel = _show_checks(win, qtbot)
    st.set_voxel(tuple(_truth()["noisy_cluster"]["centre_voxel"]))
    c = _settle(panel, qtbot)
    assert len(c.flags) >= 1
    labels = [lb for lb in panel.flag_items() if lb.figure is not None]
    assert [lb.text() for lb in labels] == [f.text for f in c.flags]
    for flag, label in zip(c.flags, labels):
        other = next(k for k in FIGURES if k != flag.figure)
        panel.show_figure(other)
        assert panel.stack.currentWidget().key == other
        qtbot.mouseClick(label, Qt.MouseButton.LeftButton)
        assert panel.stack.currentWidget().key == flag.figure
        assert panel.figure_buttons[flag.figure].isChecked()


def test_planted_demo_findings_raise_their_flags(win, qtbot, demo_files):
    """demo_truth.json: the late cluster (tone, 3 s late), the autocorrelated cluster and the
    rim motion artefact (edge voxels jumping at the spike volumes)."""
    truth = _truth()
    st = _open_demo(win)
    panel = _show_checks(win, qtbot)

    st.set_voxel(tuple(truth["late_cluster"]["centre_voxel"]))
    c = _settle(panel, qtbot)
    assert "timing" in _flag_ids(panel)
    assert c.best_shift_s > 1.0  # later than the kernel

    st.set_voxel(tuple(truth["noisy_cluster"]["centre_voxel"]))
    st.update_settings(noise="ols")  # the demo's finding: OLS leaves it autocorrelated
    _settle(panel, qtbot)
    assert "autocorrelation" in _flag_ids(panel)
    st.update_settings(noise="arp")

    st.set_voxel(tuple(truth["drift_cluster"]["centre_voxel"]))
    _settle(panel, qtbot)
    assert "drift" in _flag_ids(panel)

    st.set_voxel(tuple(truth["rim_motion"]["centre_voxel"]))
    _settle(panel, qtbot)
    assert "edge" in _flag_ids(panel)
    # without the motion confounds the jumps at the spike volumes stand out
    assert st.update_settings(confound_columns=())
    c = _settle(panel, qtbot)
    ids = _flag_ids(panel)
    assert "outliers" in ids and "influence" in ids
    spikes = set(truth["rim_motion"]["spike_volumes"])
    assert set(c.outlier_volumes) & spikes
    assert set(c.influential_volumes) & spikes


def test_clean_synthetic_voxel_has_no_flags(win, qtbot, tmp_path):
    spec = _clean_run(tmp_path)
    assert win.open_run(spec["run"], spec["events"], background=False), win.last_error
    st = win.state
    panel = _show_checks(win, qtbot)
    st.set_voxel(spec["hot"])
    c = _settle(panel, qtbot)
    assert c.flags == ()
    labels = panel.flag_items()
    assert len(labels) == 1 and labels[0].text() == NO_FLAGS and labels[0].figure is None
    assert c.edge_distance_mm > 6.0


# ----------------------------------------------------------------------------- scheduling


def test_hidden_part_computes_nothing(win, qtbot, demo_files, monkeypatch):
    calls = []

    def counting(*args, **kwargs):
        calls.append(kwargs.get("ijk"))
        return voxel_checks(*args, **kwargs)

    monkeypatch.setattr(checks_panel, "voxel_checks", counting)
    st = _open_demo(win)
    win.docks["Model"].raise_()  # Checks sits behind Model
    qtbot.waitUntil(lambda: not win.checks.wanted(), timeout=WAIT)
    for ijk in [(20, 20, 15), (21, 20, 15), (22, 20, 15)]:
        st.set_voxel(ijk)
    st.update_settings(noise="ar1")
    # the requests have been handled (the panel's timer fired and _launch ran) and none
    # started a job: the panel counts jobs as it starts them, so this cannot pass by timing
    qtbot.waitUntil(lambda: not win.checks._timer.isActive(), timeout=WAIT)
    assert win.checks.calls == 0 and calls == []
    panel = _show_checks(win, qtbot)
    _settle(panel, qtbot)
    assert calls == [(22, 20, 15)]
    win.docks["Checks"].close()
    st.set_voxel((10, 20, 15))
    qtbot.waitUntil(lambda: not panel._timer.isActive(), timeout=WAIT)
    assert panel.calls == 1 and len(calls) == 1


def test_fits_do_not_wait_for_the_checks(win, qtbot, demo_files, monkeypatch):
    gate = threading.Event()
    started = threading.Event()
    calls = []

    def slow(*args, **kwargs):
        calls.append(kwargs.get("ijk"))
        started.set()
        gate.wait(30)
        return voxel_checks(*args, **kwargs)

    monkeypatch.setattr(checks_panel, "voxel_checks", slow)
    st = _open_demo(win)
    panel = _show_checks(win, qtbot)
    try:
        qtbot.waitUntil(started.is_set, timeout=WAIT)  # the first checks are now blocked
        model = win.fits.model
        for ijk in [(33, 23, 15), (28, 37, 20)]:
            st.set_voxel(ijk)
            # the click's fits are in the Fits table at once, while the checks are still held
            y = st.run.timeseries(ijk)
            noise = st.analysis.noise_at(st.run, ijk, st.settings)
            ref = st.analysis.fit_voxel(y, st.settings, noise)
            rows = {model.raw(r, "kernel"): model.raw(r, "t") for r in range(model.rowCount())}
            assert rows == {f.kernel: f.t for f in ref.fits}
            qtbot.wait(30)
            assert not gate.is_set() and panel.computing and not panel.is_current()
    finally:
        gate.set()
    c = _settle(panel, qtbot)
    assert st.voxel == (28, 37, 20) and c is panel.checks
    assert tuple(panel.shown_key[4]) == (28, 37, 20)
    # coalesced: the first call, then only the latest voxel (the middle one was skipped)
    assert calls[-1] == (28, 37, 20) and (33, 23, 15) not in calls


def test_no_events_says_so(win, qtbot, ras_run, tmp_path):
    run = tmp_path / "bare_bold.nii"
    img = nib.load(str(ras_run["run"]))
    nib.save(img, str(run))
    assert win.open_run(run, background=False), win.last_error
    panel = _show_checks(win, qtbot)
    qtbot.waitUntil(lambda: "events file" in panel.caption.text(), timeout=WAIT)
    assert panel.checks is None and panel.model.rowCount() == 0


def test_view_menu_has_a_checks_toggle(win):
    titles = [a.text() for a in win.menuBar().actions()]
    view = win.menuBar().actions()[titles.index("&View")].menu()
    assert "Checks" in [a.text() for a in view.actions()]


# ----------------------------------------------------------------------------- look (polish)


def test_style_sheet_arrows_point_at_real_files():
    """The spin box and combo box arrows are drawn from SVG files in resources/ (a missing
    file would leave Qt's broken default glyphs)."""
    import re
    from pathlib import Path

    from voxelscope.gui.colours import stylesheet

    qss = stylesheet()
    for sub in ("::up-arrow", "::down-arrow", "::up-button", "::drop-down"):
        assert sub in qss
    urls = re.findall(r"url\(([^)]+)\)", qss)
    assert any(u.endswith("arrow_up.svg") for u in urls)
    for u in urls:
        assert Path(u).is_file(), u


def test_fits_headers_are_not_clipped_in_a_small_window(win, ras_run, qtbot):
    """Each Fits column is at least as wide as its header text (a narrow window scrolls)."""
    assert win.open_run(ras_run["run"], background=False), win.last_error
    dock = win.docks["Fits"]
    dock.setFloating(True)
    dock.resize(340, 220)  # as narrow as the part gets beside Map at 1280 px
    qtbot.wait(50)
    table = win.fits.table
    assert table.viewport().width() < 420
    hh = table.horizontalHeader()
    names = win.fits.model.columns()
    assert "variance" in names
    for c in range(1, len(names)):
        assert table.columnWidth(c) >= hh.sectionSizeHint(c), names[c]


def test_response_figure_draws_the_cores_average(win, qtbot, demo_files):
    """Issue 13: the Around onsets figure draws the core's peri-event mean, band and each
    kernel's prediction (the numbers of voxelscope.core.response, tested against
    statsmodels there)."""
    st = _open_demo(win)
    panel = _show_checks(win, qtbot)
    ijk = tuple(_truth()["late_cluster"]["centre_voxel"])
    st.set_voxel(ijk)
    shown = _settle(panel, qtbot)
    panel.show_figure("response")
    page = panel.stack.currentWidget()
    assert page.key == "response"
    r = shown.response
    x, y = page.mean.getData()
    np.testing.assert_allclose(x, r["times"])
    np.testing.assert_allclose(y, r["mean"])
    assert set(r["predictions"]) == set(st.settings.kernels)
    assert "averaged over" in page.caption.text()
