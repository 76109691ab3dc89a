"""Atomic writes of output files.

Every output goes to a temporary file in the destination folder first and is then moved
over the final name with :func:`os.replace`, so a reader never sees half a file and an
interrupted write leaves the old file (or nothing) in place. Existing outputs are never
overwritten unless ``force=True``.

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
voxelscope.core.errors.InputError: ...a.txt already exists; use --force to overwrite it
>>> _ = write_text(d / "a.txt", "again\\n", force=True)
>>> sorted(x.name for x in d.iterdir())
['a.txt']
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

from .errors import InputError, OutputExistsError

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


def _refuse(path: Path) -> OutputExistsError:
    return OutputExistsError(path)


def check_outputs(paths: Iterable[str | os.PathLike[str]], force: bool = False) -> None:
    """Raise :class:`InputError` for the first path that exists, unless ``force``.

    Call this before writing a set of files, so nothing is written when one would be refused.

    Examples
    --------
    >>> check_outputs(["/nonexistent/voxelscope-out.csv"])
    """
    if force:
        return
    for p in paths:
        path = Path(p)
        if path.exists() or path.is_symlink():
            raise _refuse(path)


def write_bytes(path: str | os.PathLike[str], data: bytes, force: bool = False) -> Path:
    """Write ``data`` to ``path`` atomically; returns the path.

    Parameters
    ----------
    path : path-like
        Final file name; its folder must exist.
    data : bytes
    force : bool
        Overwrite an existing file. Without it an existing file raises :class:`InputError`.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> p = write_bytes(Path(tempfile.mkdtemp()) / "b.bin", b"\\x00\\x01")
    >>> p.read_bytes()
    b'\\x00\\x01'
    """
    final = Path(path)
    if final.is_dir():
        raise InputError(f"{final} is a folder; give a file name for the output")
    check_outputs([final], force=force)
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
        if not force and (final.exists() or final.is_symlink()):
            raise _refuse(final)  # appeared while we were writing
        os.replace(tmp, final)
    except OSError as err:
        raise InputError(f"{final}: cannot write the file ({err.strerror})") from None
    finally:
        if tmp.exists():
            tmp.unlink()
    return final


def write_text(
    path: str | os.PathLike[str], text: str, force: bool = False, encoding: str = "utf-8"
) -> Path:
    """Write ``text`` to ``path`` atomically (no newline translation); returns the path.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> write_text(Path(tempfile.mkdtemp()) / "t.tsv", "a\\tb\\n").read_text()
    'a\\tb\\n'
    """
    return write_bytes(path, text.encode(encoding), force=force)
