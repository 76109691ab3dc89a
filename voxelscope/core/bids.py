"""BIDS datasets: file-name entities, dataset roots, and a run's companions by entities.

A run inside a BIDS dataset (raw, or derivatives: a ``dataset_description.json`` with
``"DatasetType": "derivative"``, or any folder under a raw dataset's ``derivatives/``)
finds its events, sidecars, confounds and brain mask by entities. The search looks only in
the few folders the run's entities name — its own folder, then the raw dataset's
``sub-X[/ses-Y]/<datatype>`` folder and the levels above it — never across the dataset, so a
study with hundreds of subjects costs no more than one with two.

Rules (BIDS specification, from memory: "file name structure", "entity table", "the
inheritance principle", "derivatives"):

- A name is ``key-value`` pairs joined by ``_``, then a suffix and an extension:
  ``sub-01_ses-1_task-gamble_run-1_space-MNI_desc-preproc_bold.nii.gz``.
- The entities that identify an acquisition — :data:`IDENTIFYING` (sub, ses, task, acq, ce,
  rec, dir, run, echo) — must agree between a run and its companion; the entities a pipeline
  adds (space, res, den, desc, ...) do not block a match.
- A metadata file applies to a run when each of its entities is also the run's, with the
  same value (it may have fewer: ``task-gamble_bold.json`` at the dataset root applies to
  every gamble run). Sidecars at every level apply, the nearest winning field by field;
  for other files only the nearest applies.
- A derivative run's own sidecar (and every sidecar of its derivatives dataset) is nearer
  than the raw dataset's.

Examples
--------
>>> parse_name("sub-01_task-gamble_run-1_space-MNI_desc-preproc_bold.nii.gz")
BidsName(entities={'sub': '01', 'task': 'gamble', 'run': '1', 'space': 'MNI', 'desc': 'preproc'}, suffix='bold', extension='.nii.gz')
>>> parse_name("notbids.nii") is None
True
"""  # noqa: E501

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import InputError

__all__ = [
    "IDENTIFYING",
    "BidsName",
    "Dataset",
    "Found",
    "applies_to",
    "find_dataset",
    "find_for_run",
    "parse_name",
    "run_labels",
]

#: Entities that identify an acquisition (BIDS entity table); pipeline entities (space,
#: res, den, desc, ...) do not block a match between a run and its companions.
IDENTIFYING = ("sub", "ses", "task", "acq", "ce", "rec", "dir", "run", "echo")
#: Entities that place an image in space: a brain mask must agree on these with the run.
SPATIAL = ("space", "res", "den")

_PAIR = re.compile(r"^([a-zA-Z0-9]+)-([a-zA-Z0-9+]+)$")
_EXTENSIONS = (".nii.gz", ".nii", ".tsv.gz", ".tsv", ".json", ".csv")


@dataclass(frozen=True)
class BidsName:
    """The entities (in file order), suffix and extension of a BIDS file name."""

    entities: dict[str, str]
    suffix: str
    extension: str

    def identifying(self) -> dict[str, str]:
        return {k: v for k, v in self.entities.items() if k in IDENTIFYING}


def parse_name(name: str) -> BidsName | None:
    """Split a BIDS file name; None when it is not one (no ``key-value`` parts or suffix).

    Examples
    --------
    >>> parse_name("task-tt_bold.json").entities
    {'task': 'tt'}
    >>> parse_name("sub-01_bold").extension
    ''
    """
    base = Path(name).name
    ext = ""
    for e in _EXTENSIONS:
        if base.lower().endswith(e):
            ext, base = base[-len(e) :], base[: -len(e)]
            break
    parts = base.split("_")
    if len(parts) < 2:
        return None
    suffix = parts[-1]
    if not suffix or "-" in suffix:
        return None
    entities: dict[str, str] = {}
    for part in parts[:-1]:
        m = _PAIR.match(part)
        if m is None or m.group(1) in entities:
            return None
        entities[m.group(1)] = m.group(2)
    return BidsName(entities, suffix, ext)


def applies_to(candidate: BidsName, run: BidsName, keys: tuple[str, ...] | None = None) -> bool:
    """True when every entity of ``candidate`` (among ``keys``, default all) is the run's.

    The inheritance principle's rule: a file with fewer entities applies to every run that
    has them.

    Examples
    --------
    >>> run = parse_name("sub-01_task-a_run-2_space-X_desc-preproc_bold.nii.gz")
    >>> applies_to(parse_name("task-a_bold.json"), run)
    True
    >>> applies_to(parse_name("sub-01_task-a_run-1_events.tsv"), run)
    False
    >>> applies_to(parse_name("sub-01_task-a_run-2_events.tsv"), run, IDENTIFYING)
    True
    """
    for key, value in candidate.entities.items():
        if keys is not None and key not in keys:
            continue
        if run.entities.get(key) != value:
            return False
    return True


@dataclass(frozen=True)
class Dataset:
    """Where a run lives: its dataset root, whether that is a derivatives dataset, and the
    raw dataset it comes from (None when unknown)."""

    root: Path
    derivative: bool
    raw_root: Path | None


def _read_description(folder: Path) -> dict[str, Any] | None:
    path = folder / "dataset_description.json"
    if not path.is_file():
        return None
    from .inputs import parse_json, read_input_text

    # the one bounded text reader; nesting limited; one line for every failure
    text = read_input_text(path, "dataset description", limit=16 * 1024**2)
    data = parse_json(text, str(path), "dataset description")
    if not isinstance(data, dict):
        raise InputError(f"{path}: the dataset description must hold a JSON object (BIDS)")
    return data


def find_dataset(run_path: Path, bids_root: Path | None = None) -> Dataset | None:
    """The BIDS dataset a run belongs to, from the folders named in its path only.

    The root is the folder above the run's ``sub-<label>`` folder (or the run's own folder
    when it holds ``dataset_description.json``). It is a derivatives dataset when its
    description says ``DatasetType: derivative`` or it lies under a ``derivatives/`` folder;
    the raw dataset is then ``bids_root`` or the folder above ``derivatives/``.

    Raises
    ------
    InputError
        A ``dataset_description.json`` that is not JSON; ``bids_root`` not a folder.
    """
    run_path = Path(run_path)
    name = parse_name(run_path.name)
    if bids_root is not None and not Path(bids_root).is_dir():
        raise InputError(f"{bids_root}: --bids-root is not a folder; give the raw BIDS dataset")
    if name is None or "sub" not in name.entities:
        return None
    folder = run_path.parent.absolute()
    root = None
    for up in (folder, *folder.parents)[:4]:  # <datatype>, ses-Y, sub-X: at most 3 levels
        if up.name == f"sub-{name.entities['sub']}":
            root = up.parent
            break
    if root is None:
        if not (folder / "dataset_description.json").is_file():
            return None
        root = folder
    desc = _read_description(root) or {}
    derivative = str(desc.get("DatasetType", "")).lower() == "derivative"
    raw_root = None
    for up in (root, *root.parents):
        if up.name == "derivatives":
            derivative = True
            raw_root = up.parent
            break
    if bids_root is not None:
        raw_root = Path(bids_root).absolute()
    if raw_root is not None:
        _read_description(raw_root)  # a broken description fails here, with its name
        if raw_root == root:
            raw_root = None
    return Dataset(root=root, derivative=derivative, raw_root=raw_root if derivative else None)


@dataclass(frozen=True)
class Found:
    """Companions found by entities, and the candidates that made a choice impossible."""

    events: Path | None = None
    confounds: Path | None = None
    mask: Path | None = None
    sidecars: tuple[Path, ...] = ()
    ambiguous: dict[str, tuple[Path, ...]] = field(default_factory=dict)
    dataset: Dataset | None = None


def _levels(root: Path, run: BidsName, datatype: str) -> list[Path]:
    """Folders of a dataset that can hold files for the run, farthest first."""
    out = [root]
    sub = root / f"sub-{run.entities['sub']}"
    out.append(sub)
    if "ses" in run.entities:
        sub = sub / f"ses-{run.entities['ses']}"
        out.append(sub)
    if datatype:
        out.append(sub / datatype)
    return out


def _names(folder: Path) -> list[str]:
    try:
        with os.scandir(folder) as it:
            return sorted(e.name for e in it if e.is_file())
    except OSError:
        return []


def _pick(
    folders: list[Path],
    run: BidsName,
    accept,
    keys: tuple[str, ...] | None,
    role: str,
    ambiguous: dict[str, tuple[Path, ...]],
) -> Path | None:
    """Nearest folder first; in a folder the most specific applicable file; ties ambiguous."""
    for folder in folders:
        best: list[tuple[int, Path]] = []
        for n in _names(folder):
            cand = parse_name(n)
            if cand is None or not accept(cand, n) or not applies_to(cand, run, keys):
                continue
            best.append((len(cand.identifying()), folder / n))
        if not best:
            continue
        top = max(b[0] for b in best)
        chosen = [p for k, p in best if k == top]
        if len(chosen) > 1:
            ambiguous[role] = tuple(chosen)
            return None
        return chosen[0]
    return None


def find_for_run(run_path: Path, bids_root: Path | None = None) -> Found:
    """Events, sidecars (farthest first), confounds and brain mask of a run, by entities.

    A BIDS-named run outside any dataset is matched in its own folder only;
    ``dataset`` is then None.
    """
    run_path = Path(run_path)
    ds = find_dataset(run_path, bids_root)
    name = parse_name(run_path.name)
    if name is None or not name.entities:
        return Found()
    own = run_path.parent.absolute()
    datatype = own.name if not own.name.startswith(("sub-", "ses-")) else ""
    if ds is None:  # a BIDS-named run outside a dataset: its own folder only
        own_levels, raw_levels = [own], []
    else:
        own_levels = _levels(ds.root, name, datatype)
        if own not in own_levels:
            own_levels.append(own)
        raw_levels = _levels(ds.raw_root, name, datatype) if ds.raw_root is not None else []
    ambiguous: dict[str, tuple[Path, ...]] = {}
    near_first = [own, *[f for f in reversed(own_levels) if f != own], *reversed(raw_levels)]

    events = _pick(
        near_first,
        name,
        lambda c, n: c.suffix == "events" and c.extension == ".tsv",
        IDENTIFYING,
        "events",
        ambiguous,
    )
    confounds = _pick(
        [own],
        name,
        lambda c, n: (
            (c.suffix == "timeseries" and c.entities.get("desc") == "confounds")
            or c.suffix == "confounds"
        ),
        IDENTIFYING,
        "confounds",
        ambiguous,
    )
    spatial = {k: name.entities.get(k) for k in SPATIAL}

    def is_mask(c: BidsName, n: str) -> bool:
        return (
            c.suffix == "mask"
            and c.entities.get("desc") == "brain"
            and c.extension in (".nii", ".nii.gz")
            and all(c.entities.get(k) == spatial[k] for k in ("space", "den"))
            and "sub" in c.entities
        )

    def same_res(c: BidsName, n: str) -> bool:
        return is_mask(c, n) and c.entities.get("res") == spatial["res"]

    mask = _pick([own], name, same_res, IDENTIFYING, "mask", ambiguous)
    if mask is None and "mask" not in ambiguous:  # another resolution: resampled, said
        mask = _pick([own], name, is_mask, IDENTIFYING, "mask", ambiguous)
    sidecars: list[Path] = []
    for folder in [*raw_levels, *own_levels]:
        level: list[tuple[int, Path]] = []
        for n in _names(folder):
            cand = parse_name(n)
            if cand is None or cand.extension != ".json" or cand.suffix != name.suffix:
                continue
            if applies_to(cand, name):
                level.append((len(cand.entities), folder / n))
        sidecars.extend(p for _, p in sorted(level))
    return Found(
        events=events,
        confounds=confounds,
        mask=mask,
        sidecars=tuple(dict.fromkeys(sidecars)),
        ambiguous=ambiguous,
        dataset=ds,
    )


_RUN_ENTITY = re.compile(r"(?:^|_)(run-[A-Za-z0-9]+)(?:_|$)")


def _stem(path: Path) -> str:
    name = path.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return name[: -len(ext)]
    return path.stem


def run_labels(paths: Sequence[str | os.PathLike[str]]) -> list[str]:
    """Short, unique names for runs: the BIDS ``run-`` entity when that tells them apart,
    else the file name without its extension, else a number.

    >>> run_labels(["a/sub-1_task-x_run-1_bold.nii.gz", "a/sub-1_task-x_run-2_bold.nii.gz"])
    ['run-1', 'run-2']
    >>> run_labels(["x/one.nii", "y/two.nii.gz"])
    ['one', 'two']
    >>> run_labels(["x/r.nii", "y/r.nii"])
    ['1: r', '2: r']
    """
    stems = [_stem(Path(p)) for p in paths]
    ents = []
    for s in stems:
        m = _RUN_ENTITY.search(s)
        ents.append(m.group(1) if m else None)
    if all(ents) and len(set(ents)) == len(ents):
        return [str(e) for e in ents]
    if len(set(stems)) == len(stems):
        return stems
    return [f"{i + 1}: {s}" for i, s in enumerate(stems)]
