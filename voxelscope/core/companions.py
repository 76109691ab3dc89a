"""Find the BIDS-named files that sit beside a run.

For ``X_bold.nii[.gz]`` the companions are ``X_events.tsv`` (conditions),
``X_bold.json`` (sidecar with ``RepetitionTime`` and ``SliceTiming``) and
``X_confounds.tsv`` (or ``.csv``). For a run without the ``_bold`` suffix, named
``S.nii[.gz]``, they are ``S_events.tsv``, ``S.json`` and ``S_confounds.tsv`` (or ``.csv``).

Derivative runs often carry extra entities (``X_space-..._desc-preproc_bold.nii.gz``)
while the events file keeps the raw name; when the exact name is missing, the
``space``, ``res``, ``den`` and ``desc`` entities are dropped and the search repeated.
The BIDS-derivatives confounds name ``X_desc-confounds_timeseries.tsv`` is accepted too.

Examples
--------
>>> import tempfile
>>> d = Path(tempfile.mkdtemp())
>>> for name in ("sub-01_task-tt_bold.nii.gz", "sub-01_task-tt_events.tsv"):
...     _ = (d / name).write_text("")
>>> c = find_companions(d / "sub-01_task-tt_bold.nii.gz")
>>> c.events.name, c.sidecar, c.confounds
('sub-01_task-tt_events.tsv', None, None)
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

__all__ = ["Companions", "find_companions", "run_stem"]

_NIFTI_SUFFIXES = (".nii.gz", ".nii.bz2", ".nii.zst", ".nii")
_DROPPABLE = re.compile(r"_(?:space|res|den|desc)-[A-Za-z0-9]+")


@dataclass(frozen=True)
class Companions:
    """Files found beside a run; each is a path or None."""

    events: Path | None
    sidecar: Path | None
    confounds: Path | None


def run_stem(path: str | os.PathLike[str]) -> str:
    """File name of a run without its NIfTI extension.

    Examples
    --------
    >>> run_stem("/data/sub-01_task-tt_bold.nii.gz")
    'sub-01_task-tt_bold'
    >>> run_stem("run1.nii")
    'run1'
    """
    name = Path(path).name
    for suffix in _NIFTI_SUFFIXES:
        if name.lower().endswith(suffix):
            return name[: -len(suffix)]
    return Path(name).stem


def _first(folder: Path, names: list[str]) -> Path | None:
    for name in names:
        candidate = folder / name
        if candidate.is_file():
            return candidate
    return None


def _candidates(stem: str) -> tuple[list[str], list[str], list[str]]:
    if stem.endswith("_bold"):
        base = stem[: -len("_bold")]
        sidecar = [f"{stem}.json"]
    else:
        base = stem
        sidecar = [f"{stem}.json"]
    events = [f"{base}_events.tsv"]
    confounds = [
        f"{base}_confounds.tsv",
        f"{base}_confounds.csv",
        f"{base}_desc-confounds_timeseries.tsv",
    ]
    return events, sidecar, confounds


def find_companions(run_path: str | os.PathLike[str]) -> Companions:
    """Find the events, sidecar and confounds files named after a run.

    Parameters
    ----------
    run_path : str or path-like
        The run (``.nii`` or ``.nii.gz``); it need not exist.

    Returns
    -------
    Companions
        ``events``, ``sidecar`` and ``confounds``: existing paths, or None.

    Examples
    --------
    >>> find_companions("/nonexistent/run_bold.nii.gz")
    Companions(events=None, sidecar=None, confounds=None)
    """
    path = Path(run_path)
    folder = path.parent
    stem = run_stem(path)
    events, sidecar, confounds = _candidates(stem)
    found = [_first(folder, events), _first(folder, sidecar), _first(folder, confounds)]
    reduced = _DROPPABLE.sub("", stem)
    if reduced != stem and None in found:
        alt = _candidates(reduced)
        found = [f if f is not None else _first(folder, a) for f, a in zip(found, alt)]
    return Companions(events=found[0], sidecar=found[1], confounds=found[2])
