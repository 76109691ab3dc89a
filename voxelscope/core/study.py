"""A study at a glance: the runs of a BIDS dataset and which companions each one has.

:func:`list_study` walks a dataset folder (raw, with any derivatives datasets under its
``derivatives/``, or a derivatives dataset on its own) and lists every BOLD run by subject,
session, task and run, with its companions found or missing — the same files
:func:`voxelscope.core.loader.load_inputs` will use when the run is opened. Unlike finding one
run's companions, listing a study reads the whole tree (that is what the user asked for), but
no image data.

Examples
--------
>>> import tempfile
>>> root = Path(tempfile.mkdtemp())
>>> _ = (root / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.8"}')
>>> func = root / "sub-01" / "func"
>>> func.mkdir(parents=True)
>>> _ = (func / "sub-01_task-a_run-1_bold.nii.gz").write_bytes(b"")
>>> _ = (func / "sub-01_task-a_run-1_events.tsv").write_text("onset\\tduration\\n")
>>> study = list_study(root)
>>> [(r.subject, r.task, r.run, r.found("events"), r.found("mask")) for r in study.runs]
[('01', 'a', '1', True, False)]
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

from .bids import _read_description, parse_name
from .companions import find_companions
from .errors import InputError, VoxelscopeError

__all__ = ["COMPANION_ROLES", "Study", "StudyRun", "list_study"]

#: The companions listed per run, in column order.
COMPANION_ROLES = ("events", "sidecars", "confounds", "mask")
_NIFTI = (".nii.gz", ".nii")
#: At most this many runs are listed (a bigger study says so).
MAX_RUNS = 5000


@dataclass(frozen=True)
class StudyRun:
    """One BOLD run of a study and its companions (paths, or None / () when missing)."""

    path: Path
    subject: str
    session: str
    task: str
    run: str
    dataset: str  # "raw" or the derivatives dataset's folder name
    label: str  # the other entities (space, res, desc, ...) in file order
    events: Path | None = None
    sidecars: tuple[Path, ...] = ()
    confounds: Path | None = None
    mask: Path | None = None
    problem: str = ""

    def found(self, role: str) -> bool:
        """True when the companion of ``role`` (one of :data:`COMPANION_ROLES`) was found."""
        value = getattr(self, role)
        return bool(value)

    def missing(self) -> list[str]:
        """Roles not found (``sidecars`` counts as found with at least one file)."""
        return [r for r in COMPANION_ROLES if not self.found(r)]


@dataclass
class Study:
    """The runs of a study, its root and whether the listing was cut short."""

    root: Path
    runs: list[StudyRun] = field(default_factory=list)
    truncated: bool = False

    def subjects(self) -> list[str]:
        return sorted({r.subject for r in self.runs if r.subject})

    def summary(self) -> str:
        """One line: subjects, sessions, tasks and runs, how many lack events, problems."""
        runs = [r for r in self.runs if r.subject]
        ses = {(r.subject, r.session) for r in runs if r.session}
        tasks = {r.task for r in runs if r.task}
        no_events = sum(1 for r in runs if not r.found("events"))
        problems = sum(1 for r in self.runs if r.problem)
        parts = [f"{len(self.subjects())} subject(s)"]
        if ses:
            parts.append(f"{len(ses)} session(s)")
        parts.append(f"{len(tasks)} task(s)")
        parts.append(f"{len(runs)} run(s)" + (" (more not listed)" if self.truncated else ""))
        text = ", ".join(parts)
        if no_events:
            text += f"; {no_events} without events"
        if problems:
            text += f"; {problems} with a problem (see the note)"
        return text


def _bold_files(folder: Path) -> list[Path]:
    """BOLD images under the ``sub-*`` folders of one dataset (not its derivatives)."""
    out: list[Path] = []
    try:
        subs = sorted(p for p in folder.iterdir() if p.is_dir() and p.name.startswith("sub-"))
    except OSError as err:
        raise InputError(f"{folder}: cannot list the folder ({err.strerror})") from None
    for sub in subs:
        for dirpath, dirnames, filenames in os.walk(sub):
            dirnames.sort()
            for name in sorted(filenames):
                low = name.lower()
                if low.endswith(_NIFTI) and "_bold." in low:
                    out.append(Path(dirpath) / name)
    return out


def _datasets(root: Path) -> list[tuple[str, Path]]:
    """The dataset itself and each derivatives dataset under ``root/derivatives``."""
    out = [("raw", root)]
    deriv = root / "derivatives"
    if deriv.is_dir():
        for d in sorted(p for p in deriv.iterdir() if p.is_dir()):
            out.append((d.name, d))
    return out


def list_study(
    folder: str | os.PathLike[str], bids_root: str | os.PathLike[str] | None = None
) -> Study:
    """List the runs of a BIDS dataset folder and their companions found or missing.

    Parameters
    ----------
    folder : path
        A raw BIDS dataset (with or without ``derivatives/``) or a derivatives dataset.
    bids_root : path, optional
        The raw dataset of a derivatives dataset kept elsewhere.

    Returns
    -------
    Study
        Runs ordered by dataset (raw first), subject, session, task and run.

    Raises
    ------
    InputError
        Not a folder; a ``dataset_description.json`` that is not JSON; no run at all.
    """
    root = Path(folder).expanduser()
    if not root.is_dir():
        raise InputError(f"{root}: not a folder; pick a BIDS dataset folder (raw or derivatives)")
    desc = _read_description(root)
    if desc is None and not any(p.name.startswith("sub-") for p in root.iterdir()):
        raise InputError(
            f"{root}: not a BIDS dataset (no dataset_description.json and no sub-* folders); "
            "pick the dataset's top folder"
        )
    study = Study(root=root)
    kind = "raw"
    if desc is not None and str(desc.get("DatasetType", "")).lower() == "derivative":
        kind = root.name
    datasets = _datasets(root)
    if kind != "raw":
        datasets = [(kind, root)]
    rows: list[StudyRun] = []
    for label, ds in datasets:
        if ds != root:
            try:
                _read_description(ds)
            except InputError as err:
                rows.append(StudyRun(ds, "", "", "", "", label, "", problem=str(err)))
                continue
        for path in _bold_files(ds):
            if len(rows) >= MAX_RUNS:
                study.truncated = True
                break
            rows.append(_row(path, label, bids_root))
    study.runs = rows
    if not rows:
        raise InputError(
            f"{root}: no BOLD runs (sub-*/.../*_bold.nii[.gz]) in this dataset or its "
            "derivatives; pick the dataset's top folder"
        )
    return study


def _row(path: Path, dataset: str, bids_root) -> StudyRun:
    name = parse_name(path.name)
    ent = dict(name.entities) if name is not None else {}
    other = "_".join(f"{k}-{v}" for k, v in ent.items() if k not in ("sub", "ses", "task", "run"))
    base = {
        "path": path,
        "subject": ent.get("sub", ""),
        "session": ent.get("ses", ""),
        "task": ent.get("task", ""),
        "run": ent.get("run", ""),
        "dataset": dataset,
        "label": other,
    }
    try:
        c = find_companions(path, bids_root)
    except VoxelscopeError as err:
        return StudyRun(**base, problem=str(err))
    problem = ""
    if c.ambiguous:
        role, both = next(iter(c.ambiguous.items()))
        problem = f"{len(both)} {role} files match; name one when opening"
    return StudyRun(
        **base,
        events=c.events,
        sidecars=tuple(c.sidecars),
        confounds=c.confounds,
        mask=c.mask,
        problem=problem,
    )
