"""Reading an input file's bytes with one clear line on failure.

>>> import tempfile, pathlib
>>> p = pathlib.Path(tempfile.mkdtemp()) / "m.tsv"
>>> read_input_bytes(p, "marks")
Traceback (most recent call last):
...
voxelscope.core.errors.InputError: ...m.tsv: no such marks file; check the path
"""

from __future__ import annotations

import os
from pathlib import Path

from .errors import InputError

__all__ = ["read_input_bytes"]


def read_input_bytes(path: str | os.PathLike[str], what: str) -> bytes:
    """The whole file; ``what`` names the kind of file in the error ("marks", "session")."""
    p = Path(path)
    try:
        return p.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{p}: no such {what} file; check the path") from None
    except OSError as err:
        raise InputError(f"{p}: cannot read the {what} file ({err.strerror})") from None
