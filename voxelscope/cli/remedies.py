"""The command line's words for the remedies the core's errors name (flags, not menus).

A core error carries a remedy key (:data:`voxelscope.core.errors.REMEDIES`); the command
line prints ``err.phrase(CLI_REMEDIES)``. Keys missing here fall back to the core's plain
words. No heavy imports: this is read by every command's error path.

Examples
--------
>>> from voxelscope.core.errors import OutputExistsError
>>> OutputExistsError("out.png").phrase(CLI_REMEDIES)
'out.png already exists; use --force to overwrite it'
"""

from __future__ import annotations

__all__ = ["CLI_REMEDIES"]

CLI_REMEDIES: dict[str, str] = {
    "tr": "give the TR in seconds (--tr)",
    "force": "use --force to overwrite it",
    "mask": "give this run's mask (--mask FILE) or use --mask auto",
    "mask_file": "check --mask (or use 'auto')",
    "events": "pass --events FILE",
    "choose_events": "name the one to use with --events FILE",
    "choose_confounds": "name the one to use with --confounds FILE",
    "choose_mask": "name the one to use with --mask FILE",
    "atlas": "give the atlas image with --atlas FILE too",
    "atlas_labels": "give it with --atlas-labels FILE",
    "confounds_for_columns": "pass --confounds FILE",
    "condition_column": "pass --condition-column with one of them, or 'none' for one condition",
    "confound_columns": "choose with --confound-columns, e.g. 'motion24,acompcor5'",
    "contrast": "name a condition, e.g. --contrast tone",
    "position": "give a position with --mm X Y Z",
}
