"""Guard against reference-count bugs of PySide6 6.12.0 on Python 3.11 and older.

In PySide6-Essentials 6.12.0 (Python <= 3.11), calls from Python into Qt hand back
``None`` and ``True`` without taking a reference: every ``void`` method call (for example
``QObject.setObjectName``) steals one reference from ``None`` and every
``SignalInstance.emit`` one from ``True``. pyqtgraph makes thousands of such calls per
repaint, so after a short session the count of ``None`` or ``True`` reaches zero and the
interpreter aborts ("none_dealloc: deallocating None" or "bool_dealloc"). From Python 3.12
these objects are immortal and the bug is harmless.

:func:`install` probes for the bug and, only when it is present, keeps a wide surplus of
references on ``None``, ``True`` and ``False``, topped up by a timer, after every refit and
at exit. Extra references on these singletons are harmless: they are never freed. The real
fix is a PySide6 release without the bug; ``pyproject.toml`` should exclude 6.12.0.
"""

from __future__ import annotations

import atexit
import ctypes
import sys

__all__ = ["install", "leaky_singletons", "start_timer", "top_up"]

_SURPLUS = 1_000_000
_state: dict = {"installed": False, "active": False, "floors": {}}
_SINGLETONS = {"None": None, "True": True, "False": False}


def _refcount_cell(obj) -> ctypes.c_ssize_t:
    # CPython <= 3.11: ob_refcnt is the first field of every object, at id(obj).
    return ctypes.c_ssize_t.from_address(id(obj))


def leaky_singletons() -> list[str]:
    """Names of the singletons that lose references on Qt calls (empty when all is well)."""
    if sys.version_info >= (3, 12) or sys.implementation.name != "cpython":
        return []
    from PySide6.QtCore import QObject, Signal

    class _Probe(QObject):
        ping = Signal()

    probe = _Probe()
    out = []
    before = {k: sys.getrefcount(v) for k, v in _SINGLETONS.items()}
    for _ in range(64):
        probe.ping.emit()
        probe.setObjectName("probe")
    for k, v in _SINGLETONS.items():
        if sys.getrefcount(v) - before[k] <= -48:
            out.append(k)
    return out


def top_up() -> None:
    """Restore the surplus of references (no-op when the bug is absent)."""
    if not _state["active"]:
        return
    for name, floor in _state["floors"].items():
        obj = _SINGLETONS[name]
        need = floor - sys.getrefcount(obj)
        if need > 0:
            _refcount_cell(obj).value += need


def install() -> bool:
    """Probe once and start the guard when needed; returns whether it is active."""
    if _state["installed"]:
        return _state["active"]
    _state["installed"] = True
    if not leaky_singletons():
        return False
    _state["active"] = True
    _state["floors"] = {k: sys.getrefcount(v) + _SURPLUS for k, v in _SINGLETONS.items()}
    top_up()
    atexit.register(_on_exit)
    return True


def start_timer(parent) -> None:
    """A timer on ``parent`` (a QObject) topping up every 200 ms while the guard is active."""
    if not _state["active"]:
        return
    from PySide6.QtCore import QTimer

    timer = QTimer(parent)
    timer.setInterval(200)
    timer.timeout.connect(top_up)
    timer.start()


def _on_exit() -> None:
    # Shutdown releases many references at once and runs Qt code: leave a wide margin.
    _state["floors"] = {k: f + 50 * _SURPLUS for k, f in _state["floors"].items()}
    top_up()
