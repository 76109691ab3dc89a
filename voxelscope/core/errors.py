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
