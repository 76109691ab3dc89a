"""A whole study at once: every run's map, every subject's combined map, and the findings
that deserve a look.

:func:`plan_sweep` lists the runs of a BIDS study that have events
(:func:`voxelscope.core.study.list_study`, with the companions rules of one run). For
each run, :func:`sweep_run` opens it the one way in (:func:`voxelscope.core.loader.load_inputs`),
computes the map of one kernel (:func:`voxelscope.core.maps.compute_map`), finds its
clusters (:func:`voxelscope.core.clusters.find_clusters`) and, at each cluster's peak,
runs the voxel checks (:func:`voxelscope.core.checks.voxel_checks`, whose ``edge`` flag is
the closeness to the mask edge) and one check of its own, motion locked to the task:

``task-motion``
    The task regressor of the checked condition correlates with the run's motion
    columns (the six motion parameters and ``framewise_displacement`` of the confounds
    table) at ``|r| >=`` :data:`TASK_MOTION_R`, and adding the six motion parameters to
    the model keeps less than :data:`ESTIMATE_KEPT` of the peak's contrast estimate (or
    flips its sign). A real response survives the motion columns; motion that only looks
    like the task does not.

For each subject and task with two runs or more, :func:`sweep_subject` combines the
runs' estimate and variance maps by fixed effects (:func:`voxelscope.core.combine.combine_maps`,
on the first run's grid), finds the combined clusters, and states at each peak whether
the runs agree (:func:`voxelscope.core.combine.combine_fits`: ``runs-disagree``,
``one-run``); at each run's own peaks it adds ``runs-disagree`` when Cochran's Q over the
subject's runs has p below :data:`voxelscope.core.combine.DISAGREE_P`.

Every run and every combination is one task on Dask's distributed scheduler
(:func:`run_sweep`): a local cluster of processes or a running scheduler, with the same
results. Workers read the inputs where they are and write each run's result into the
output folder (``runs/<key>.json`` and ``runs/<key>.npz``, atomically); only small
results (peaks, flags, small PNG figures) travel back. A result whose settings and inputs
(path, size, modification time) are unchanged is reused, so a sweep stopped half way
resumes where it stopped and gives the same findings; a result saved by a version of
voxelscope with another layout of results (:data:`RESULTS_FORMAT`) is computed again, never
mixed with new ones. Dask is imported only when a sweep runs.

The findings table (``findings.tsv``), one session per finding and a self-contained page
(``index.html``) are written by :mod:`voxelscope.core.sweep_out`.

Examples
--------
>>> s = SweepSettings(ModelSettings(), kernel="gamma")
>>> s.describe().split(", |")[0]
'kernel gamma, first condition, AR(p) noise'
"""

from __future__ import annotations

import base64
import dataclasses
import hashlib
import io
import json
import math
import os
import re
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import InputError, VoxelscopeError
from .jsonsafe import json_safe
from .model import ModelSettings
from .numfmt import format_value

__all__ = [
    "DEFAULT_THRESHOLD",
    "ESTIMATE_KEPT",
    "MAX_PEAKS",
    "MIN_VOXELS",
    "OTHERS_T",
    "RESULTS_FORMAT",
    "TASK_MOTION_R",
    "RunJob",
    "SubjectJob",
    "SweepPlan",
    "SweepProgress",
    "SweepResult",
    "SweepSettings",
    "plan_sweep",
    "run_sweep",
    "sweep_run",
    "sweep_subject",
]

#: Default cluster threshold on |t| (our choice: about p < 0.001 two-sided at the df of a
#: run of a hundred volumes or more).
DEFAULT_THRESHOLD = 3.5
#: Default smallest cluster (voxels).
MIN_VOXELS = 5
#: At most this many clusters per map get their peak checked (the largest); the rest
#: are counted in the run's notes.
MAX_PEAKS = 20
#: Motion columns correlating with the task regressor at least this strongly (|r|) make
#: the peak's motion refit worth looking at (our choice).
TASK_MOTION_R = 0.3
#: ... and the ``task-motion`` flag is raised when less than this share of the contrast
#: estimate survives the six motion parameters (our choice).
ESTIMATE_KEPT = 0.5
#: A run's finding is ``this-run-only`` when every other run of the subject has t below this
#: share of the threshold (same sign) at its peak (our choice).
OTHERS_T = 0.5
#: Size of the figure of each finding (logical pixels).
FIGURE_SIZE = (420.0, 230.0)
#: Layout of the saved results (``runs/<key>.json`` and ``.npz``, ``subjects/<key>.json``),
#: part of every fingerprint: results saved in another layout are computed again, never
#: read. 2: the contrast estimate is saved as ``estimate`` (1, which the fingerprint did
#: not name, saved it as ``beta``).
RESULTS_FORMAT = 2

_NOISE_NAME = {"ols": "OLS", "ar1": "AR(1)", "arp": "AR(p)"}


# ----------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class SweepSettings:
    """Everything that decides a sweep's findings (plain data, sent to every task).

    ``model`` is the template of every run's model; its ``confound_columns`` are
    resolved per run from ``confound_columns`` (the user's choice: names, wildcards,
    sets) by the loader, as on the command line.
    """

    model: ModelSettings
    kernel: str = "double-gamma"
    threshold: float = DEFAULT_THRESHOLD
    min_voxels: int = MIN_VOXELS
    connectivity: int = 26
    max_peaks: int = MAX_PEAKS
    task: str | None = None
    condition_column: str | None = "trial_type"
    onset_unit: str = "seconds"
    confound_columns: str | None = None
    mask: str | None = None
    bids_root: str | None = None
    tr: float | None = None
    use_cache: bool = True
    tail: str = "two"

    def to_json(self) -> dict[str, Any]:
        """Plain data (the model as its fields)."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name != "model"}
        out["model"] = {
            f.name: (list(v) if isinstance(v, tuple) else v)
            for f in dataclasses.fields(ModelSettings)
            for v in [getattr(self.model, f.name)]
        }
        return out

    def digest(self) -> str:
        """SHA-256 of the settings and of :data:`RESULTS_FORMAT` (part of every result's
        fingerprint).

        >>> a, b = SweepSettings(ModelSettings()), SweepSettings(ModelSettings(), kernel="gamma")
        >>> a.digest() == SweepSettings(ModelSettings()).digest(), a.digest() == b.digest()
        (True, False)
        """
        data = {**self.to_json(), "results_format": RESULTS_FORMAT}
        return _sha(json.dumps(data, sort_keys=True, default=str))

    def describe(self) -> str:
        """One line for people."""
        m = self.model
        contrast = f"contrast '{m.contrast}'" if m.contrast else "first condition"
        return (
            f"kernel {self.kernel}, {contrast}, {_NOISE_NAME.get(m.noise, m.noise)} noise, "
            f"|t| > {self.threshold:g}, clusters of at least {self.min_voxels} voxels "
            f"({self.connectivity}-connected)"
        )


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# ----------------------------------------------------------------------------- the plan


@dataclass(frozen=True)
class RunJob:
    """One run to sweep: its path, names and the key of its result files."""

    key: str
    path: str
    subject: str
    session: str
    task: str
    run: str
    dataset: str
    problem: str = ""
    inputs: tuple[str, ...] = ()  # companions found (for the fingerprint)

    def fingerprint(self, settings: SweepSettings) -> str:
        """Settings and every input's path, size and modification time."""
        parts = [settings.digest()]
        for p in (self.path, *self.inputs):
            try:
                st = os.stat(p)
                parts.append(f"{p}|{st.st_size}|{st.st_mtime_ns}")
            except OSError:
                parts.append(f"{p}|missing")
        return _sha("\n".join(parts))


@dataclass(frozen=True)
class SubjectJob:
    """The runs of one subject and task, combined by fixed effects."""

    key: str
    subject: str
    task: str
    session: str  # the runs' session, or "all" when they come from several
    run_keys: tuple[str, ...]


@dataclass
class SweepPlan:
    """What a sweep will do: the runs (with events) and the combinations."""

    root: Path
    runs: list[RunJob]
    subjects: list[SubjectJob]
    skipped: list[str] = field(default_factory=list)  # notes: runs left out and why


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-") or "x"


def _identity(r) -> tuple:
    from .bids import parse_name

    name = parse_name(Path(r.path).name)
    ent = dict(name.entities) if name is not None else {}
    return tuple(
        ent.get(k, "") for k in ("sub", "ses", "task", "acq", "ce", "rec", "dir", "run", "echo")
    )


def plan_sweep(dataset: str | os.PathLike[str], settings: SweepSettings) -> SweepPlan:
    """The runs of a study that have events, and each subject's combination.

    A run found both in the raw dataset and in a derivatives dataset is swept once, from
    the derivatives (the preprocessed run); when several derivatives hold it (other
    spaces or descriptions), the first listed is used and the others are noted.

    Raises
    ------
    InputError
        Not a study, or no run with events (of ``settings.task``).

    Examples
    --------
    >>> try:
    ...     plan_sweep("/nonexistent", SweepSettings(ModelSettings()))
    ... except InputError as err:
    ...     print(str(err).split(";")[0])
    /nonexistent: not a folder
    """
    from .study import list_study

    # absolute paths: workers may run in another folder (or on another machine)
    study = list_study(Path(dataset).expanduser().absolute(), settings.bids_root)
    chosen: dict[tuple, Any] = {}
    skipped: list[str] = []
    no_events = 0
    for r in study.runs:
        if not r.subject:
            if r.problem:
                skipped.append(r.problem)
            continue
        if settings.task is not None and r.task != settings.task:
            continue
        if not r.found("events") and not r.problem:
            no_events += 1
            continue
        ident = _identity(r)
        old = chosen.get(ident)
        if old is None or (old.dataset == "raw" and r.dataset != "raw"):
            chosen[ident] = r
        elif r.dataset != "raw":
            skipped.append(f"{r.path.name}: another derivative of a run already swept; left out")
    if no_events:
        skipped.append(f"{no_events} run(s) without events left out")
    if not chosen:
        what = f" of task '{settings.task}'" if settings.task else ""
        raise InputError(
            f"{study.root}: no runs with events{what} in this study; a sweep needs each run's "
            "events.tsv (BIDS names)" + ("; check --task" if settings.task else "")
        )
    runs: list[RunJob] = []
    used: set[str] = set()
    for r in chosen.values():
        base = "_".join(
            p
            for p in (
                f"sub-{r.subject}",
                f"ses-{r.session}" if r.session else "",
                f"task-{r.task}" if r.task else "",
                f"run-{r.run}" if r.run else "",
                r.label.replace("_", "-") if r.label else "",
            )
            if p
        )
        key = _safe(base)
        if key in used:  # same entities in two derivatives datasets under other labels
            key = f"{key}-{_sha(str(r.path))[:8]}"
        used.add(key)
        inputs = [str(p) for p in (r.events, *r.sidecars, r.confounds, r.mask) if p]
        runs.append(
            RunJob(
                key=key,
                path=str(r.path),
                subject=r.subject,
                session=r.session,
                task=r.task,
                run=r.run or _safe(Path(r.path).name.split("_bold")[0]),
                dataset=r.dataset,
                problem=r.problem,
                inputs=tuple(inputs),
            )
        )
    runs.sort(key=lambda j: (j.subject, j.task, j.session, j.run, j.key))
    groups: dict[tuple[str, str], list[RunJob]] = {}
    for j in runs:
        if not j.problem:
            groups.setdefault((j.subject, j.task), []).append(j)
    subjects = []
    for (sub, task), jobs in sorted(groups.items()):
        if len(jobs) < 2:
            continue
        sessions = {j.session for j in jobs}
        subjects.append(
            SubjectJob(
                key=_safe(f"sub-{sub}_task-{task}" if task else f"sub-{sub}"),
                subject=sub,
                task=task,
                session=sessions.pop() if len(sessions) == 1 else "all",
                run_keys=tuple(j.key for j in jobs),
            )
        )
    return SweepPlan(Path(study.root), runs, subjects, skipped)


# ----------------------------------------------------------------------------- one run


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text[:1000]


def _read_json(path: Path) -> dict | None:
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def _write_json(path: Path, data: dict) -> None:
    from .atomic import write_text

    text = json.dumps(json_safe(data), indent=1, sort_keys=True, allow_nan=False)
    write_text(path, text + "\n", force=True)


def _finished(path: Path, fingerprint: str) -> dict | None:
    """A saved result with this fingerprint, else None."""
    data = _read_json(path)
    if data is None or data.get("fingerprint") != fingerprint:
        return None
    return data


def _digests(paths: dict[str, str | None]) -> dict[str, dict[str, Any]]:
    from .session import file_digest

    out = {}
    for role, p in paths.items():
        if not p or not Path(p).is_file():
            continue
        out[role] = {"path": str(p), "sha256": file_digest(p), "size": Path(p).stat().st_size}
    return out


def _motion_columns(conf) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(the motion parameters in the table, those plus framewise_displacement)."""
    from .confounds import MOTION6

    if conf is None:
        return (), ()
    have = set(conf.file_columns)
    six = tuple(c for c in MOTION6 if c in have)
    extra = ("framewise_displacement",) if "framewise_displacement" in have else ()
    return six, six + extra


def _png_b64(fig) -> str:
    return base64.b64encode(fig.to_png(scale=1.0)).decode("ascii")


def sweep_run(job: RunJob, settings: SweepSettings, out: str) -> dict[str, Any]:
    """Sweep one run: map, clusters, checks at each peak; saved as ``out/runs/<key>``.

    Runs inside a Dask worker (or anywhere): returns the result as plain data. A run that
    cannot be swept gives ``status: "failed"`` and its one-line ``reason``; a failure of
    the inputs is saved (the same inputs fail the same way), anything else is tried again
    by the next sweep.
    """
    import warnings as _warnings

    folder = Path(out) / "runs"
    fingerprint = job.fingerprint(settings)
    saved = _finished(folder / f"{job.key}.json", fingerprint)
    if saved is not None and (saved["status"] != "ok" or (folder / f"{job.key}.npz").is_file()):
        saved["reused"] = True
        return saved
    base = {
        "kind": "run",
        "key": job.key,
        "fingerprint": fingerprint,
        "subject": job.subject,
        "session": job.session,
        "task": job.task,
        "run": job.run,
        "path": job.path,
        "reused": False,
    }
    started = time.perf_counter()
    try:
        if job.problem:
            raise InputError(f"{Path(job.path).name}: {job.problem}")
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")
            result = {**base, **_sweep_run(job, settings, folder)}
    except VoxelscopeError as exc:
        result = {**base, "status": "failed", "reason": _one_line(exc), "findings": []}
        _write_json(folder / f"{job.key}.json", result)
        return result
    except Exception as exc:  # not saved: tried again next time
        reason = f"internal error: {exc.__class__.__name__}: {_one_line(exc)}"
        return {**base, "status": "failed", "reason": reason, "findings": [], "transient": True}
    result["seconds"] = round(time.perf_counter() - started, 3)
    _write_json(folder / f"{job.key}.json", result)
    return result


def _sweep_run(job: RunJob, s: SweepSettings, folder: Path) -> dict[str, Any]:
    from .atomic import write_bytes
    from .checks import voxel_checks
    from .clusters import find_clusters
    from .diagnostics import run_summary
    from .events import shift_conditions
    from .figure import signal_figure
    from .loader import InputRequest, load_inputs
    from .maps import compute_map

    request = InputRequest(
        run=Path(job.path),
        confound_columns=s.confound_columns,
        condition_column=s.condition_column,
        onset_unit=s.onset_unit,
        tr=s.tr,
        mask=s.mask,
        bids_root=s.bids_root,
        use_cache=s.use_cache,
        events_required=True,
        summarize=True,
    )
    got = load_inputs(request)
    run, analysis = got.run, got.analysis
    kernels = (s.kernel,)
    model = s.model.with_(kernels=kernels, confound_columns=got.confound_columns)
    notes = list(got.warnings) + analysis.check_modulators(model)
    analysis.check_contrast(model.contrast, model)
    analysis.excluded_volumes(model)
    notes.extend(analysis.design_warnings(model))
    result = compute_map(
        run,
        analysis,
        model,
        s.kernel,
        mask=run.mask(),
        stats=("t", "estimate", "variance"),
        workers=1,  # one run per worker process, one thread each
        tail=s.tail,
    )
    table = find_clusters(
        result.t,
        s.threshold,
        affine=run.affine,
        mask=result.mask,
        connectivity=s.connectivity,
        min_voxels=s.min_voxels,
    )
    summary = run_summary(run)
    clusters = list(table.clusters)
    if len(clusters) > s.max_peaks:
        notes.append(
            f"{len(clusters)} clusters; the {s.max_peaks} largest were checked (the others "
            "are in the map)"
        )
        clusters = clusters[: s.max_peaks]
    six, motion = _motion_columns(got.confounds)
    in_model = set(model.confound_columns or ())
    motion_model = None
    if six and not set(six) <= in_model:
        motion_model = model.with_(
            confound_columns=tuple(dict.fromkeys((*(model.confound_columns or ()), *six)))
        )
    conditions = shift_conditions(analysis.conditions, model.onset_shift_s)
    findings = []
    task_r_run = None
    for c in clusters:
        ijk = tuple(int(v) for v in c.peak_voxel)
        y = run.timeseries(ijk)
        noise = analysis.noise_at(run, ijk, model)
        fits = analysis.fit_voxel(y, model, noise)
        kf = fits.fits[0]
        est = noise.get(s.kernel)
        checks = voxel_checks(
            analysis,
            model,
            s.kernel,
            y,
            run=run,
            ijk=ijk,
            ar=None if est is None else est.phi,
        )
        flags = [(f.id, f.text) for f in checks.flags]
        estimate = float(kf.result.estimate[0])
        row = checks.confound_correlation.get(checks.condition, {})
        rs = [abs(row[m]) for m in motion if m in row and math.isfinite(row[m])]
        task_r = max(rs) if rs else None
        task_r_run = task_r if task_r_run is None else max(task_r_run, task_r or 0.0)
        kept = None
        if motion_model is not None and task_r is not None and task_r >= TASK_MOTION_R:
            noise2 = analysis.noise_at(run, ijk, motion_model)
            refit = analysis.fit_voxel(y, motion_model, noise2).fits[0]
            b2 = float(refit.result.estimate[0])
            kept = b2 / estimate if estimate != 0 and math.isfinite(b2) else None
            if kept is not None and kept < ESTIMATE_KEPT:
                flags.append(
                    (
                        "task-motion",
                        "The task regressor correlates "
                        f"{format_value('r', task_r)} with the motion columns "
                        f"and only {100 * max(kept, 0):.0f}% of the effect is left once the "
                        "six motion parameters join the model: motion locked to the task "
                        "is a likely cause.",
                    )
                )
        title = f"sub-{job.subject} {job.task} run {job.run}: cluster {c.label} peak"
        fig = signal_figure(
            kf.design.volume_times,
            y,
            [(kf.kernel, kf.fitted, kf.residuals)],
            conditions,
            title=title,
            width=FIGURE_SIZE[0],
            height=FIGURE_SIZE[1],
            run_length_s=analysis.n_volumes * analysis.tr,
        )
        findings.append(
            {
                "cluster": c.label,
                "voxels": c.size_voxels,
                "peak_ijk": list(ijk),
                "peak_mm": [round(v, 4) for v in c.peak_mm],
                "t": float(c.peak_value),
                "estimate": estimate,
                "edge_mm": checks.edge_distance_mm,
                "task_motion_r": task_r,
                "estimate_kept": kept,
                "flags": flags,
                "figure_png": _png_b64(fig),
            }
        )
    files = got.used_files()
    paths = {
        "run": job.path,
        "events": files["events"],
        "confounds": files["confounds"],
        "mask": files["mask"],
    }
    for n, sc in enumerate(files["sidecars"]):
        paths[f"sidecar {n + 1}" if n else "sidecar"] = sc
    buf = io.BytesIO()
    np.savez_compressed(
        buf,
        estimate=result.estimate.astype(np.float64),
        variance=result.variance.astype(np.float64),
        mask=result.mask,
        edge=summary.edge_distance.astype(np.float32),
    )
    write_bytes(folder / f"{job.key}.npz", buf.getvalue(), force=True)
    return {
        "status": "ok",
        "reason": "",
        "findings": findings,
        "clusters_total": len(table),
        "df": int(result.df),
        "contrast": result.contrast,
        "noise": result.noise,
        "model": {f.name: getattr(model, f.name) for f in dataclasses.fields(ModelSettings)},
        "shape": list(result.shape),
        "affine": np.asarray(run.affine, dtype=np.float64).tolist(),
        "inputs": _digests(paths),
        "task_motion_r": task_r_run,
        "notes": list(dict.fromkeys(notes)),
    }


# ----------------------------------------------------------------------------- one subject


@dataclass(frozen=True)
class _Grid:
    shape: tuple[int, int, int]
    affine: np.ndarray
    path: str = ""


def _at_point(grid: _Grid, mm: Sequence[float], target: _Grid) -> int:
    """Flat index on ``grid`` of the nearest voxel to ``mm`` (-1 outside)."""
    from .combine import nearest_index

    aff = np.eye(4)
    aff[:3, 3] = np.asarray(mm, dtype=np.float64)
    return int(nearest_index(grid.shape, grid.affine, (1, 1, 1), aff).reshape(-1)[0])


def sweep_subject(job: SubjectJob, runs: Sequence[dict], settings: SweepSettings, out: str) -> dict:
    """Combine one subject's runs (their saved maps) and check agreement at every peak.

    ``runs`` are the results of :func:`sweep_run` for ``job.run_keys`` (in order); the
    combination is saved as ``out/subjects/<key>.json``.
    """
    from .clusters import find_clusters
    from .combine import combine_fits, combine_maps, fixed_effects

    folder = Path(out) / "subjects"
    fingerprint = _sha("\n".join([settings.digest(), *(r["fingerprint"] for r in runs)]))
    saved = _finished(folder / f"{job.key}.json", fingerprint)
    if saved is not None:
        saved["reused"] = True
        return saved
    base = {
        "kind": "subject",
        "key": job.key,
        "fingerprint": fingerprint,
        "subject": job.subject,
        "session": job.session,
        "task": job.task,
        "run": "all",
        "run_keys": list(job.run_keys),
        "reused": False,
    }
    try:
        maps = []
        for r in runs:
            with np.load(Path(out) / "runs" / f"{r['key']}.npz") as z:
                maps.append({k: z[k] for k in ("estimate", "variance", "mask", "edge")})
    except (OSError, KeyError, ValueError) as exc:
        return {
            **base,
            "status": "failed",
            "reason": f"a run's saved map: {_one_line(exc)}",
            "findings": [],
            "transient": True,
        }
    grids = [_Grid(tuple(r["shape"]), np.asarray(r["affine"]), r["path"]) for r in runs]
    labels = [f"run-{r['run']}" for r in runs]
    from .maps import MapResult

    run_maps = [
        MapResult(
            t=None,
            estimate=m["estimate"],
            variance=m["variance"],
            z=None,
            p=None,
            mask=m["mask"],
            degenerate=np.zeros(m["mask"].shape, bool),
            rho=None,
            kernel=settings.kernel,
            contrast=r["contrast"],
            noise=r["noise"],
            df=int(r["df"]),
        )
        for m, r in zip(maps, runs)
    ]
    comb = combine_maps(
        grids, run_maps, labels, stats=("t", "estimate", "variance", "q", "q_p"), tail=settings.tail
    )
    table = find_clusters(
        comb.t,
        settings.threshold,
        affine=grids[0].affine,
        mask=comb.mask,
        connectivity=settings.connectivity,
        min_voxels=settings.min_voxels,
    )
    notes = []
    clusters = list(table.clusters)
    if len(clusters) > settings.max_peaks:
        notes.append(f"{len(clusters)} clusters; the {settings.max_peaks} largest were checked")
        clusters = clusters[: settings.max_peaks]
    dfs = [float(r["df"]) for r in runs]

    def per_run(mm) -> tuple[list, list]:
        bs, vs = [], []
        for g, m in zip(grids, maps):
            idx = _at_point(g, mm, grids[0])
            ok = idx >= 0 and bool(m["mask"].reshape(-1)[idx])
            bs.append(float(m["estimate"].reshape(-1)[idx]) if ok else None)
            vs.append(float(m["variance"].reshape(-1)[idx]) if ok else None)
        return bs, vs

    # run flags inherited by the combined cluster that holds a run's flagged peak
    run_flags: dict[int, dict[str, str]] = {}
    for r in runs:
        for f in r["findings"]:
            idx = _at_point(grids[0], f["peak_mm"], grids[0])
            if idx < 0:
                continue
            lab = int(table.labels.reshape(-1)[idx])
            for fid, text in f["flags"]:
                if fid == "task-motion" and lab:
                    run_flags.setdefault(lab, {})[fid] = f"run-{r['run']}: {text}"
    findings = []
    edge0 = maps[0]["edge"]
    for c in clusters:
        bs, vs = per_run(c.peak_mm)
        cf = combine_fits(
            settings.kernel, runs[0]["contrast"], labels, bs, vs, dfs, tail=settings.tail
        )
        flags = [(f.id, f.text) for f in cf.flags]
        edge = float(edge0[c.peak_voxel])
        from .flags import EDGE_LIMIT_MM

        if edge <= EDGE_LIMIT_MM:
            flags.insert(
                0,
                (
                    "edge",
                    f"The peak is {format_value('mm', edge)} mm from the brain edge of the "
                    "first run, where head motion can look like activation.",
                ),
            )
        flags.extend(run_flags.get(c.label, {}).items())
        findings.append(
            {
                "cluster": c.label,
                "voxels": c.size_voxels,
                "peak_ijk": [int(v) for v in c.peak_voxel],
                "peak_mm": [round(v, 4) for v in c.peak_mm],
                "t": float(c.peak_value),
                "estimate": cf.estimate,
                "edge_mm": edge,
                "q_p": cf.q_p,
                "flags": flags,
                "runs": [
                    {"run": lab, "estimate": b, "variance": v} for lab, b, v in zip(labels, bs, vs)
                ],
                "figure_png": _png_b64(_runs_figure(labels, bs, vs, cf, job)),
            }
        )
    # agreement at each run's own peaks: Cochran's Q for information; the flag asks whether
    # the other runs show the effect at all (a peak chosen in one run is that run's highest
    # voxel, so Q there leans towards disagreement even when every run responds)
    agreement: dict[str, dict[str, Any]] = {}
    for n, r in enumerate(runs):
        for f in r["findings"]:
            bs, vs = per_run(f["peak_mm"])
            b_arr = np.array([np.nan if b is None else b for b in bs])
            v_arr = np.array([np.nan if v is None else v for v in vs])
            fe = fixed_effects(b_arr, v_arr, dfs)
            q_p = float(fe.q_p[0])
            with np.errstate(invalid="ignore", divide="ignore"):
                t_runs = b_arr / np.sqrt(v_arr)
            others = [float(t) for i, t in enumerate(t_runs) if i != n and np.isfinite(t)]
            sign = 1.0 if f["t"] > 0 else -1.0
            alone = bool(others) and all(sign * t < OTHERS_T * settings.threshold for t in others)
            agreement[f"{r['key']}#{f['cluster']}"] = {
                "q_p": q_p if math.isfinite(q_p) else None,
                "others_t": others,
                "alone": alone,
            }
    result = {
        **base,
        "status": "ok",
        "reason": "",
        "df": comb.df,
        "findings": findings,
        "agreement": agreement,
        "clusters_total": len(table),
        "notes": notes,
        "paths": [r["path"] for r in runs],
    }
    _write_json(folder / f"{job.key}.json", result)
    return result


def _runs_figure(labels, estimates, variances, cf, job: SubjectJob):
    """Each run's estimate with its 95 % interval and the combined one (normal quantile
    1.96, an approximation at these df)."""
    from .figure import Figure, Polyline, Rect, Text, nice_ticks

    w, h = FIGURE_SIZE
    fig = Figure(w, h)
    rows = [(lab, b, v) for lab, b, v in zip(labels, estimates, variances)]
    rows.append(("combined", cf.estimate, cf.variance))
    fig.add(
        Text(
            10,
            16,
            f"sub-{job.subject} {job.task}: estimate per run (95% interval)",
            12.0,
            "#111111",
            "start",
        )
    )
    spans = []
    for _lab, b, v in rows:
        if b is not None and v is not None and v > 0:
            se = math.sqrt(v)
            spans += [b - 1.96 * se, b + 1.96 * se]
    lo, hi = (min([*spans, 0.0]), max([*spans, 0.0])) if spans else (-1.0, 1.0)
    if hi <= lo:
        hi = lo + 1.0
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    left, right, top, bottom = 96.0, 16.0, 30.0, 44.0
    pw, ph = w - left - right, h - top - bottom
    step = ph / max(len(rows), 1)

    def px(v: float) -> float:
        return left + (v - lo) / (hi - lo) * pw

    fig.add(Polyline([(px(0.0), top), (px(0.0), top + ph)], "#999999", 1.0))
    for n, (lab, b, v) in enumerate(rows):
        yy = top + step * (n + 0.5)
        colour = "#D55E00" if lab == "combined" else "#333333"
        fig.add(Text(left - 8, yy, lab, 11.0, "#222222", "end"))
        if b is None or v is None or not v > 0:
            fig.add(Text(left + 4, yy, "no value", 11.0, "#777777", "start"))
            continue
        se = math.sqrt(v)
        fig.add(Polyline([(px(b - 1.96 * se), yy), (px(b + 1.96 * se), yy)], colour, 2.0))
        fig.add(Rect(px(b) - 3.5, yy - 3.5, 7.0, 7.0, colour))
    for tick in nice_ticks(lo, hi, target=5):
        x = px(tick)
        fig.add(Polyline([(x, top + ph), (x, top + ph + 4)], "#444444", 1.0))
        fig.add(Text(x, top + ph + 16, f"{tick:g}", 10.0, "#222222", "middle"))
    fig.add(Text(left + pw / 2, h - 8, "contrast estimate", 11.0, "#222222", "middle"))
    return fig


# ----------------------------------------------------------------------------- the sweep


@dataclass
class SweepResult:
    """What a sweep produced: the plan, every run's and combination's result, and which
    were computed this time (the others were reused)."""

    plan: SweepPlan
    runs: list[dict]
    subjects: list[dict]
    computed: list[str]
    out: Path


@dataclass(frozen=True)
class SweepProgress:
    """Where a sweep is: runs and subject combinations done, and an estimate of the time
    left (None until a task has finished in this sweep)."""

    runs_done: int
    runs: int
    subjects_done: int
    subjects: int
    seconds_left: float | None = None

    @property
    def fraction(self) -> float:
        total = self.runs + self.subjects
        return (self.runs_done + self.subjects_done) / total if total else 1.0


ProgressFn = Callable[[SweepProgress], None]


def _quiet_dask() -> None:
    """Keep Dask's log lines off the terminal (here and in the worker processes)."""
    import logging

    if not os.environ.get("VOXELSCOPE_DEBUG"):
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "critical")
        os.environ.setdefault("DASK_DISTRIBUTED__LOGGING__DISTRIBUTED", "critical")
        for name in ("distributed", "distributed.worker", "distributed.nanny", "tornado"):
            logging.getLogger(name).setLevel(logging.CRITICAL + 1)


def _client(workers: int | None, scheduler: str | None):
    """A Dask client on a new local cluster (``workers`` processes, one thread each) or
    on the scheduler at ``scheduler``; returns (client, cluster or None)."""
    _quiet_dask()
    import signal

    from distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout="8s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError(
                f"cannot reach the Dask scheduler at {scheduler} "
                f"({_one_line(exc) or 'timed out'}); start it (dask scheduler) or check the "
                "address"
            ) from None
        return client, None
    n = workers or os.cpu_count() or 1
    # worker processes ignore Ctrl+C: the sweep stops them itself, without their tracebacks
    old = signal.getsignal(signal.SIGINT)
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    except ValueError:  # not the main thread
        old = None
    try:
        cluster = LocalCluster(
            n_workers=n,
            threads_per_worker=1,
            processes=True,
            dashboard_address=":0",  # a free port: never clashes with another cluster
            silence_logs=50,
        )
    finally:
        if old is not None:
            signal.signal(signal.SIGINT, old)
    return Client(cluster, set_as_default=False), cluster


def run_sweep(
    dataset: str | os.PathLike[str],
    out: str | os.PathLike[str],
    settings: SweepSettings,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: ProgressFn | None = None,
    plan: SweepPlan | None = None,
) -> SweepResult:
    """Sweep a study on Dask: one task per run, one per subject's combination.

    Parameters
    ----------
    dataset : path
        A BIDS study (raw with derivatives, or a derivatives dataset).
    out : path
        The sweep's folder (created); results already there with the same settings and
        inputs are reused.
    settings : SweepSettings
    workers : int, optional
        Processes of a new local cluster (default: the machine's cores).
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:port``) instead.
    progress : callable, optional
        ``progress(SweepProgress)`` at the start and after each task.

    Returns
    -------
    SweepResult
    """
    out = Path(out)
    if plan is None:
        plan = plan_sweep(dataset, settings)
    for sub in ("runs", "subjects"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    total = len(plan.runs) + len(plan.subjects)
    runs_by_key: dict[str, dict] = {}
    subjects: dict[str, dict] = {}
    computed: list[str] = []
    started = time.perf_counter()
    done = 0
    todo_runs = []
    for job in plan.runs:  # finished before: no task at all
        saved = _finished(out / "runs" / f"{job.key}.json", job.fingerprint(settings))
        if saved is not None and (
            saved["status"] != "ok" or (out / "runs" / f"{job.key}.npz").is_file()
        ):
            saved["reused"] = True
            runs_by_key[job.key] = saved
            done += 1
        else:
            todo_runs.append(job)
    n_cached = done

    def tick() -> None:
        if progress is None:
            return
        fresh = done - n_cached
        left = None
        if fresh > 0 and done < total:
            left = (time.perf_counter() - started) / fresh * (total - done)
        progress(
            SweepProgress(
                runs_done=len(runs_by_key),
                runs=len(plan.runs),
                subjects_done=len(subjects),
                subjects=len(plan.subjects),
                seconds_left=left,
            )
        )

    tick()
    pending = list(plan.subjects)
    client = cluster = None

    def ready(sj: SubjectJob) -> bool:
        return all(k in runs_by_key for k in sj.run_keys)

    def settle(sj: SubjectJob) -> bool:
        """Take a subject's saved or impossible combination without a task."""
        nonlocal done
        res = _subject_cached(sj, [runs_by_key[k] for k in sj.run_keys], settings, out)
        if res is None:
            return False
        subjects[sj.key] = res
        done += 1
        return True

    try:
        for sj in [sj for sj in pending if ready(sj)]:
            if settle(sj):
                pending.remove(sj)
        n_cached = done
        tick()
        if todo_runs or pending:
            client, cluster = _client(workers, scheduler)
            from distributed import as_completed

            target = str(out.resolve())
            owner: dict[str, Any] = {}  # task key -> its job, to name a task that died
            futures = []
            for job in todo_runs:
                fut = client.submit(sweep_run, job, settings, target, pure=False)
                owner[fut.key] = job
                futures.append(fut)
            with client.as_current():
                ac = as_completed(futures)

                def launch_ready() -> None:
                    for sj in [sj for sj in pending if ready(sj)]:
                        pending.remove(sj)
                        if not settle(sj):
                            fut = _submit_subject(client, sj, runs_by_key, settings, target)
                            owner[fut.key] = sj
                            ac.add(fut)

                launch_ready()
                for fut in ac:
                    try:
                        res = fut.result()
                    except Exception as exc:  # the worker died (memory, killed): a failed row
                        res = _lost(owner[fut.key], exc)
                    done += 1
                    if res.get("kind") == "subject":
                        subjects[res["key"]] = res
                    else:
                        runs_by_key[res["key"]] = res
                        launch_ready()
                    if not res.get("reused"):
                        computed.append(f"{res['kind']} {res['key']}")
                    tick()
    finally:
        if client is not None:
            try:
                client.close(timeout=10)
            except Exception:  # pragma: no cover - closing after an interrupt
                pass
        if cluster is not None:
            try:
                cluster.close(timeout=10)
            except Exception:  # pragma: no cover
                pass
    ordered_runs = [runs_by_key[j.key] for j in plan.runs]
    ordered_subjects = [subjects[s.key] for s in plan.subjects if s.key in subjects]
    return SweepResult(plan, ordered_runs, ordered_subjects, computed, out)


def _lost(job: RunJob | SubjectJob, exc: BaseException) -> dict:
    """The result of a task whose worker stopped (not saved: tried again next time)."""
    kind = "subject" if isinstance(job, SubjectJob) else "run"
    return {
        "kind": kind,
        "key": job.key,
        "subject": job.subject,
        "session": job.session,
        "task": job.task,
        "run": "all" if kind == "subject" else job.run,
        "status": "failed",
        "reason": f"the worker stopped ({exc.__class__.__name__}: {_one_line(exc)[:300]})",
        "findings": [],
        "reused": False,
        "transient": True,
    }


def _subject_cached(sj: SubjectJob, runs: list[dict], settings: SweepSettings, out: Path):
    ok = [r for r in runs if r["status"] == "ok"]
    if len(ok) < 2:
        return _too_few(sj, runs)
    fingerprint = _sha("\n".join([settings.digest(), *(r["fingerprint"] for r in ok)]))
    saved = _finished(out / "subjects" / f"{sj.key}.json", fingerprint)
    if saved is not None:
        saved["reused"] = True
    return saved


def _too_few(sj: SubjectJob, runs: list[dict]) -> dict:
    failed = [r["run"] for r in runs if r["status"] != "ok"]
    return {
        "kind": "subject",
        "key": sj.key,
        "subject": sj.subject,
        "session": sj.session,
        "task": sj.task,
        "run": "all",
        "status": "failed",
        "reason": f"fewer than two runs could be mapped (failed: run {', '.join(failed)})",
        "findings": [],
        "reused": True,
    }


def _submit_subject(client, sj: SubjectJob, runs_by_key: dict, settings, target: str):
    """The combination's task, with the runs' results minus their figures."""
    ok = [runs_by_key[k] for k in sj.run_keys if runs_by_key[k]["status"] == "ok"]
    light = []
    for r in ok:
        findings = [{k: v for k, v in f.items() if k != "figure_png"} for f in r["findings"]]
        light.append({**r, "findings": findings})
    job = dataclasses.replace(sj, run_keys=tuple(r["key"] for r in ok))
    return client.submit(sweep_subject, job, light, settings, target, pure=False)
