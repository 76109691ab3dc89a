"""The one guard every output path goes through.

Two promises, for every file voxelscope writes (maps, cluster tables, reports, figures,
screenshots, sessions, marks, exports):

1. **An output never replaces an input.** Every file the process reads as input is noted
   here (:func:`note_input`; the NIfTI loader and the text reader do it). An output path
   that is the same file as an input -- compared after resolving links, and by device and
   inode, so symbolic and hard links are caught -- is refused, with or without ``force``.
   Inputs given explicitly to :func:`guard_output` are checked the same way. The one
   exception is a *document* (a session or a marks file): saving it back over the file of
   the same kind that it was read from is allowed, like any editor's Save.
2. **An existing file is replaced only when asked** (``force=True``: ``--force`` on the
   command line, a question in the window).

The command line opens a fresh :func:`input_scope` for each command, so "input" means an
input of the same command; the window keeps one scope, so nothing it opened can be
overwritten by one of its exports.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> d = Path(tempfile.mkdtemp())
>>> run = d / "run.nii"
>>> _ = run.write_bytes(b"data")
>>> with input_scope():
...     note_input(run)
...     guard_output(d / "map.nii")
...     guard_output(run, force=True)
Traceback (most recent call last):
...
voxelscope.core.errors.InputError: ...run.nii is an input of this command; write ...
>>> guard_output(d / "run.nii", force=True).name
'run.nii'
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError, OutputExistsError

__all__ = [
    "DOCUMENT_KINDS",
    "forget_inputs",
    "guard_output",
    "input_scope",
    "is_input",
    "note_input",
    "noted_inputs",
]

#: Kinds of input that may be saved back over themselves (with ``force``).
DOCUMENT_KINDS = ("session", "marks")


@dataclass(frozen=True)
class _Noted:
    real: str  # os.path.realpath
    ident: tuple[int, int] | None  # (st_dev, st_ino) when it could be read
    kind: str


_LOCK = threading.Lock()
_SCOPES: list[dict[str, _Noted]] = [{}]


def _identity(path: str | os.PathLike[str]) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return None
    return (st.st_dev, st.st_ino)


def _real(path: str | os.PathLike[str]) -> str:
    try:
        return os.path.realpath(os.path.expanduser(os.fspath(path)))
    except (OSError, ValueError):
        return os.path.abspath(os.fspath(path))


def note_input(path: str | os.PathLike[str] | None, kind: str = "data") -> None:
    """Remember ``path`` as an input of the current command (None is ignored).

    ``kind`` is ``"data"`` for runs, events, confounds, sidecars and images, or one of
    :data:`DOCUMENT_KINDS` for files that may be saved back over themselves.
    """
    if path is None:
        return
    real = _real(path)
    noted = _Noted(real, _identity(real), kind)
    with _LOCK:
        old = _SCOPES[-1].get(real)
        if old is not None and old.kind == "data":
            return  # read as data once: stays protected as data
        _SCOPES[-1][real] = noted


def noted_inputs() -> list[Path]:
    """The inputs noted in the current scope (for messages and tests)."""
    with _LOCK:
        return [Path(n.real) for n in _SCOPES[-1].values()]


def forget_inputs() -> None:
    """Forget every input of the current scope (a new command in the same process)."""
    with _LOCK:
        _SCOPES[-1].clear()


@contextlib.contextmanager
def input_scope() -> Iterator[None]:
    """A fresh set of noted inputs for the duration of one command."""
    with _LOCK:
        _SCOPES.append({})
    try:
        yield
    finally:
        with _LOCK:
            _SCOPES.pop()
            if not _SCOPES:  # pragma: no cover - defensive
                _SCOPES.append({})


def _same(out_real: str, out_ident: tuple[int, int] | None, n: _Noted) -> bool:
    if out_real == n.real:
        return True
    if out_ident is None:
        return False
    ident = _identity(n.real) or n.ident
    return ident is not None and ident == out_ident


def is_input(
    path: str | os.PathLike[str],
    inputs: Iterable[str | os.PathLike[str] | None] = (),
    kind: str | None = None,
) -> bool:
    """True when ``path`` is a noted input (or one of ``inputs``), after resolving links.

    A noted input of document kind ``kind`` does not count (it may be saved back).
    """
    out_real = _real(path)
    out_ident = _identity(out_real)
    explicit = [_Noted(_real(p), _identity(p), "data") for p in inputs if p is not None]
    with _LOCK:
        noted = list(_SCOPES[-1].values())
    for n in explicit + noted:
        if kind is not None and n.kind == kind and kind in DOCUMENT_KINDS:
            continue
        if _same(out_real, out_ident, n):
            return True
    return False


def guard_output(
    path: str | os.PathLike[str],
    inputs: Iterable[str | os.PathLike[str] | None] = (),
    force: bool = False,
    kind: str | None = None,
) -> Path:
    """Check that ``path`` may be written; returns it as a Path (``~`` expanded).

    Parameters
    ----------
    path : path-like
        The output file.
    inputs : iterable of path-like
        Further files that must not be overwritten (None entries are skipped), besides the
        inputs noted with :func:`note_input`.
    force : bool
        Allow replacing an existing file that is not an input.
    kind : str, optional
        ``"session"`` or ``"marks"`` when writing such a document: it may replace the
        document of the same kind that was read (still only with ``force``).

    Raises
    ------
    InputError
        The path is a folder, or an input of this command.
    OutputExistsError
        The file exists and ``force`` is False.
    """
    out = Path(os.path.expanduser(os.fspath(path)))
    if out.is_dir():
        raise InputError(f"{out} is a folder; give a file name for the output")
    if is_input(out, inputs, kind=kind):
        raise InputError(f"{out} is an input of this command; write the output to another file")
    if not force and (out.exists() or out.is_symlink()):
        raise OutputExistsError(out)
    return out
