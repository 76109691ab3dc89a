"""Slices: clicks select the voxel the affine says, crosshairs, keys, overlay."""

import numpy as np
import pytest
from nibabel.affines import apply_affine
from PySide6.QtCore import QPointF, Qt
from PySide6.QtWidgets import QApplication

from voxelscope.core.numfmt import format_value as fmt
from voxelscope.gui import slices as slices_module
from voxelscope.gui.slices import PLANES, overlay_rgba


def _open(window, spec):
    ok = window.open_run(spec["run"], events=spec.get("events"), background=False)
    assert ok, window.last_error
    QApplication.processEvents()  # let the workspace take its final size before clicking
    return window.state


def _expected_display(affine, shape, voxel):
    """Display position from world coordinates only: along world axis d, the rank of the
    voxel's coordinate among the grid's voxel centres (apply_affine, nibabel)."""
    voxel = np.asarray(voxel)
    out = []
    for d in range(3):
        a = int(np.argmax(np.abs(affine[d, :3])))  # storage axis that moves along world d
        idx = np.repeat(voxel[None, :], shape[a], axis=0)
        idx[:, a] = np.arange(shape[a])
        coords = apply_affine(affine, idx)[:, d]
        out.append(int(np.searchsorted(np.sort(coords), coords[voxel[a]])))
    return out


def _screen_point(view, display):
    """Viewport pixel of a display voxel's centre, through the backdrop image item."""
    f = view.state.backdrop.factor
    h, v = display[view.h_axis], display[view.v_axis]
    scene = view.under.mapToScene(QPointF((h + 0.5) * f, (v + 0.5) * f))
    return view.mapFromScene(scene)


@pytest.mark.parametrize("fixture", ["las_run", "ras_run", "permuted_run"])
@pytest.mark.parametrize("plane", list(PLANES))
def test_click_selects_voxel_the_affine_says(request, window, qtbot, fixture, plane):
    spec = request.getfixturevalue(fixture)
    state = _open(window, spec)
    run = state.run
    shape, affine = run.shape, run.affine
    rng = np.random.default_rng(abs(hash((fixture, plane))) % 2**32)
    view = window.slices.views[plane]
    for _ in range(4):
        start = tuple(int(rng.integers(0, n)) for n in shape)
        state.set_voxel(start)
        # choose a new in-plane position; the through-plane index stays
        disp = _expected_display(affine, shape, start)
        disp[view.h_axis] = int(rng.integers(0, _n(shape, affine, view.h_axis)))
        disp[view.v_axis] = int(rng.integers(0, _n(shape, affine, view.v_axis)))
        target = _voxel_from_display(affine, shape, start, disp)
        qtbot.mouseClick(view.viewport(), Qt.MouseButton.LeftButton, pos=_screen_point(view, disp))
        assert state.voxel == target
        np.testing.assert_allclose(
            apply_affine(affine, state.voxel), apply_affine(affine, target), atol=1e-9
        )


def _n(shape, affine, d):
    return shape[int(np.argmax(np.abs(affine[d, :3])))]


def _voxel_from_display(affine, shape, start, disp):
    """Inverse of _expected_display by search over the grid (world coordinates only)."""
    out = list(start)
    for d in range(3):
        a = int(np.argmax(np.abs(affine[d, :3])))
        idx = np.repeat(np.asarray(start)[None, :], shape[a], axis=0)
        idx[:, a] = np.arange(shape[a])
        coords = apply_affine(affine, idx)[:, d]
        out[a] = int(np.argsort(coords)[disp[d]])
    return tuple(out)


@pytest.mark.parametrize("fixture", ["las_run", "ras_run"])
def test_screen_right_is_subject_right_and_up_is_anterior(request, window, qtbot, fixture):
    """In the axial view, a click further right selects a voxel further right in world x
    (R-A-S display convention), and a click higher up one further anterior."""
    state = _open(window, request.getfixturevalue(fixture))
    view = window.slices.views["axial"]
    run = state.run
    mid = tuple(n // 2 for n in run.shape)
    state.set_voxel(mid)
    w0 = apply_affine(run.affine, state.voxel)
    p = _screen_point(view, state.grid.to_display(mid))
    dx = view.width() // 8
    qtbot.mouseClick(view.viewport(), Qt.MouseButton.LeftButton, pos=p + type(p)(dx, 0))
    w1 = apply_affine(run.affine, state.voxel)
    assert w1[0] > w0[0] and np.isclose(w1[1], w0[1])
    state.set_voxel(mid)
    qtbot.mouseClick(view.viewport(), Qt.MouseButton.LeftButton, pos=p + type(p)(0, -dx))
    w2 = apply_affine(run.affine, state.voxel)
    assert w2[1] > w0[1] and np.isclose(w2[0], w0[0])


def test_crosshair_moves_in_all_three_views(window, qtbot, las_run):
    state = _open(window, las_run)
    target = (3, 15, 2)
    before = {n: (v.vline.value(), v.hline.value()) for n, v in window.slices.views.items()}
    state.set_voxel(target)
    disp = _expected_display(state.run.affine, state.run.shape, target)
    for name, view in window.slices.views.items():
        centre = view.under.mapToView(
            QPointF(disp[view.h_axis] + 0.5, disp[view.v_axis] + 0.5) * state.backdrop.factor
        )
        assert (view.vline.value(), view.hline.value()) != before[name]
        assert view.vline.value() == pytest.approx(centre.x())
        assert view.hline.value() == pytest.approx(centre.y())


def test_click_in_one_view_moves_crosshairs_in_the_others(window, qtbot, ras_run):
    state = _open(window, ras_run)
    state.set_voxel((4, 5, 3))
    coronal, sagittal = window.slices.views["coronal"], window.slices.views["sagittal"]
    before = (coronal.vline.value(), sagittal.vline.value())
    axial = window.slices.views["axial"]
    disp = list(state.grid.to_display(state.voxel))
    disp[0], disp[1] = 7, 9
    qtbot.mouseClick(axial.viewport(), Qt.MouseButton.LeftButton, pos=_screen_point(axial, disp))
    assert state.voxel == (7, 9, 3)
    assert coronal.vline.value() != before[0]  # coronal horizontal axis is x
    assert sagittal.vline.value() != before[1]  # sagittal horizontal axis is y


@pytest.mark.parametrize("fixture", ["las_run", "permuted_run"])
def test_keys_move_the_voxel_in_world_directions(request, window, qtbot, fixture):
    """Right arrow -> +x (towards R), Up -> +y in the axial view, Page Up -> +z."""
    state = _open(window, request.getfixturevalue(fixture))
    run = state.run
    view = window.slices.views["axial"]
    mid = tuple(n // 2 for n in run.shape)
    for key, axis in ((Qt.Key.Key_Right, 0), (Qt.Key.Key_Up, 1), (Qt.Key.Key_PageUp, 2)):
        state.set_voxel(mid)
        w0 = apply_affine(run.affine, state.voxel)
        view.setFocus()
        qtbot.keyClick(view, key)
        w1 = apply_affine(run.affine, state.voxel)
        step = w1 - w0
        assert step[axis] > 0
        assert np.allclose(np.delete(step, axis), 0)
    state.set_voxel(mid)
    qtbot.keyClick(view, Qt.Key.Key_Left)
    qtbot.keyClick(view, Qt.Key.Key_Down)
    qtbot.keyClick(view, Qt.Key.Key_PageDown)
    w = apply_affine(run.affine, state.voxel) - apply_affine(run.affine, mid)
    assert np.all(w < 0)


def test_wheel_steps_the_slice(window, qtbot, ras_run):
    state = _open(window, ras_run)
    state.set_voxel((4, 5, 3))
    window.slices.views["axial"].box.stepped.emit(1)
    assert state.voxel == (4, 5, 4)
    window.slices.views["sagittal"].box.stepped.emit(-1)
    assert state.voxel == (3, 5, 4)


def test_overlay_threshold_is_signed_and_two_tailed():
    """|v| > t is drawn, exactly t is not (the rule Findings' clusters use)."""
    lut = np.arange(256, dtype=np.uint8)[:, None].repeat(3, axis=1)
    v = np.array([[-4.0, -2.9, 0.0], [2.9, 3.0, np.nan], [3.01, -3.0, -3.01]])
    rgba = overlay_rgba(v, lut, 4.0, 3.0, 0.5)
    assert rgba[..., 3].tolist() == [[128, 0, 0], [0, 0, 0], [128, 0, 128]]
    # -limit -> first colour, +limit -> last, 0 -> middle
    assert rgba[0, 0, 0] == 0 and rgba[1, 1, 0] == round((3.0 + 4) / 8 * 255)


def test_map_overlay_and_readout(window, qtbot, ras_run):
    state = _open(window, ras_run)
    assert window.open_map(ras_run["map"])
    state.set_voxel(ras_run["hot"])
    axial = window.slices.views["axial"]
    assert axial.over.isVisible() and axial.over.image is not None
    assert "Map</b> 9.00" in window.slices.readout.text()
    assert window.slices.colour_bar.isVisible()
    state.set_map_settings(threshold=10.0)
    img = axial.over.image
    assert int(img[..., 3].max()) == 0  # nothing reaches |v| >= 10


def test_drag_moves_the_voxel_every_frame_and_checks_wait_for_rest(
    window, qtbot, ras_run, monkeypatch
):
    """Dragging with the left button held moves the voxel at every move (the voxel follows
    the pointer, its data at once, its fits from the background); the state says a drag
    is on, so the Checks wait until the pointer rests or the button is let go, and the
    fits end on the voxel where the drag ends."""
    from PySide6.QtCore import QEvent
    from PySide6.QtGui import QMouseEvent

    from voxelscope.gui import checks_panel

    monkeypatch.setattr(checks_panel, "DRAG_REST_MS", 60_000)  # never "rests" in this test

    st = _open(window, ras_run)
    view = window.slices.views["axial"]
    vp = view.viewport()
    grid = st.grid
    d = list(grid.to_display(st.voxel))
    n_h = grid.display_shape[view.h_axis]

    def send(kind, h, buttons):
        d[view.h_axis] = h
        pos = QPointF(view.viewport_point(d))
        button = (
            Qt.MouseButton.NoButton if kind == QEvent.Type.MouseMove else Qt.MouseButton.LeftButton
        )
        ev = QMouseEvent(
            kind, pos, vp.mapToGlobal(pos), button, buttons, Qt.KeyboardModifier.NoModifier
        )
        QApplication.sendEvent(vp, ev)
        QApplication.processEvents()

    checks = window.checks
    from PySide6.QtWidgets import QDockWidget

    window.findChild(QDockWidget, "dock_checks").raise_()  # on screen: it computes
    qtbot.waitUntil(checks.wanted, timeout=5000)
    # let the layout settle after raising the dock: the press must land where it is aimed
    size = None
    while size != view.size():
        size = view.size()
        qtbot.wait(20)
    held = Qt.MouseButton.LeftButton
    send(QEvent.Type.MouseButtonPress, 0, held)
    calls = checks.calls
    seen = []
    for h in range(1, n_h):
        send(QEvent.Type.MouseMove, h, held)
        seen.append(grid.to_display(st.voxel)[view.h_axis])
        assert st.dragging
        assert np.array_equal(st.series, st.run.timeseries(st.voxel))
        # the fits are this voxel's or none yet (never those of a voxel already left)
        assert st.fits is None or np.array_equal(st.fits.y, st.series)
    assert checks.calls == calls  # no checks job while the pointer moves
    send(QEvent.Type.MouseButtonRelease, n_h - 1, Qt.MouseButton.NoButton)
    assert not st.dragging
    assert seen[-1] == n_h - 1 and len(set(seen)) >= n_h - 2
    qtbot.waitUntil(lambda: st.fits is not None, timeout=10000)
    assert np.array_equal(st.fits.y, st.run.timeseries(st.voxel))
    qtbot.waitUntil(lambda: checks.calls > calls, timeout=5000)  # let go: checked now


def test_anatomy_is_drawn_at_its_own_resolution_and_aligned(window, qtbot, ras_run, tmp_path):
    """Issue 17 item 11: a finer anatomy on another grid (x flipped, 1 x 1 x 0.5 mm) is drawn
    plane by plane at its own resolution; the centre of the anatomy voxel at a run voxel's
    centre (nibabel.affines.apply_affine) lies under the crosshair (the overlay's grid)."""
    import nibabel as nib

    shape = (30, 34, 50)
    aff = np.diag([-1.0, 1.0, 0.5, 1.0])
    aff[:3, 3] = (12.0, -16.0, -10.0)  # every run voxel centre is an anatomy voxel centre
    data = np.arange(np.prod(shape), dtype=np.float32).reshape(shape)  # value = flat index
    anat = tmp_path / "sub-ras_T1w.nii.gz"
    nib.save(nib.Nifti1Image(data, aff), anat)
    assert window.open_run(ras_run["run"], anatomy=str(anat), background=False), window.last_error
    state = window.state
    planes = {"axial": (30, 34), "coronal": (30, 50), "sagittal": (34, 50)}
    for voxel in [(2, 3, 4), (0, 0, 0), (8, 10, 6)]:
        state.set_voxel(voxel)
        world = apply_affine(ras_run["affine"], voxel)
        a_ijk = np.round(apply_affine(np.linalg.inv(aff), world)).astype(int)
        assert np.allclose(apply_affine(aff, a_ijk), world)
        flat = float(np.ravel_multi_index(tuple(a_ijk), shape))
        for name, view in window.slices.views.items():
            image = view.under.image
            assert image.shape == planes[name]  # native plane, not the 3 mm run grid
            hits = np.argwhere(image == flat)
            assert len(hits) == 1, (name, voxel)
            p, q = hits[0]
            centre = view.under.mapToView(QPointF(p + 0.5, q + 0.5))
            assert centre.x() == pytest.approx(view.vline.value(), abs=1e-6)
            assert centre.y() == pytest.approx(view.hline.value(), abs=1e-6)
    # the readout gives the anatomy's own value at the voxel
    state.set_voxel((2, 3, 4))
    world = apply_affine(ras_run["affine"], (2, 3, 4))
    a_ijk = tuple(np.round(apply_affine(np.linalg.inv(aff), world)).astype(int))
    assert f"<b>Anatomy</b> {fmt('value', data[a_ijk])}" in window.slices.readout.text()


def test_a_tilted_anatomy_is_sampled_in_the_runs_planes(
    window, qtbot, ras_run, tmp_path, monkeypatch
):
    """An anatomy rotated 25 degrees about x against the run: no plane of its own lies in the
    run's planes, so each view samples it in the run's plane through the voxel. The anatomy
    holds a linear function of world position (trilinear sampling is exact for it), so every
    pixel must equal that function at the pixel centre's world position (through the run's
    affine, nibabel.affines.apply_affine), and the plane moves with the voxel."""
    import nibabel as nib

    c, s = np.cos(np.radians(25)), np.sin(np.radians(25))
    aff = np.eye(4)
    aff[:3, :3] = np.array([[1.0, 0, 0], [0, c, -s], [0, s, c]]) @ np.diag([1.5, 1.5, 1.5])
    aff[:3, 3] = (-20.0, -30.0, -25.0)
    shape = (40, 60, 60)
    ijk = np.indices(shape).reshape(3, -1).T
    world = apply_affine(aff, ijk)
    coef = np.array([1.0, -2.0, 3.0])
    data = (world @ coef + 500.0).reshape(shape).astype(np.float32)
    anat = tmp_path / "sub-ras_T1w.nii.gz"
    nib.save(nib.Nifti1Image(data, aff), anat)
    assert window.open_run(ras_run["run"], anatomy=str(anat), background=False), window.last_error
    state = window.state
    grid = state.grid
    inv = np.linalg.inv(aff)
    for voxel in [(2, 3, 4), (5, 6, 2)]:
        state.set_voxel(voxel)
        for name, view in window.slices.views.items():
            image = view.under.image
            m_h, m_v = image.shape
            n_h = grid.display_shape[view.h_axis]
            n_v = grid.display_shape[view.v_axis]
            assert m_h >= n_h and m_v >= n_v  # at least as fine as the run
            d = np.array(grid.to_display(voxel), float)
            checked = 0
            for p, q in [(0, 0), (m_h // 2, m_v // 3), (m_h - 1, m_v - 1), (m_h // 3, m_v - 2)]:
                d[view.h_axis] = (p + 0.5) * n_h / m_h - 0.5
                d[view.v_axis] = (q + 0.5) * n_v / m_v - 0.5
                w = apply_affine(grid.display_affine(), d)
                a = apply_affine(inv, w)
                if np.all(a >= 0) and np.all(a <= np.array(shape) - 1):  # inside the anatomy
                    assert image[p, q] == pytest.approx(w @ coef + 500.0, abs=1e-2), (name, p, q)
                    checked += 1
            assert checked >= 2, name
    # back on planes seen before: the planes kept are the ones sampled, and only the last
    # few are kept
    first = {name: view.under.image.copy() for name, view in window.slices.views.items()}
    for voxel in [(2, 3, 4), (5, 6, 2)]:
        state.set_voxel(voxel)
    for name, view in window.slices.views.items():
        assert np.array_equal(view.under.image, first[name]), name
        plane, _rect = view.tilted_plane(grid.to_display((5, 6, 2))[view.n_axis])
        assert np.array_equal(view.under.image, plane), name
    monkeypatch.setattr(slices_module, "TILTED_KEEP_BYTES", 1)
    for k in range(3):
        state.set_voxel((k, k, k))
    assert all(len(v._tilted_planes) == 1 for v in window.slices.views.values())
