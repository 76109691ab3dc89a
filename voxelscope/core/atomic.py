"""Atomic writes of output files.

Every output goes to a temporary file in the destination folder first and is then moved
over the final name with :func:`os.replace`, so a reader never sees half a file and an
interrupted write leaves the old file (or nothing) in place. Every path passes the one
output guard (:func:`voxelscope.core.outputs.guard_output`): never an input of the same
command, and an existing output is never overwritten unless ``force=True``.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> d = Path(tempfile.mkdtemp())
>>> p = write_text(d / "a.txt", "hello\\n")
>>> p.read_text()
'hello\\n'
>>> write_text(d / "a.txt", "again\\n")
Traceback (most recent call last):
...
voxelscope.core.errors.OutputExistsError: ...a.txt already exists; use --force to overwrite it
>>> _ = write_text(d / "a.txt", "again\\n", force=True)
>>> sorted(x.name for x in d.iterdir())
['a.txt']
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

from .errors import InputError
from .outputs import guard_output

__all__ = ["check_outputs", "write_bytes", "write_text"]

_TMP_SUFFIX = ".tmp"


def _file_mode(final: Path) -> int:
    """Mode for the new file: the old file's when replacing one, else 0o666 minus umask."""
    try:
        return final.stat().st_mode & 0o777
    except OSError:
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


def check_outputs(
    paths: Iterable[str | os.PathLike[str]],
    force: bool = False,
    inputs: Iterable[str | os.PathLike[str] | None] = (),
) -> None:
    """Pass every path through the output guard before anything is written.

    Raises for the first path that is an input of the command (always) or that exists
    (unless ``force``), so nothing is written when one file would be refused.

    Examples
    --------
    >>> check_outputs(["/nonexistent/voxelscope-out.csv"])
    """
    inputs = list(inputs)
    for p in paths:
        guard_output(p, inputs, force=force)


def write_bytes(
    path: str | os.PathLike[str],
    data: bytes,
    force: bool = False,
    kind: str | None = None,
    inputs: Iterable[str | os.PathLike[str] | None] = (),
) -> Path:
    """Write ``data`` to ``path`` atomically; returns the path.

    Parameters
    ----------
    path : path-like
        Final file name; its folder must exist.
    data : bytes
    force : bool
        Overwrite an existing file. Without it an existing file raises :class:`InputError`.
        An input of the command is never overwritten.
    kind : str, optional
        ``"session"`` or ``"marks"``: may be saved back over the document it was read from.
    inputs : iterable of path-like
        Further files that must not be overwritten.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> p = write_bytes(Path(tempfile.mkdtemp()) / "b.bin", b"\\x00\\x01")
    >>> p.read_bytes()
    b'\\x00\\x01'
    """
    final = guard_output(path, inputs, force=force, kind=kind)
    folder = final.parent
    if not folder.is_dir():
        raise InputError(f"{final}: the folder {folder} does not exist; create it first")
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=_TMP_SUFFIX, dir=folder)
    except OSError as err:
        raise InputError(f"{final}: cannot write in {folder} ({err.strerror})") from None
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _file_mode(final))
        guard_output(final, inputs, force=force, kind=kind)  # appeared while we wrote
        os.replace(tmp, final)
    except OSError as err:
        raise InputError(f"{final}: cannot write the file ({err.strerror})") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return final


def write_text(
    path: str | os.PathLike[str],
    text: str,
    force: bool = False,
    encoding: str = "utf-8",
    kind: str | None = None,
    inputs: Iterable[str | os.PathLike[str] | None] = (),
) -> Path:
    """Write ``text`` to ``path`` atomically (no newline translation); returns the path.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> write_text(Path(tempfile.mkdtemp()) / "t.tsv", "a\\tb\\n").read_text()
    'a\\tb\\n'
    """
    return write_bytes(path, text.encode(encoding), force=force, kind=kind, inputs=inputs)
