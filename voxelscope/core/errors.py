"""Errors and warnings that reach the user.

Every :class:`VoxelscopeError` carries one line that names the file, the field and what is
wrong, plus, as data, the pieces a front end needs to phrase the fix in its own terms:
``file``, ``field``, ``value`` and ``remedy``, a key of :data:`REMEDIES` naming the setting
that fixes it. The core never names a command-line flag or a menu item: ``str(err)`` ends
with the plain remedy of :data:`REMEDIES`; the command line prints
``err.phrase(its own remedies)`` (flags such as ``--tr``, exit code 2) and the window its
own (menu items), instead of a traceback.

Examples
--------
>>> err = InputError("run.nii: TR 0 must be a positive number of seconds", remedy="tr",
...                  file="run.nii", field="TR", value=0)
>>> str(err)
'run.nii: TR 0 must be a positive number of seconds; give the TR in seconds'
>>> err.phrase({"tr": "give the TR in seconds (--tr)"})
'run.nii: TR 0 must be a positive number of seconds; give the TR in seconds (--tr)'
>>> err.field, err.value
('TR', 0)
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = [
    "REMEDIES",
    "Cancelled",
    "InputError",
    "ModelError",
    "OutputExistsError",
    "VoxelscopeError",
]

#: What fixes a problem, in words that name no front end's controls: remedy key -> phrase.
#: The command line and the window each map the same keys to their own wording (a flag, a
#: menu item); a key they do not know falls back to this text.
REMEDIES: dict[str, str] = {
    "tr": "give the TR in seconds",
    "force": "allow overwriting it",
    "mask": "give this run's mask or use the intensity mask",
    "mask_file": "check the mask file (or use the intensity mask)",
    "events": "give the events file",
    "choose_events": "name the events file to use",
    "choose_confounds": "name the confounds table to use",
    "choose_mask": "name the mask to use",
    "atlas": "give the atlas image too",
    "atlas_labels": "give the atlas's label table",
    "confounds_for_columns": "give a confounds table too",
    "condition_column": "name one of them as the condition column, or 'none' for one condition",
    "confound_columns": "choose the confound columns, e.g. 'motion24,acompcor5'",
    "contrast": "name a condition in the contrast, e.g. 'tone'",
    "position": "give a position in mm",
}


class VoxelscopeError(Exception):
    """A problem the user can fix; ``str(err)`` is one plain line.

    Parameters
    ----------
    message : str
        What is wrong, naming the file and the field; no remedy that names a control.
    file, field, value : optional
        The file, the field (header field, column, setting) and the offending value.
    remedy : str, optional
        A key of :data:`REMEDIES`: the setting that fixes it.
    """

    def __init__(
        self,
        message: str = "",
        *,
        file: Any = None,
        field: str | None = None,
        value: Any = None,
        remedy: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.file = file
        self.field = field
        self.value = value
        self.remedy = remedy

    def phrase(self, remedies: Mapping[str, str] | None = None) -> str:
        """The one line with the remedy in the words of ``remedies`` (a front end's)."""
        if self.remedy is None:
            return self.message
        words = (remedies or {}).get(self.remedy) or REMEDIES.get(self.remedy)
        return f"{self.message}; {words}" if words else self.message

    def __str__(self) -> str:
        return self.phrase(None)

    def __reduce__(self) -> Any:  # keep the fields across processes (background workers)
        return (_rebuild, (type(self), self.args, self.__dict__.copy()))


def _rebuild(cls: type, args: tuple, state: dict) -> VoxelscopeError:
    err = Exception.__new__(cls)
    err.args = args
    err.__dict__.update(state)
    return err


class InputError(VoxelscopeError):
    """Bad or inconsistent input file, argument or setting."""


class ModelError(VoxelscopeError):
    """A model that cannot be fitted as asked (rank deficiency, too few volumes, ...)."""


class Cancelled(VoxelscopeError):
    """The user cancelled a long operation (a progress callback returned False)."""


class OutputExistsError(InputError):
    """An output file is already there and may not be replaced without ``force``.

    ``path`` is the file; front ends ask (window) or phrase the ``force`` remedy (command
    line: ``--force``).
    """

    def __init__(self, path) -> None:
        super().__init__(f"{path} already exists", file=path, remedy="force")
        self.path = path
