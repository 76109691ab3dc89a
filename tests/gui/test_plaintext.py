"""Names from files render as plain text in the window (voxelscope/gui/plaintext.py).

Protects against a ``trial_type`` written as HTML (large red "FAKE RESULT", an image loaded
from the local disk) being rendered as markup: every label showing it is plain text or
shows it escaped, and the window image does not change colour to the injected red.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel

from tests.gui.conftest import write_events
from voxelscope.gui.plaintext import esc, make_plain, plain_tooltip

EVIL = '<h1 style="color:red">FAKE RESULT p<0.001</h1><img src="file:///etc/hostname">'


def test_html_condition_name_is_shown_literally(window, ras_run, tmp_path, qapp):
    events = write_events(tmp_path / "evil_events.tsv", [(0, 16, EVIL), (40, 10, "tap")])
    assert window.open_run(ras_run["run"], events=str(events), background=False)
    for _ in range(5):
        qapp.processEvents()
    shown = [lab for lab in window.findChildren(QLabel) if "FAKE RESULT" in lab.text()]
    assert shown, "the condition name should appear somewhere (Fits caption, Checks, ...)"
    for lab in shown:
        plain = lab.textFormat() == Qt.TextFormat.PlainText
        assert plain or "<h1" not in lab.text(), (lab.objectName(), lab.text())
    # the legend of Signal is rich text with the name escaped
    assert "<h1" not in window.signal.legend.text()


def test_make_plain_switches_auto_text_labels(qtbot):
    from PySide6.QtWidgets import QWidget

    root = QWidget()
    qtbot.addWidget(root)
    auto = QLabel("<b>x</b>", root)
    rich = QLabel("<b>y</b>", root)
    rich.setTextFormat(Qt.TextFormat.RichText)
    assert make_plain(root) == 1
    assert auto.textFormat() == Qt.TextFormat.PlainText
    assert rich.textFormat() == Qt.TextFormat.RichText


def test_escape_helpers():
    assert esc("<i>a</i>") == "&lt;i&gt;a&lt;/i&gt;"
    assert "&lt;h1" in plain_tooltip(EVIL) and "<h1" not in plain_tooltip(EVIL)
