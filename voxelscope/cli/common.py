"""Options shared by the commands that fit a model (``fit``, ``map``, ``report``)."""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

from ..core.errors import InputError
from ..core.hrf import DEFAULT_KERNELS, get_kernel
from ..core.jsonsafe import json_safe
from ..core.model import Analysis, ModelSettings
from ..core.pvalues import TAILS

__all__ = [
    "Loaded",
    "add_atlas_args",
    "add_model_args",
    "add_voxel_args",
    "analysis_from_args",
    "companions_text",
    "excluded_json",
    "parse_highpass",
    "parse_kernels",
    "request_from_args",
    "voxel_from_args",
]


def parse_highpass(text: str) -> float | None:
    """``128`` -> 128.0 seconds; ``none`` -> no drift columns."""
    if str(text).strip().lower() in ("none", "off", "0"):
        return None
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"--highpass takes seconds or 'none', not '{text}'"
        ) from None
    if not (v > 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError(
            "--highpass must be a positive number of seconds or 'none'"
        )
    return v


def parse_threshold(text: str) -> float:
    """``--threshold``: a finite number >= 0 (|t| or the map's own statistic).

    >>> parse_threshold("3.5")
    3.5
    """
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--threshold takes a number, not '{text}'") from None
    if not (v >= 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError("--threshold must be a number >= 0")
    return v


def parse_kernels(text: str) -> tuple[str, ...]:
    """Comma-separated kernel names, checked."""
    names = tuple(n.strip().lower() for n in str(text).split(",") if n.strip())
    if not names:
        raise argparse.ArgumentTypeError("--kernels needs at least one kernel name")
    for n in names:
        try:
            get_kernel(n)
        except InputError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None
    return tuple(get_kernel(n).name for n in names)


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of seconds, not '{text}'") from None
    if not (v > 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError(f"expected a positive number of seconds, not '{text}'")
    return v


class _Runs(argparse.Action):
    """``RUN [RUN ...]``: ``args.run`` is the first run (one-run code reads it), ``args.runs``
    every run in order."""

    def __call__(self, parser, namespace, values, option_string=None):
        values = list(values) if isinstance(values, (list, tuple)) else [values]
        namespace.run = values[0]
        namespace.runs = values


class _EachRun(argparse.Action):
    """An option given once, or once per run: ``args.X`` keeps the last value (one run),
    ``args.X_each`` every value in order (several runs)."""

    def __call__(self, parser, namespace, values, option_string=None):
        setattr(namespace, self.dest, values)
        each = list(getattr(namespace, f"{self.dest}_each", None) or [])
        each.append(values)
        setattr(namespace, f"{self.dest}_each", each)


def _count(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a whole number of volumes, not '{text}'"
        ) from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected 0 or more volumes, not '{text}'")
    return v


def _positive_mm(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of mm, not '{text}'") from None
    if not (v > 0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError(f"expected a positive number of mm, not '{text}'")
    return v


def add_model_args(
    p: argparse.ArgumentParser,
    kernels: bool = True,
    several_runs: bool = False,
    run_files: bool = True,
) -> None:
    """Add the run, events, confounds and model options.

    With ``several_runs`` the command takes ``RUN [RUN ...]`` (``args.runs``; ``args.run``
    is the first) and ``--events`` / ``--confounds`` may be given once per run, in order.
    Without ``run_files`` (``sweep``: every run finds its own companions) there is no run
    argument and no ``--events`` / ``--confounds``.
    """
    if not run_files:
        pass
    elif several_runs:
        p.add_argument(
            "run",
            nargs="+",
            action=_Runs,
            metavar="RUN",
            help="4D NIfTI run(s) (.nii or .nii.gz); several runs of one subject are fitted "
            "each on its own and combined by fixed effects",
        )
    else:
        p.add_argument("run", help="4D NIfTI run (.nii or .nii.gz)")
    each = {"action": _EachRun} if several_runs else {}
    if run_files:
        p.add_argument(
            "--events",
            **each,
            metavar="FILE",
            help="BIDS events.tsv (onset, duration in seconds; trial_type); "
            "default: the BIDS-named file beside the run",
        )
    p.add_argument(
        "--condition-column",
        metavar="NAME",
        default="trial_type",
        help="events column whose values name the conditions (default trial_type); "
        "'none' puts every event in one condition named after the task",
    )
    p.add_argument(
        "--modulators",
        metavar="A,B",
        help="numeric events columns as parametric modulators: each condition whose events "
        "carry one gets a column CONDITION:NAME, mean-centred over its events",
    )
    p.add_argument(
        "--orthogonalize",
        action="store_true",
        help="orthogonalise each condition's modulators in the order given (off by default)",
    )
    p.add_argument(
        "--onset-unit",
        choices=("seconds", "volumes"),
        default="seconds",
        help="unit of the events file's onsets and durations (default seconds); "
        "volumes are multiplied by the TR",
    )
    # replaced options: a clear line instead of argparse's "unrecognized arguments"
    p.add_argument("--amplitude-column", metavar="NAME", help=argparse.SUPPRESS)
    p.add_argument("--fir-bins", metavar="N", help=argparse.SUPPRESS)
    if run_files:
        p.add_argument(
            "--confounds",
            **each,
            metavar="FILE",
            help="TSV or CSV of nuisance regressors with a header row; default: the "
            "confounds table beside the run, read for the checks and excluded volumes but "
            "adding no column until --confound-columns chooses some",
        )
    p.add_argument(
        "--confound-columns",
        metavar="A,B",
        help="confound columns for the model: names, wildcards (trans_?, a_comp_cor_0[0-4]) "
        "and sets (motion6, motion12, motion24, acompcorN, csf, wm, global, outliers, all, "
        "none), comma-separated; default: all columns of a --confounds table of at most 30",
    )
    p.add_argument(
        "--drop-volumes",
        type=_count,
        default=0,
        metavar="N",
        help="leave the first N volumes out of the fit (volumes marked non-steady-state in "
        "the confounds table are left out anyway)",
    )
    p.add_argument(
        "--censor-fd",
        type=_positive_mm,
        metavar="MM",
        help="leave out volumes whose framewise_displacement (confounds table) exceeds MM",
    )
    p.add_argument(
        "--tr",
        type=_positive_float,
        metavar="SECONDS",
        help="repetition time; overrides sidecar and header",
    )
    if kernels:
        p.add_argument(
            "--kernels",
            type=parse_kernels,
            default=DEFAULT_KERNELS,
            metavar="K1,K2",
            help=f"kernels to fit, in order (default {','.join(DEFAULT_KERNELS)}; also: fir)",
        )
    p.add_argument(
        "--contrast",
        metavar="EXPR",
        help="e.g. 'tap', 'tap - tone', '0.5*tap + 0.5*tone' (default: first condition)",
    )
    p.add_argument(
        "--noise",
        choices=("arp", "ols", "ar1"),
        default="arp",
        help="noise model: arp (default: AR(2), bias-corrected and smoothed in space), "
        "ols, or ar1 (rho from each voxel's own residuals)",
    )
    p.add_argument(
        "--tail",
        choices=TAILS,
        default="two",
        help="tail of p and -log10 p: two-sided (default), positive or negative",
    )
    p.add_argument(
        "--highpass",
        type=parse_highpass,
        default=128.0,
        metavar="SECONDS|none",
        help="discrete cosine drift cutoff in seconds (default 128) or 'none'",
    )
    p.add_argument(
        "--derivatives",
        type=int,
        choices=(0, 1, 2),
        default=0,
        help="1 adds temporal derivatives, 2 also dispersion derivatives (default 0)",
    )
    p.add_argument(
        "--onset-shift",
        type=float,
        default=0.0,
        metavar="SECONDS",
        help="add to every onset (timing test)",
    )
    p.add_argument(
        "--fir-window",
        type=_positive_float,
        default=24.0,
        metavar="SECONDS",
        help="span of the FIR kernel after each onset, also for the checks (default 24)",
    )
    p.add_argument(
        "--fir-bin", type=_positive_float, metavar="SECONDS", help="FIR bin width (default one TR)"
    )
    p.add_argument(
        "--mask",
        metavar="FILE|auto",
        help="brain mask for maps, checks and findings: a NIfTI mask (non-zero voxels; "
        "another grid is resampled by nearest neighbour) or 'auto' for the run's own "
        "intensity mask (default: the run's desc-brain_mask when found, else auto)",
    )
    p.add_argument(
        "--bids-root",
        metavar="DIR",
        help="the raw BIDS dataset a derivative run comes from (default: the folder "
        "above derivatives/)",
    )
    p.add_argument(
        "--no-cache",
        action="store_true",
        help="read a compressed run into memory instead of making or using its fast-access "
        "copy on disk",
    )


def add_atlas_args(p: argparse.ArgumentParser) -> None:
    """``--atlas FILE`` and ``--atlas-labels TSV``: region names at the voxel."""
    p.add_argument(
        "--atlas",
        metavar="FILE",
        help="a segmentation image on any grid (BIDS dseg.nii[.gz]) whose region names are "
        "given at the voxel; its dseg.tsv (columns index and name) is found by its name",
    )
    p.add_argument(
        "--atlas-labels",
        metavar="TSV",
        help="the atlas's label table (default: the dseg.tsv named like the atlas)",
    )


def add_voxel_args(p: argparse.ArgumentParser, required: bool = True):
    """``--voxel I J K`` or ``--mm X Y Z``; returns the group, for further choices."""
    g = p.add_mutually_exclusive_group(required=required)
    g.add_argument(
        "--voxel", nargs=3, type=int, metavar=("I", "J", "K"), help="voxel indices (0-based)"
    )
    g.add_argument(
        "--mm",
        nargs=3,
        type=float,
        metavar=("X", "Y", "Z"),
        help="world coordinates in mm (nearest voxel)",
    )
    return g


@dataclass
class Loaded:
    """What a model command needs: the run, the analysis, the settings, and warnings.

    ``inputs`` is the core's :class:`~voxelscope.core.loader.Inputs` (companions used,
    mask source, reference time).
    """

    run: object
    analysis: Analysis
    settings: ModelSettings
    events_path: Path
    confounds_path: Path | None
    warnings: list[str] = field(default_factory=list)
    inputs: object = None


def request_from_args(args: argparse.Namespace, summarize: bool = True):
    """The core :class:`~voxelscope.core.loader.InputRequest` for the shared options."""
    from ..core.loader import InputRequest

    return InputRequest(
        run=Path(args.run),
        events=getattr(args, "events", None) or None,
        confounds=getattr(args, "confounds", None) or None,
        confound_columns=getattr(args, "confound_columns", None),
        condition_column=getattr(args, "condition_column", "trial_type"),
        onset_unit=getattr(args, "onset_unit", "seconds"),
        tr=getattr(args, "tr", None),
        mask=getattr(args, "mask", None),
        bids_root=getattr(args, "bids_root", None),
        use_cache=not getattr(args, "no_cache", False),
        events_required=True,
        summarize=summarize,
        atlas=getattr(args, "atlas", None),
        atlas_labels=getattr(args, "atlas_labels", None),
    )


def analysis_from_args(
    args: argparse.Namespace, progress: bool = True, summarize: bool = True
) -> Loaded:
    """Open the run with its companions through the core's one way in.

    See :func:`voxelscope.core.loader.load_inputs`; ``summarize=False`` skips the pass
    over the data that only the mask needs (``fit`` without ``--checks``).
    """
    from ..core.cache import terminal_progress
    from ..core.loader import load_inputs

    if getattr(args, "amplitude_column", None):
        raise InputError(
            "--amplitude-column was replaced: use --modulators "
            f"{args.amplitude_column} (the condition's own column plus a mean-centred "
            f"CONDITION:{args.amplitude_column} column)"
        )
    if getattr(args, "fir_bins", None):
        raise InputError(
            "--fir-bins was replaced: give the FIR span in seconds with --fir-window SECONDS "
            "(and the bin width with --fir-bin SECONDS)"
        )
    check_model_args(args)  # absurd values: one line before anything is opened
    request = request_from_args(args, summarize=summarize)
    got = load_inputs(
        request,
        progress=terminal_progress() if progress else None,
        notify=lambda line: print(f"voxelscope: {line}", file=sys.stderr, flush=True),
    )
    settings = ModelSettings(
        kernels=tuple(getattr(args, "kernels", DEFAULT_KERNELS)),
        contrast=args.contrast,
        noise=args.noise,
        highpass_s=args.highpass,
        onset_shift_s=float(args.onset_shift),
        derivatives=int(args.derivatives),
        fir_window_s=float(getattr(args, "fir_window", 24.0)),
        fir_bin_s=args.fir_bin,
        confound_columns=got.confound_columns,
        drop_volumes=int(getattr(args, "drop_volumes", 0) or 0),
        censor_fd_mm=getattr(args, "censor_fd", None),
        modulators=_names(getattr(args, "modulators", None)),
        orthogonalize=bool(getattr(args, "orthogonalize", False)),
    )
    # Check the modulators and the contrast once, by name, before any fitting.
    warnings = list(got.warnings) + got.analysis.check_modulators(settings)
    got.analysis.check_contrast(settings.contrast, settings)
    # excluded volumes and every kernel's design, checked once before any fitting
    got.analysis.excluded_volumes(settings)
    warnings.extend(got.analysis.design_warnings(settings))
    return Loaded(
        got.run,
        got.analysis,
        settings,
        Path(got.events_path),
        got.confounds_path,
        list(dict.fromkeys(warnings)),
        got,
    )


#: Model fields and the options that set them (for messages).
_OPTIONS = {
    "highpass_s": "--highpass",
    "onset_shift_s": "--onset-shift",
    "fir_window_s": "--fir-window",
    "fir_bin_s": "--fir-bin",
    "tr": "--tr",
}


def check_model_args(args: argparse.Namespace) -> None:
    """One line for a model option outside its plausible range (see core.limits)."""
    from ..core.inputs import excerpt
    from ..core.limits import CONTRAST_CHARS, setting_problem

    values = {
        "highpass_s": getattr(args, "highpass", None),
        "onset_shift_s": getattr(args, "onset_shift", None),
        "fir_window_s": getattr(args, "fir_window", None),
        "fir_bin_s": getattr(args, "fir_bin", None),
        "tr": getattr(args, "tr", None),
    }
    for name, value in values.items():
        problem = setting_problem(name, value)
        if problem is not None:
            raise InputError(f"{_OPTIONS[name]} {problem}")
    contrast = getattr(args, "contrast", None)
    if contrast is not None and len(str(contrast)) > CONTRAST_CHARS:
        raise InputError(
            f"--contrast '{excerpt(contrast)}' is {len(str(contrast))} characters long; "
            f"a contrast has at most {CONTRAST_CHARS}"
        )


def _names(text: str | None) -> tuple[str, ...]:
    """``'gain, loss'`` -> ``('gain', 'loss')``; None or empty -> ``()``."""
    return tuple(n.strip() for n in str(text or "").split(",") if n.strip())


def companions_text(loaded: Loaded) -> list[str]:
    """Lines for the table output: which files were used and the sampling reference."""
    got = loaded.inputs
    if got is None:
        return []
    used = got.used_files()
    lines = [f"events     {used['events']}"]
    for sc in used["sidecars"]:
        lines.append(f"sidecar    {sc}")
    if used["confounds"]:
        lines.append(f"confounds  {used['confounds']}")
    lines.append(f"mask       {used['mask'] or 'intensity rule (auto)'}")
    if used.get("atlas"):
        lines.append(f"atlas      {used['atlas']}")
    lines.append(
        f"reference  {got.run.reference_time_s:g} s into each TR ({got.run.reference_source})"
    )
    return lines


def voxel_from_args(args: argparse.Namespace, run) -> tuple[int, int, int]:
    """The voxel named by ``--voxel`` or ``--mm`` (checked against the grid)."""
    if getattr(args, "voxel", None) is not None:
        return run.check_voxel(tuple(args.voxel))
    return run.mm_to_voxel(tuple(args.mm))


def excluded_json(loaded: Loaded) -> list[dict]:
    """The volumes left out of the fit, 0-based and sorted, each with its reason."""
    ex = loaded.analysis.excluded_volumes(loaded.settings)
    return [{"volume": v, "reason": why} for v, why in ex.items()]


def print_warnings(warnings: list[str]) -> None:
    """Warnings go to stderr, one line each."""
    for w in dict.fromkeys(warnings):
        print(f"voxelscope: warning: {w}", file=sys.stderr)


def dump_json(obj) -> str:
    """Strict JSON (no NaN or Infinity)."""
    return json.dumps(json_safe(obj), allow_nan=False, indent=1)
