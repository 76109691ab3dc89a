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
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .bids import find_for_run
from .errors import InputError

__all__ = ["Companions", "find_companions", "merge_sidecars", "read_sidecar", "run_stem"]

_NIFTI_SUFFIXES = (".nii.gz", ".nii.bz2", ".nii.zst", ".nii")
_DROPPABLE = re.compile(r"_(?:space|res|den|desc)-[A-Za-z0-9]+")


@dataclass(frozen=True)
class Companions:
    """Files found for a run; each is a path or None.

    ``sidecar`` is the run's nearest sidecar; ``sidecars`` every sidecar that applies,
    farthest first and nearest last (BIDS inheritance: the nearest wins). ``mask`` is a
    brain mask made for the run (``desc-brain_mask``).
    """

    events: Path | None
    sidecar: Path | None
    confounds: Path | None
    sidecars: tuple[Path, ...] = ()
    mask: Path | None = None
    ambiguous: dict = field(default_factory=dict, compare=False, repr=False)
    dataset: Any = field(default=None, compare=False, repr=False)


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


def find_companions(
    run_path: str | os.PathLike[str], bids_root: str | os.PathLike[str] | None = None
) -> Companions:
    """Find the events, sidecar and confounds files named after a run.

    Parameters
    ----------
    run_path : str or path-like
        The run (``.nii`` or ``.nii.gz``); it need not exist.

    bids_root : path-like, optional
        The raw dataset a derivative run comes from (default: the folder above
        ``derivatives/``).

    Returns
    -------
    Companions
        ``events``, ``sidecar`` and ``confounds``: existing paths, or None. Inside a BIDS
        dataset they are found by entities (:func:`voxelscope.core.bids.find_for_run`),
        with ``sidecars`` (inheritance chain), ``mask`` and ``ambiguous`` (a role with
        several equally good candidates, which is left unset).

    Examples
    --------
    >>> find_companions("/nonexistent/run_bold.nii.gz")
    Companions(events=None, sidecar=None, confounds=None, sidecars=(), mask=None)
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
    sidecars = (found[1],) if found[1] is not None else ()
    bids = find_for_run(path, None if bids_root is None else Path(bids_root))
    if bids.dataset is None and not (bids.mask or bids.ambiguous):
        return Companions(events=found[0], sidecar=found[1], confounds=found[2], sidecars=sidecars)
    if bids.sidecars:
        sidecars = bids.sidecars
    return Companions(
        events=bids.events or (None if "events" in bids.ambiguous else found[0]),
        sidecar=sidecars[-1] if sidecars else None,
        confounds=bids.confounds or found[2],
        sidecars=sidecars,
        mask=bids.mask,
        ambiguous=dict(bids.ambiguous),
        dataset=bids.dataset,
    )


def read_sidecar(path: str | os.PathLike[str]) -> dict[str, Any]:
    """One JSON sidecar as a dict; one clear line when it cannot be used.

    Raises
    ------
    InputError
        Unreadable, not JSON, or not a JSON object.
    """
    from .inputs import parse_json, read_input_text

    path = Path(path)
    # the one bounded text reader; JSON nesting limited; one line for every failure
    data = parse_json(read_input_text(path, "sidecar"), str(path), "sidecar")
    if not isinstance(data, dict):
        raise InputError(f"{path}: the sidecar must hold a JSON object; fix or remove it")
    return data


def merge_sidecars(
    paths: Sequence[str | os.PathLike[str]],
) -> tuple[dict[str, Any], dict[str, Path]]:
    """Merge sidecars given farthest first: a later (nearer) file's fields win.

    This is the BIDS inheritance principle: a key defined at several levels of the
    hierarchy takes the value from the file closest to the data.

    Returns
    -------
    meta : dict
        The merged fields.
    origin : dict
        For each field, the file its value came from.

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> _ = (d / "task-a_bold.json").write_text('{"RepetitionTime": 2, "X": 1}')
    >>> _ = (d / "sub-1_task-a_bold.json").write_text('{"RepetitionTime": 1.5}')
    >>> meta, origin = merge_sidecars([d / "task-a_bold.json", d / "sub-1_task-a_bold.json"])
    >>> meta["RepetitionTime"], meta["X"], origin["RepetitionTime"].name
    (1.5, 1, 'sub-1_task-a_bold.json')
    """
    meta: dict[str, Any] = {}
    origin: dict[str, Path] = {}
    for p in paths:
        p = Path(p)
        for key, value in read_sidecar(p).items():
            meta[key] = value
            origin[key] = p
    return meta, origin
