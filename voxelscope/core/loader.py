"""One way in: what the user gave, resolved to files, checked, opened and modelled.

Both front ends (the command line and the window) describe what the user asked for as an
:class:`InputRequest` (plain data: the run, and whatever events, confounds, sidecar, mask or
TR was named) and call :func:`load_inputs`. It

1. resolves the companion files the user did not name (:func:`resolve_inputs`, by BIDS
   names; see :mod:`voxelscope.core.companions`),
2. runs every check that needs no image data first — a missing or unreadable events file,
   confounds table, sidecar or mask fails here, in well under a second, before any cache of
   a compressed run is built,
3. opens the run (:func:`voxelscope.core.run.open_run`), applies the brain mask, builds the
   :class:`~voxelscope.core.model.Analysis`,
4. and returns an :class:`Inputs` with every warning collected in one explicit list, in the
   order the steps ran. Nothing is appended to that list later by a lazy getter: what the
   window and the command line show are the same lines.

Examples
--------
>>> from nibabel.testing import data_path
>>> got = load_inputs(InputRequest(Path(data_path) / "functional.nii", events_required=False))
>>> got.run.shape, got.analysis is None, got.companions.events is None
((17, 21, 3), True, True)
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .atlas import Atlas, load_atlas
from .companions import Companions, find_companions
from .confounds import Confounds, choose_columns, read_confounds
from .errors import InputError
from .events import Condition, EventsFile, load_events, scale_conditions, task_name
from .model import Analysis

__all__ = [
    "InputRequest",
    "Inputs",
    "ResolvedInputs",
    "analysis_for",
    "load_inputs",
    "open_atlas",
    "open_events",
    "read_events_file",
    "resolve_inputs",
]

#: ``mask`` values that ask for the run's own intensity mask.
AUTO_MASK = "auto"


@dataclass(frozen=True)
class InputRequest:
    """What the user gave, as plain data (nothing is read when it is made).

    Parameters
    ----------
    run : path
        The 4D NIfTI run.
    events, confounds : path, optional
        Named explicitly; otherwise found by BIDS names (unless ``no_events`` /
        ``no_confounds``).
    confound_columns : str, optional
        The user's choice of confound columns (names, wildcards, sets, ``none``; see
        :func:`voxelscope.core.confounds.choose_columns`). None: all columns of a small
        named table, none of a table found beside the run.
    condition_column : str or None
        Events column naming the conditions (``trial_type`` by default; None or ``none``:
        one condition named after the task).
    onset_unit : {"seconds", "volumes"}
        Onsets and durations in volumes are multiplied by the run's TR.
    tr : float, optional
        Overrides the sidecar and the header.
    mask : path or ``"auto"``, optional
        A mask image, ``"auto"`` for the run's own intensity mask, or None for the
        brain mask found beside the run (falling back to the intensity mask).
    bids_root : path, optional
        The raw BIDS dataset a derivative run comes from (default: found from the run).
    use_cache : bool
        Build/use the voxel-major cache of a compressed run.
    events_required : bool
        The command line needs events to fit; the window can open a run without them.
    no_events, no_confounds : bool
        The user's explicit choice of no events file / no confounds table: nothing is
        looked for beside the run. Distinct from not naming one (None: find the BIDS
        companion). A session uses it for an entry it refused (its recorded digest no
        longer matches), so a companion beside the run cannot take the refused file's place.
    atlas : path, optional
        A segmentation image on any grid (BIDS ``dseg``) whose region names are shown at
        the cursor and in reports (:mod:`voxelscope.core.atlas`).
    atlas_labels : path, optional
        Its ``dseg.tsv``; default the one named like the image.
    summarize : bool
        Make the one pass over the data (mean image, NaN and constant voxels, brain mask)
        while opening, so its warnings are in :attr:`Inputs.warnings`. ``voxelscope fit``
        without ``--checks`` needs no mask and skips it (a compressed run gets the pass
        for free while its cache is built).
    """

    run: Path
    events: Path | None = None
    confounds: Path | None = None
    confound_columns: str | None = None
    condition_column: str | None = "trial_type"
    onset_unit: str = "seconds"
    tr: float | None = None
    mask: Path | str | None = None
    bids_root: Path | None = None
    use_cache: bool = True
    events_required: bool = True
    no_events: bool = False
    no_confounds: bool = False
    atlas: Path | None = None
    atlas_labels: Path | None = None
    summarize: bool = True

    def __post_init__(self) -> None:
        for flag, name in (("no_events", "events"), ("no_confounds", "confounds")):
            if getattr(self, flag) and getattr(self, name) is not None:
                raise ValueError(f"{flag} and {name} exclude each other")
        object.__setattr__(self, "run", Path(self.run).expanduser())
        for name in ("events", "confounds", "bids_root", "atlas", "atlas_labels"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, Path(value).expanduser())
        if self.confound_columns is not None and not str(self.confound_columns).strip():
            object.__setattr__(self, "confound_columns", None)
        if self.mask is not None and str(self.mask).strip().lower() != AUTO_MASK:
            object.__setattr__(self, "mask", Path(self.mask).expanduser())

    @property
    def auto_mask(self) -> bool:
        """True when the user asked for the intensity mask (``--mask auto``)."""
        return self.mask is not None and str(self.mask).strip().lower() == AUTO_MASK

    def input_paths(self) -> list[Path]:
        """Every input file named in the request (to keep outputs off them)."""
        paths = [self.run, self.events, self.confounds, self.atlas, self.atlas_labels]
        if isinstance(self.mask, Path):
            paths.append(self.mask)
        return [p for p in paths if p is not None]


@dataclass(frozen=True)
class ResolvedInputs:
    """The files an analysis will read, before any image data is touched.

    ``companions`` is what was found beside the run; ``events``, ``confounds`` and
    ``mask`` are what will be used (given by the user, or found).
    """

    request: InputRequest
    companions: Companions
    events: Path | None
    confounds: Path | None
    mask: Path | None
    notes: tuple[str, ...] = ()


def resolve_inputs(request: InputRequest) -> ResolvedInputs:
    """Find the companions the user did not name and check that named files exist.

    Cheap: reads directory entries only, never image data.

    Raises
    ------
    InputError
        A named file is missing, or events are required and none was found.

    Examples
    --------
    >>> resolve_inputs(InputRequest("/nonexistent/x_bold.nii"))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: /nonexistent/x_bold.nii: run file not found; ...
    """
    run = request.run
    if not run.is_file():
        raise InputError(f"{run}: run file not found; check the path (a 4D .nii or .nii.gz)")
    comp = find_companions(run, request.bids_root)
    for role, given, refused in (
        ("events", request.events, request.no_events),
        ("confounds", request.confounds, request.no_confounds),
        ("mask", request.mask, False),
    ):
        both = comp.ambiguous.get(role)
        if both and given is None and not refused:
            names = " and ".join(str(p) for p in both)
            raise InputError(
                f"{run}: {len(both)} {role} files match this run ({names})",
                file=run,
                field=role,
                remedy=f"choose_{role}",
            )
    if request.atlas_labels is not None and request.atlas is None:
        raise InputError(
            f"{request.atlas_labels}: a label table names the regions of an atlas image, and "
            "no atlas image was given",
            file=request.atlas_labels,
            remedy="atlas",
        )
    for label, given in (("events", request.events), ("confounds", request.confounds)):
        if given is not None and not given.exists():  # devices, folders: the reader says
            raise InputError(f"{given}: {label} file not found; check --{label}")
    if isinstance(request.mask, Path) and not request.mask.is_file():
        raise InputError(
            f"{request.mask}: mask file not found", file=request.mask, remedy="mask_file"
        )
    events = None if request.no_events else (request.events or comp.events)
    if events is None and request.events_required:
        raise InputError(
            f"{run}: no events file given and none found beside it (a BIDS events.tsv with "
            "onset and duration in seconds)",
            file=run,
            remedy="events",
        )
    confounds = None if request.no_confounds else (request.confounds or comp.confounds)
    mask = None
    if isinstance(request.mask, Path):
        mask = request.mask
    elif request.mask is None:
        mask = comp.mask
    return ResolvedInputs(request, comp, events, confounds, mask)


@dataclass(eq=False)
class Inputs:
    """Everything an analysis of one run needs, opened and checked.

    Attributes
    ----------
    request : InputRequest
    resolved : ResolvedInputs
    run : Run
    conditions : list of Condition or None
    confounds : Confounds or None
        The confounds table (named, or found beside the run); it serves the checks and
        the excluded volumes even when no column of it is in the model.
    analysis : Analysis or None
        None when no events were given or found (the window only).
    mask_source : str
        ``"file"`` (a mask image) or ``"intensity"`` (the run's own mask).
    warnings : list of str
        Every warning, in the order the steps ran.
    confound_columns : tuple of str or None
        The model's confound columns for the user's choice (None without a table).
    atlas : Atlas or None
        The segmentation image and label table given (``--atlas``).
    """

    request: InputRequest
    resolved: ResolvedInputs
    run: object
    conditions: list[Condition] | None
    confounds: Confounds | None
    analysis: Analysis | None
    mask_source: str = "intensity"
    warnings: list[str] = field(default_factory=list)
    confound_columns: tuple[str, ...] | None = None
    atlas: Atlas | None = None

    @property
    def companions(self) -> Companions:
        return self.resolved.companions

    @property
    def events_path(self) -> Path | None:
        return self.resolved.events

    @property
    def confounds_path(self) -> Path | None:
        return self.resolved.confounds

    @property
    def mask_path(self) -> Path | None:
        return self.resolved.mask if self.mask_source == "file" else None

    def used_files(self) -> dict:
        """The files this analysis read, by role (paths as strings, or None).

        ``sidecars`` lists every sidecar that contributed, nearest (the run's own) last.
        """
        sidecars = [str(p) for p in getattr(self.run, "sidecars", ()) or ()]
        if not sidecars and getattr(self.run, "sidecar", None) is not None:
            sidecars = [str(self.run.sidecar)]
        return {
            "events": None if self.events_path is None else str(self.events_path),
            "sidecars": sidecars,
            "confounds": None if self.confounds_path is None else str(self.confounds_path),
            "mask": None if self.mask_path is None else str(self.mask_path),
            "atlas": None if self.atlas is None else str(self.atlas.path),
        }

    def files_line(self) -> str:
        """One line naming the files used and the sampling reference (for a status line).

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> got = load_inputs(
        ...     InputRequest(Path(data_path) / "functional.nii", events_required=False)
        ... )
        >>> for part in got.files_line().split("; "):
        ...     print(part)
        events: none
        sidecar: none
        mask: intensity rule
        regressors sampled at 0 s (start of each volume)
        """
        used = self.used_files()

        def name(p) -> str:
            return Path(p).name if p else "none"

        parts = [f"events: {name(used['events'])}"]
        sidecars = used["sidecars"]
        parts.append(
            "sidecar: " + (" < ".join(Path(p).name for p in sidecars) if sidecars else "none")
        )
        if used["confounds"]:
            parts.append(f"confounds: {name(used['confounds'])}")
        parts.append(f"mask: {name(used['mask']) if used['mask'] else 'intensity rule'}")
        run = self.run
        parts.append(f"regressors sampled at {run.reference_time_s:g} s ({run.reference_source})")
        return "; ".join(parts)

    def status_line(self) -> str:
        """A short line for the window's status bar: the files used, by name.

        Examples
        --------
        >>> from nibabel.testing import data_path
        >>> got = load_inputs(
        ...     InputRequest(Path(data_path) / "functional.nii", events_required=False)
        ... )
        >>> got.status_line()
        'no events; no sidecar; intensity mask; regressors at 0 s into each TR'
        """
        used = self.used_files()
        parts = [f"events {Path(used['events']).name}" if used["events"] else "no events"]
        n = len(used["sidecars"])
        parts.append(
            "no sidecar"
            if n == 0
            else (f"sidecar {Path(used['sidecars'][0]).name}" if n == 1 else f"{n} sidecars")
        )
        if used["confounds"]:
            parts.append("confounds table")
        parts.append(f"mask {Path(used['mask']).name}" if used["mask"] else "intensity mask")
        run = self.run
        ref = f"regressors at {run.reference_time_s:g} s into each TR"
        if run.reference_source.startswith("StartTime"):
            ref += " (StartTime)"
        parts.append(ref)
        return "; ".join(parts)


def analysis_for(
    run,
    conditions: list[Condition],
    confounds: Confounds | None = None,
) -> Analysis:
    """The :class:`Analysis` of a run: its volumes, TR and sampling reference.

    Every front end builds its analysis here, so the reference time and the confound
    row check cannot drift between them.
    """
    if confounds is not None:
        confounds.check_rows(run.n_volumes)
    return Analysis(
        conditions, run.n_volumes, run.tr, confounds, reference_time_s=run.reference_time_s
    )


def _apply_mask(run, path: Path, warnings: list[str]) -> None:
    """Read a mask image onto the run's grid (nearest neighbour) and make it the run's mask."""
    from .images import load_image, load_on_grid

    img = load_image(path)
    same = tuple(int(n) for n in img.shape[:3]) == tuple(run.shape) and np.allclose(
        img.affine, run.affine, atol=1e-3
    )
    notes: list[str] = []
    m = load_on_grid(path, run, order=0, warnings=notes)
    warnings.extend(notes)
    if not same:
        warnings.append(
            f"{path}: the mask is on another grid than the run; resampled onto the run's "
            "grid by nearest neighbour"
        )
    mask = np.isfinite(m) & (m != 0)
    if not mask.any():
        raise InputError(
            f"{path}: the mask has no voxel inside the run's grid", file=path, remedy="mask"
        )
    run.set_mask(mask, source=str(path))


def load_inputs(
    request: InputRequest,
    progress: Callable[[float], bool | None] | None = None,
    notify: Callable[[str], None] | None = None,
) -> Inputs:
    """Resolve, check, open and model one run: the one way in for every front end.

    Parameters
    ----------
    request : InputRequest
    progress : callable, optional
        ``progress(fraction) -> bool | None`` while a compressed run is decompressed;
        False cancels.
    notify : callable, optional
        Called at once with a line the user should see before a long step (a big cache
        announced before it is written); without it the line joins the warnings.

    Returns
    -------
    Inputs

    Raises
    ------
    VoxelscopeError
        One line naming the file, the field and what to do.
    """
    from .run import open_run

    resolved = resolve_inputs(request)
    warnings: list[str] = []
    # Checks that need no image data: read the small files before the run is opened.
    conditions = None
    events_file = None
    if resolved.events is not None:
        events_file = read_events_file(resolved.events, request.run, request.condition_column)
        conditions = list(events_file.conditions)
        warnings.extend(events_file.warnings)
    confounds, confounds_path, conf_notes = _read_confounds(request, resolved)
    if confounds_path != resolved.confounds:
        resolved = dataclasses.replace(resolved, confounds=confounds_path)
    if resolved.mask is not None:
        from .images import load_nifti

        load_nifti(resolved.mask, "mask")  # header only: unreadable masks fail now
    atlas = None
    if request.atlas is not None:
        atlas = open_atlas(request.atlas, request.atlas_labels)  # before the run: cheap
    keep = None
    if resolved.mask is not None:
        mask_path = resolved.mask

        def keep(shape: tuple[int, int, int], affine: np.ndarray) -> np.ndarray:
            """The given mask on the run's grid, for the cache to keep its voxels."""
            from .images import load_on_grid

            m = load_on_grid(mask_path, (shape, affine), order=0, warnings=[])
            return np.isfinite(m) & (m != 0)

    run = open_run(
        request.run,
        tr=request.tr,
        use_cache=request.use_cache,
        progress=progress,
        sidecars=resolved.companions.sidecars,
        notify=notify,
        keep=keep,
    )
    mask_source = "intensity"
    mask_notes: list[str] = []
    if resolved.mask is not None:
        _apply_mask(run, resolved.mask, mask_notes)
        mask_source = "file"
    if request.summarize:
        run.mask()  # the one pass over the data: its warnings (NaN voxels) are known now
    warnings.extend(run.warnings)
    warnings.extend(mask_notes)
    analysis = None
    columns = None
    if confounds is not None:
        confounds.check_rows(run.n_volumes)
        columns = choose_columns(confounds, request.confound_columns, request.confounds is not None)
        conf_notes.extend(confounds.missing_warnings(columns))
    if conditions is not None:
        if request.onset_unit == "volumes":
            conditions = scale_conditions(conditions, run.tr)
        analysis = analysis_for(run, conditions, confounds)
        analysis.events_file = events_file
        analysis.onset_unit = request.onset_unit
        if events_file is not None:  # said with the run's own notes wherever they are shown
            analysis.warnings[:0] = list(events_file.warnings)
        warnings.extend(analysis.warnings)
    elif request.no_events:
        warnings.append(
            f"{request.run}: opened without events (none chosen); open an events file to "
            "fit a model (File > Open events)"
        )
    elif not request.events_required:
        warnings.append(
            f"{request.run}: no events file found beside it; open one to fit a model "
            "(File > Open events)"
        )
    warnings.extend(conf_notes)
    return Inputs(
        request=request,
        resolved=resolved,
        run=run,
        conditions=conditions,
        confounds=confounds,
        analysis=analysis,
        mask_source=mask_source,
        warnings=list(dict.fromkeys(warnings)),
        confound_columns=columns,
        atlas=atlas,
    )


def _read_confounds(
    request: InputRequest, resolved: ResolvedInputs
) -> tuple[Confounds | None, Path | None, list[str]]:
    """The confounds table, named or found beside the run, and warnings.

    A table found beside the run that cannot be read is skipped with a warning unless the
    user chose columns from it; a named one must be readable.
    """
    path = resolved.confounds
    choice = request.confound_columns
    if path is None:
        if choice is not None and choice.strip().lower() != "none":
            raise InputError(
                "confound columns were chosen but there is no confounds table (none was found "
                "beside the run)",
                field="confound columns",
                value=choice,
                remedy="confounds_for_columns",
            )
        return None, None, []
    try:
        return read_confounds(path), path, []
    except InputError as err:
        if request.confounds is not None or choice is not None:
            raise
        return None, None, [f"{err} (the confounds file beside the run is not used)"]


def read_events_file(
    events: str | os.PathLike[str],
    run_path: str | os.PathLike[str] | None = None,
    condition_column: str | None = "trial_type",
) -> EventsFile:
    """Read an events file; one condition without a condition column is named after the
    task (the events file's ``task-`` label, else the run's)."""
    task = task_name(events)
    if task == "task" and run_path is not None:
        task = task_name(run_path)
    return load_events(events, condition_column=condition_column, task=task)


def open_atlas(
    atlas: str | os.PathLike[str], labels: str | os.PathLike[str] | None = None
) -> Atlas:
    """An atlas (segmentation image and label table) for an open run (File > Open atlas):
    the same reading as ``InputRequest.atlas``."""
    return load_atlas(atlas, labels)


def open_events(
    run,
    events: str | os.PathLike[str],
    confounds: str | os.PathLike[str] | Confounds | None = None,
    condition_column: str | None = "trial_type",
    onset_unit: str = "seconds",
) -> Analysis:
    """A new analysis of an open run from another events file (and confounds).

    The events file's notes (e.g. ``n/a`` durations) join ``analysis.warnings``.
    """
    events_file = read_events_file(events, getattr(run, "path", None), condition_column)
    conditions = list(events_file.conditions)
    if onset_unit == "volumes":
        conditions = scale_conditions(conditions, run.tr)
    conf = confounds
    if conf is not None and not isinstance(conf, Confounds):
        conf = read_confounds(conf)
    analysis = analysis_for(run, conditions, conf)
    analysis.events_file = events_file
    analysis.onset_unit = onset_unit
    analysis.warnings[:0] = list(events_file.warnings)
    return analysis
