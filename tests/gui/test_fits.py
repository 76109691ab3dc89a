"""Fits table: the same numbers as the core's Analysis.fit_voxel, and an outside check."""

import numpy as np
import pytest
import statsmodels.api as sm
from PySide6.QtGui import QGuiApplication

from voxelscope.core.companions import find_companions
from voxelscope.core.confounds import read_confounds
from voxelscope.core.events import read_events
from voxelscope.core.model import Analysis
from voxelscope.core.numfmt import format_value as fmt
from voxelscope.core.run import open_run
from voxelscope.gui.fits import format_value

COLUMNS = {
    "estimate": "estimate",
    "variance": "variance",
    "t": "t",
    "df": "df",
    "p": "p",
    "R²": "r2",
}


def _core(spec, settings, voxel):
    """Fit the voxel with the core directly, from the files (not from the window's objects)."""
    run = open_run(spec["run"])
    comp = find_companions(spec["run"])
    analysis = Analysis(
        read_events(comp.events),
        run.n_volumes,
        run.tr,
        read_confounds(comp.confounds),
        run.reference_time_s,
    )
    y = run.timeseries(voxel)
    return analysis, y, analysis.fit_voxel(y, settings)


def _table(window):
    m = window.fits.model
    return {m.raw(r, "kernel"): {c: m.raw(r, c) for c in m.columns()} for r in range(m.rowCount())}


@pytest.mark.parametrize("noise", ["ols", "ar1"])
def test_table_equals_core_fit(window, ras_run, noise):
    assert window.open_run(ras_run["run"], background=False)
    st = window.state
    st.set_voxel(ras_run["hot"])
    # 6 FIR bins of one TR: 24 s would span the whole 40 s period of this synthetic design
    # (collinear)
    assert st.update_settings(noise=noise, fir_window_s=6 * window.state.analysis.tr)
    assert st.update_settings(kernels=("boxcar", "gamma", "double-gamma", "fir"))
    assert st.settle_fits()  # the voxel's refit after a model change runs in the background
    table = _table(window)
    _a, _y, fits = _core(ras_run, st.settings, ras_run["hot"])
    assert list(table) == [f.kernel for f in fits.fits]
    for f in fits.fits:
        row = table[f.kernel]
        for col, attr in COLUMNS.items():
            assert row[col] == pytest.approx(getattr(f, attr), rel=1e-12, abs=1e-300)
        r = list(table).index(f.kernel)
        if noise == "ar1":  # rho sits in the notes line and the copied table, not a column
            assert window.fits.model.raw(r, "rho") == pytest.approx(f.rho, rel=1e-12)
            assert f"{f.kernel} {fmt('r', f.rho)}" in window.fits.noise_line.full_text()
        else:
            assert window.fits.model.raw(r, "rho") is None
        assert "rho" not in row
    fir = fits.by_kernel("fir")
    assert window.fits.model.raw(list(table).index("fir"), "F") == pytest.approx(fir.f, rel=1e-12)
    assert f"fir F({fir.f_df[0]}, {fir.f_df[1]})" in window.fits.noise_line.full_text()
    assert "\tF\tdf F\tp F" in window.fits.model.to_tsv().splitlines()[0]
    # the columns are the same whatever the model (no F columns that come and go)
    assert st.update_settings(kernels=("boxcar", "gamma"))
    assert st.settle_fits()
    assert list(_table(window)["gamma"]) == list(table["fir"])
    assert "F test" not in window.fits.noise_line.full_text()


def test_boxcar_row_matches_statsmodels(window, ras_run):
    """OLS t, df and R² of the boxcar row against statsmodels OLS + t_test (outside reference)."""
    assert window.open_run(ras_run["run"], background=False)
    st = window.state
    st.update_settings(noise="ols")  # statsmodels OLS is the reference
    st.set_voxel(ras_run["hot"])
    analysis, y, _ = _core(ras_run, st.settings, ras_run["hot"])
    X = analysis.design("boxcar", st.settings).X
    w = analysis.contrast_weights("boxcar", st.settings)
    ref = sm.OLS(y, X).fit()
    tt = ref.t_test(w[None, :])
    row = _table(window)["boxcar"]
    assert row["t"] == pytest.approx(float(np.squeeze(tt.tvalue)), rel=1e-8)
    assert row["estimate"] == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-8)
    assert row["df"] == int(ref.df_resid)
    assert row["R²"] == pytest.approx(ref.rsquared, rel=1e-8)


def test_copy_as_tsv(window, ras_run, qtbot):
    assert window.open_run(ras_run["run"], background=False)
    text = window.fits.copy()
    assert QGuiApplication.clipboard().text() == text
    lines = text.strip().split("\n")
    assert lines[0].split("\t")[:7] == ["kernel", "estimate", "variance", "t", "df", "p", "R²"]
    kernels = [line.split("\t")[0] for line in lines[1:]]
    assert kernels == list(window.state.settings.kernels)
    t_col = [float(line.split("\t")[3]) for line in lines[1:]]
    assert t_col == [f.t for f in window.state.fits.fits]


def test_number_formats():
    assert format_value("p", 0.5) == "0.500"  # the one rule: core/numfmt.py
    assert format_value("p", 2e-7) == "2.00e-07"
    assert format_value("df", 210) == "210"
    assert format_value("t", float("nan")) == "–"


def test_a_damaged_cache_met_after_loading_is_said_in_the_window(tmp_path, qtbot, monkeypatch):
    """Issue 11 item 2 in the window: the cache block read by the first click fails its
    checksum; the fit equals nibabel's data and the status line says the cache was rebuilt."""
    import nibabel as nib
    from conftest import _synthetic

    from voxelscope.core import cache
    from voxelscope.gui.loading import load_bundle
    from voxelscope.gui.state import ViewerState

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "own-cache"))
    files = _synthetic(tmp_path, np.eye(4), "damaged", gz=True)
    open_run(files["run"], tr=2.0)  # builds the cache
    (rows,) = cache.default_cache_dir().glob("vxs-*.rows")
    blob = bytearray(rows.read_bytes())
    blob[len(blob) // 2] ^= 0x55
    rows.write_bytes(bytes(blob))
    state = ViewerState()
    said = []
    state.message.connect(said.append)
    state.set_bundle(load_bundle(files["run"], tr=2.0), voxel=(4, 5, 3))
    ref = nib.load(str(files["run"])).get_fdata()
    np.testing.assert_allclose(state.series, ref[4, 5, 3], rtol=1e-6)
    assert sum("is damaged" in w and "rebuilt" in w for w in said) == 1


def test_every_number_shows_whole_in_a_1280_px_window(demo_window, qtbot):
    """The demo at 1280 x 800 (the README's screenshot size): every cell of Fits is wider
    than its text plus the view's margins, so no number is cut to "13…" (a long header such
    as "estimate" once took that room from the t and df columns)."""
    w = demo_window((1280, 800))
    w.arrange(1280)
    qtbot.wait(100)
    table, model = w.fits.table, w.fits.model
    fm = table.fontMetrics()
    assert model.rowCount() >= 4
    for c in range(1, model.columnCount()):
        texts = [model.data(model.index(r, c)) or "" for r in range(model.rowCount())]
        widest = max(fm.horizontalAdvance(t) for t in texts)
        assert table.columnWidth(c) >= widest + 8, (model.columns()[c], table.columnWidth(c))
