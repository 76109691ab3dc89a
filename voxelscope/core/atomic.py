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
voxelscope.core.errors.OutputExistsError: ...a.txt already exists; allow overwriting it
>>> _ = write_text(d / "a.txt", "again\\n", force=True)
>>> sorted(x.name for x in d.iterdir())
['a.txt']
"""

from __future__ import annotations

import glob
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path

from .errors import InputError
from .outputs import guard_output

__all__ = ["check_outputs", "publish_folder", "write_bytes", "write_text"]

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


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _clear_stale_staging(out: Path) -> None:
    """Remove staging folders for ``out`` whose process was killed (it could not clean up)."""
    for p in out.parent.glob(f".{glob.escape(out.name)}.*.partial"):
        parts = p.name[len(out.name) + 2 :].split(".")
        if parts and parts[0].isdigit() and not _pid_alive(int(parts[0])):
            shutil.rmtree(p, ignore_errors=True)


def publish_folder(
    out: str | os.PathLike[str],
    fill: Callable[[Path], list[Path]],
    force: bool = False,
    what: str = "report",
) -> list[Path]:
    """Write a folder of outputs all or nothing; returns the final paths.

    ``fill(staging)`` writes every file into a fresh staging folder beside ``out`` (named
    ``.OUT.PID.*.partial``) and returns their paths. Then the staging folder is renamed to
    ``out`` when ``out`` does not exist yet, or its files replace those in ``out`` one by one
    (each through the output guard again). Any failure -- an error, a full disk, a cancel --
    removes the staging folder: nothing partial is left and the next try needs no
    ``--force``. Staging folders of killed processes are removed at the next call.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> [p.name for p in publish_folder(d / "r", lambda s: [write_text(s / "a.txt", "x")])]
    ['a.txt']
    >>> def fail(staging):
    ...     write_text(staging / "b.txt", "y")
    ...     raise OSError(28, "No space left on device")
    >>> publish_folder(d / "q", fail)
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: ...q: cannot write the report (No space left on device); ...
    >>> sorted(p.name for p in d.iterdir())
    ['r']
    """
    out = Path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        _clear_stale_staging(out)
        staging = Path(
            tempfile.mkdtemp(
                prefix=f".{out.name}.{os.getpid()}.", suffix=".partial", dir=out.parent
            )
        )
    except OSError as err:
        raise InputError(f"{out}: cannot create the {what} folder ({err.strerror})") from None
    try:
        staged = fill(staging)
        if not out.exists():
            os.rename(staging, out)
            return [out / p.name for p in staged]
        moved = []
        for p in staged:
            final = out / p.name
            guard_output(final, force=force)  # checked again just before replacing
            os.replace(p, final)
            moved.append(final)
        shutil.rmtree(staging, ignore_errors=True)
        return moved
    except OSError as err:
        shutil.rmtree(staging, ignore_errors=True)
        raise InputError(
            f"{out}: cannot write the {what} ({err.strerror or err}); nothing was written"
        ) from None
    except InputError as err:  # from the atomic writer: name the folder, not the staging
        shutil.rmtree(staging, ignore_errors=True)
        reason = str(err).replace(str(staging), str(out))
        raise InputError(f"{reason}; the {what} was not written") from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
