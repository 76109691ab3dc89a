"""``voxelscope view`` and ``voxelscope demo``: the window. Qt is imported only here, lazily."""

from __future__ import annotations

import argparse

from ..core.errors import InputError
from .helptext import help_args

__all__ = ["open_empty_window", "register"]


def _size(text: str) -> tuple[int, int]:
    try:
        w, h = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"--size takes WIDTHxHEIGHT, e.g. 1600x1000, not '{text}'"
        ) from None
    if not (200 <= w <= 8000 and 200 <= h <= 8000):
        raise argparse.ArgumentTypeError("--size must be between 200x200 and 8000x8000 pixels")
    return w, h


def _add_screenshot_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--show", action="store_true", help="start in Show mode (step through marks)")
    p.add_argument(
        "--screenshot", metavar="PNG", help="render the window offscreen to this PNG and exit"
    )
    p.add_argument(
        "--force",
        action="store_true",
        help="let --screenshot (and --save-session) replace an existing file",
    )
    p.add_argument(
        "--size",
        type=_size,
        default=(1600, 1000),
        metavar="WxH",
        help="window size (default 1600x1000)",
    )


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "view",
        **help_args("view"),
        help="open a run in the window",
        description=(
            "Open a run in the window: Slices, Signal, Fits, Model, Map, Findings, Checks and "
            "Marks. Events, confounds, sidecars and the brain mask are found beside the run "
            "by their BIDS names unless given. Research software: not for clinical diagnosis."
        ),
    )
    p.add_argument(
        "run", nargs="?", help="4D NIfTI run (.nii or .nii.gz); without it, an empty window"
    )
    p.add_argument(
        "--add-run",
        action="append",
        metavar="RUN",
        dest="add_runs",
        help="another run of the same subject, fitted at the same place and combined by "
        "fixed effects (repeat for more runs)",
    )
    p.add_argument(
        "--events",
        metavar="FILE",
        help="BIDS events.tsv (onset, duration in seconds; trial_type); default: the "
        "BIDS-named file beside the run",
    )
    p.add_argument(
        "--confounds",
        metavar="FILE",
        help="TSV or CSV of nuisance regressors with a header row; default: the confounds "
        "table beside the run (its columns are listed in Model, switched off)",
    )
    p.add_argument(
        "--anatomy",
        metavar="FILE",
        help="anatomical image on any grid, drawn at its own resolution (default: the "
        "run's mean image)",
    )
    # the earlier spelling, kept so that existing commands keep working; not in the help
    p.add_argument("--anat", dest="anatomy", metavar="FILE", help=argparse.SUPPRESS)
    p.add_argument(
        "--map",
        metavar="FILE",
        dest="map_file",
        help="a map from elsewhere (e.g. a t map), on any grid, shown over the slices",
    )
    p.add_argument(
        "--tr",
        type=float,
        metavar="SECONDS",
        help="repetition time; overrides the sidecar and the header",
    )
    p.add_argument(
        "--mask",
        metavar="FILE|auto",
        help="brain mask (default: the run's desc-brain_mask when found, else 'auto', the "
        "intensity rule)",
    )
    p.add_argument(
        "--bids-root", metavar="DIR", help="the raw BIDS dataset a derivative run comes from"
    )
    p.add_argument(
        "--atlas",
        metavar="FILE",
        help="a segmentation image on any grid (BIDS dseg.nii[.gz]): the region at the "
        "cursor is named in the readout; its dseg.tsv is found by its name",
    )
    p.add_argument(
        "--atlas-labels",
        metavar="TSV",
        help="the atlas's label table (default: the dseg.tsv named like the atlas)",
    )
    g = p.add_mutually_exclusive_group()
    g.add_argument(
        "--voxel",
        nargs=3,
        type=int,
        metavar=("I", "J", "K"),
        help="start at this voxel (indices, 0-based)",
    )
    g.add_argument(
        "--mm",
        nargs=3,
        type=float,
        metavar=("X", "Y", "Z"),
        help="start at these world coordinates in mm (nearest voxel)",
    )
    p.add_argument("--session", metavar="FILE", help="restore a saved session")
    p.add_argument("--save-session", metavar="FILE", help="save the session to FILE after opening")
    _add_screenshot_args(p)
    p.set_defaults(handler=run_view)

    d = sub.add_parser(
        "demo",
        **help_args("demo"),
        help="open the demo run (tone and tap blocks)",
        description=(
            "Open the demo study: a made-up run with tone and tap blocks, its confounds, an "
            "anatomical image, an earlier analysis's t map and prepared marks, each hiding "
            "something for the tools to find. Not real data."
        ),
    )
    _add_screenshot_args(d)
    d.set_defaults(handler=run_demo)


def display_problem(environ=None, find_library=None) -> str | None:
    """Why a window cannot open on this machine, or None (checked before Qt is loaded).

    Qt aborts the process when it finds no display, or on X11 when a system library its
    plugin needs (``libxcb-cursor0`` and a few others) is missing; we say so in one line
    instead, naming the packages.

    >>> display_problem({"QT_QPA_PLATFORM": "offscreen"}) is None
    True
    """
    import ctypes.util
    import os
    import sys

    env = os.environ if environ is None else environ
    find = ctypes.util.find_library if find_library is None else find_library
    if env.get("QT_QPA_PLATFORM") or not sys.platform.startswith("linux"):
        return None
    if env.get("WAYLAND_DISPLAY"):
        return None
    if not env.get("DISPLAY"):
        return (
            "no display found (DISPLAY and WAYLAND_DISPLAY are unset); run voxelscope on a "
            "desktop, or add --screenshot FILE.png to render the window offscreen"
        )
    missing = [pkg for lib, pkg in _X11_LIBRARIES if find(lib) is None]
    if missing:
        return (
            f"the window needs system libraries that Qt uses on X11: {' '.join(missing)} "
            f"(Debian/Ubuntu: sudo apt-get install {' '.join(missing)}); or add "
            "--screenshot FILE.png to render offscreen"
        )
    return None


# Libraries Qt's X11 plugin loads (from Qt 6.5), with their Debian/Ubuntu package names.
_X11_LIBRARIES = (
    ("xcb-cursor", "libxcb-cursor0"),
    ("xcb-icccm", "libxcb-icccm4"),
    ("xcb-keysyms", "libxcb-keysyms1"),
    ("xcb-image", "libxcb-image0"),
    ("xcb-render-util", "libxcb-render-util0"),
    ("xcb-shape", "libxcb-shape0"),
    ("xcb-randr", "libxcb-randr0"),
    ("xcb-xkb", "libxcb-xkb1"),
    ("xkbcommon-x11", "libxkbcommon-x11-0"),
)


def _launch(**kwargs) -> int:
    if not kwargs.get("screenshot"):
        problem = display_problem()
        if problem:
            raise InputError(problem)
    try:
        from ..gui.app import launch
    except ImportError as exc:
        raise InputError(
            f"the window cannot start: {exc}; install the project with its dependencies"
        ) from None
    kwargs = {k: v for k, v in kwargs.items() if v is not None}
    return int(launch(**kwargs) or 0)


def run_view(args: argparse.Namespace) -> int:
    extra = {}
    if args.session:
        extra["session"] = args.session
    if args.save_session:
        extra["save_session"] = args.save_session
    if args.run is None and not args.session:
        raise InputError("voxelscope view needs a RUN (a 4D NIfTI file) or --session FILE")
    if args.add_runs and args.run is None:
        raise InputError("--add-run needs a first RUN to add to")
    return _launch(
        show=args.show or None,
        run=args.run,
        events=args.events,
        confounds=args.confounds,
        anatomy=args.anatomy,
        map_file=args.map_file,
        tr=args.tr,
        mask=args.mask,
        bids_root=args.bids_root,
        atlas=args.atlas,
        atlas_labels=args.atlas_labels,
        voxel=tuple(args.voxel) if args.voxel else None,
        mm=tuple(args.mm) if args.mm else None,
        screenshot=args.screenshot,
        size=args.size,
        force=args.force or None,
        add_runs=tuple(args.add_runs) if args.add_runs else None,
        **extra,
    )


def run_demo(args: argparse.Namespace) -> int:
    return _launch(
        demo=True,
        screenshot=args.screenshot,
        size=args.size,
        show=args.show or None,
        force=args.force or None,
    )


def open_empty_window() -> int:
    """``voxelscope`` with no command: an empty window that says how to open a run."""
    from ..core.errors import VoxelscopeError

    try:
        return _launch()
    except VoxelscopeError as exc:
        import sys

        print(f"voxelscope: error: {exc}", file=sys.stderr)
        return 2
