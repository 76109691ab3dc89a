"""Names and text from files are shown as plain text, never as markup.

Condition names, contrast text, mark titles and notes, file names and error messages come
from files a user may have been sent. Qt renders a label's text as rich text (HTML) when it
merely *looks* like markup (``Qt.TextFormat.AutoText``, the default), so a ``trial_type`` of
``<h1 style="color:red">FAKE RESULT p<0.001</h1><img src="file:///...">`` would draw large
red type and load a local image. This module closes that door in two ways:

- :func:`make_plain` switches every ``QLabel`` of the window still on the default
  ``AutoText`` to ``PlainText``. A label that is meant to show markup sets ``RichText``
  itself and escapes every piece of outside text with :func:`esc`.
- :func:`plain_tooltip` turns any text into a tooltip that Qt shows literally.

Examples
--------
>>> esc('<b>tap</b> & "tone"')
'&lt;b&gt;tap&lt;/b&gt; &amp; &quot;tone&quot;'
"""

from __future__ import annotations

import html

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel, QMessageBox, QWidget

__all__ = ["esc", "make_plain", "plain_tooltip"]


def esc(text: object) -> str:
    """Outside text made safe to put inside rich text."""
    return html.escape(str(text), quote=True)


def plain_tooltip(text: object) -> str:
    """A tooltip string that Qt shows as the literal ``text`` (line breaks kept).

    Text without ``<`` or ``&`` cannot be taken for markup and is returned as it is.

    >>> plain_tooltip("run.nii"), plain_tooltip("<b>x</b>")
    ('run.nii', '<p style="white-space:pre-wrap">&lt;b&gt;x&lt;/b&gt;</p>')
    """
    s = str(text)
    if "<" not in s and "&" not in s:
        return s
    return f'<p style="white-space:pre-wrap">{esc(s)}</p>'


def make_plain(root: QWidget) -> int:
    """Switch every label under ``root`` still on ``AutoText`` to ``PlainText``.

    Labels inside message boxes are left to the box's own text format. Returns how many
    labels were switched. Cheap (one walk over the widgets), so the window calls it after
    it is built and after each run opens (when parts add labels).
    """
    n = 0
    for label in root.findChildren(QLabel):
        if label.textFormat() == Qt.TextFormat.AutoText and not _in_message_box(label):
            label.setTextFormat(Qt.TextFormat.PlainText)
            n += 1
    return n


def _in_message_box(label: QLabel) -> bool:
    parent = label.parent()
    while parent is not None:
        if isinstance(parent, QMessageBox):
            return True
        parent = parent.parent()
    return False
