"""Errors and warnings that reach the user.

Every :class:`VoxelscopeError` carries one line that names the file, the field and what to
do. Front ends print it (command line, exit code 2) or show it (window) instead of a
traceback.
"""

from __future__ import annotations


class VoxelscopeError(Exception):
    """A problem the user can fix; ``str(err)`` is one plain line."""


class InputError(VoxelscopeError):
    """Bad or inconsistent input file, argument or setting."""


class ModelError(VoxelscopeError):
    """A model that cannot be fitted as asked (rank deficiency, too few volumes, ...)."""


class Cancelled(VoxelscopeError):
    """The user cancelled a long operation (a progress callback returned False)."""


class OutputExistsError(InputError):
    """An output file is already there and may not be replaced without ``force``.

    ``path`` is the file; front ends ask (window) or say "use --force" (command line).
    """

    def __init__(self, path) -> None:
        self.path = path
        super().__init__(f"{path} already exists; use --force to overwrite it")
