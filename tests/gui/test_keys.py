"""The keys-and-mouse table stays true: every shortcut the window has is in it."""

from PySide6.QtCore import Qt
from PySide6.QtGui import QAction, QKeySequence

from voxelscope.gui.keys import BINDINGS, keys_html, listed_keys


def _portable(seq: QKeySequence) -> str:
    return seq.toString(QKeySequence.SequenceFormat.PortableText)


def test_every_shortcut_of_the_window_is_listed(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    listed = {_portable(QKeySequence(k)) for k in listed_keys()}
    found = {}
    for act in window.findChildren(QAction):
        for seq in act.shortcuts():
            found[_portable(seq)] = act.text()
    assert found, "no shortcut found: the test looks in the wrong place"
    missing = {k: v for k, v in found.items() if k not in listed}
    assert not missing, f"shortcuts missing from voxelscope/gui/keys.py: {missing}"


def test_window_wide_keys_listed_are_bound(window):
    bound = {_portable(s) for a in window.findChildren(QAction) for s in a.shortcuts()}
    for key in listed_keys("Anywhere"):
        assert _portable(QKeySequence(key)) in bound, key


def test_show_mode_keys_are_listed():
    from voxelscope.gui import show

    names = {QKeySequence(k).toString() for k in show.NEXT_KEYS | show.PREVIOUS_KEYS}
    names |= {"Home", "End", "Esc"}
    assert names <= listed_keys("Show mode")


def test_slice_keys_listed_do_something(window, ras_run, qtbot):
    """Each key listed for Slices moves the crosshair or the view."""
    assert window.open_run(ras_run["run"], background=False)
    st = window.state
    view = window.slices.views["axial"]
    view.setFocus()
    for key in ("Left", "Right", "Up", "Down", "PgUp", "PgDown"):
        st.set_voxel((4, 5, 3))
        code = QKeySequence(key)[0].key()
        qtbot.keyClick(view, code)
        assert st.voxel != (4, 5, 3), key
    assert "Home" in listed_keys("Slices")


def test_help_page_has_every_row():
    html = keys_html()
    for b in BINDINGS:
        assert b.what.replace("'", "&#x27;") in html
    assert html.count("<tr>") == len(BINDINGS)


def test_listed_keys_parse():
    for k in listed_keys():
        assert QKeySequence(k).count() == 1 and QKeySequence(k)[0].key() != Qt.Key.Key_unknown, k
