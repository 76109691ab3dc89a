"""Sessions: what the user is looking at, as plain data in one JSON file.

A session restores the whole view: the input files, the model settings, kernel
parameters, the current voxel, the map settings, the marks and the window layout.

File format
-----------
UTF-8 JSON object::

    {"schema": "voxelscope-session", "version": 1,
     "saved": "2026-05-01T10:00:00+00:00", "software": "0.1.0",
     "files": {"run": {"path": "sub-demo_task-tonetap_bold.nii.gz",
                       "absolute": "/data/sub-demo_task-tonetap_bold.nii.gz",
                       "sha256": "...", "size": 123}, ...},
     "model": {ModelSettings fields}, "kernels": {"gaussian": {"sigma_s": 2.0}},
     "voxel": [i, j, k] or null, "map": {...}, "marks": [{x_mm, y_mm, z_mm, title, note}],
     "layout": an object or a string (opaque to the core)}

``path`` is relative to the session file's folder where possible; ``absolute`` is kept as
a second place to look. Loading never fails because an input moved: :func:`load_session`
returns the session together with a list of :class:`FileProblem` (missing file, or a
file whose content digest differs), so the window can ask for the file and the command
line can print one line.

Older versions are upgraded on load by the functions in ``_UPGRADES`` (version n -> n+1);
version 1 is the first.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> d = Path(tempfile.mkdtemp())
>>> _ = (d / "run.nii").write_bytes(b"not really a run")
>>> s = Session(files={"run": d / "run.nii"}, voxel=(1, 2, 3))
>>> p = save_session(s, d / "view.voxelscope.json")
>>> loaded = load_session(p)
>>> loaded.session.voxel, loaded.problems
((1, 2, 3), [])
>>> (d / "run.nii").unlink()
>>> print(load_session(p).problems[0].message.split(": ", 1)[1])
the run file run.nii is missing; open it again from where it moved
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .atomic import write_text
from .errors import InputError
from .hrf import KERNEL_NAMES
from .inputs import excerpt, parse_json, read_input_text
from .limits import setting_problem
from .maps import EARLIER_STAT_NAMES
from .marks import MarkList
from .model import ModelSettings
from .model_json import FieldCheck, model_to_json, read_model_fields

__all__ = [
    "MAP_COLOUR_SCALES",
    "MAP_SOURCES",
    "MAP_STATS",
    "MAX_VOXEL_INDEX",
    "SCHEMA",
    "SESSION_SUFFIX",
    "VERSION",
    "FileProblem",
    "LoadedSession",
    "Session",
    "SessionInvalid",
    "autosave_dir",
    "autosave_path",
    "clear_recovery",
    "file_digest",
    "load_session",
    "read_recovery",
    "save_session",
    "session_from_json",
    "session_to_json",
    "write_recovery",
]

SCHEMA = "voxelscope-session"
VERSION = 1
SESSION_SUFFIX = ".voxelscope.json"
_CHUNK = 1 << 20

#: Colour scales, overlay sources and statistics a session's map settings may name.
MAP_COLOUR_SCALES = ("CET-D1", "CET-D1A", "CET-D3", "CET-D9")
MAP_SOURCES = ("model", "difference", "file", "disagreement")
MAP_STATS = ("t", "z", "estimate", "variance", "p", "neglog10p")
#: No grid has more voxels along an axis than this (NIfTI-1 stores dimensions as int16).
MAX_VOXEL_INDEX = 1_000_000

# version n -> function turning a version-n dict into a version-(n+1) dict
_UPGRADES: dict[int, Callable[[dict[str, Any]], dict[str, Any]]] = {}


@dataclass
class Session:
    """Everything needed to restore a view (plain data).

    Attributes
    ----------
    files : dict of role -> Path
        Input files by role (``run``, ``events``, ``confounds``, ``sidecar``, ``anatomy``,
        ``overlay``, ...). Paths are absolute after loading.
    model : ModelSettings
    kernels : dict of kernel name -> dict of parameter -> number
        Kernel parameters that differ from the defaults.
    voxel : (i, j, k) or None
    map : dict
        Map settings and threshold, JSON-compatible (owned by the window).
    marks : MarkList
    layout : dict or str or None
        Window layout, opaque to the core (for example base64 of the window state).
    """

    files: dict[str, Path] = field(default_factory=dict)
    model: ModelSettings = field(default_factory=ModelSettings)
    kernels: dict[str, dict[str, float]] = field(default_factory=dict)
    voxel: tuple[int, int, int] | None = None
    map: dict[str, Any] = field(default_factory=dict)
    marks: MarkList = field(default_factory=MarkList)
    layout: dict[str, Any] | str | None = None


@dataclass(frozen=True)
class FileProblem:
    """An input file of a session that cannot be used as saved.

    Attributes
    ----------
    role : str
    stored_path : str
        The path as written in the session file.
    path : Path
        Where it was looked for (resolved against the session's folder).
    kind : {"missing", "digest", "unverified"}
        ``"digest"``: the content differs from the recorded SHA-256; ``"unverified"``: no
        digest was recorded. Neither file is read before the user confirms it.
    message : str
        One line for the user.
    """

    role: str
    stored_path: str
    path: Path
    kind: str
    message: str


@dataclass
class LoadedSession:
    """A loaded session with the problems found in its input files and any warnings."""

    session: Session
    problems: list[FileProblem] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    path: Path | None = None

    def raise_for_problems(self) -> None:
        """Raise :class:`InputError` with the first problem's line (for the command line)."""
        if self.problems:
            more = len(self.problems) - 1
            extra = f" (and {more} more file problem{'s' if more > 1 else ''})" if more else ""
            raise InputError(self.problems[0].message + extra)


class SessionInvalid(InputError):
    """A session file with one or more bad fields; ``problems`` holds one line each.

    ``str(err)`` is the lines joined by newlines; front ends show one line per problem.
    """

    def __init__(self, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


# ----------------------------------------------------------------------------- digests


def file_digest(path: str | os.PathLike[str], chunk_size: int = _CHUNK) -> str:
    """SHA-256 of a file's content as hex, read in chunks.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> p = Path(tempfile.mkdtemp()) / "x"
    >>> _ = p.write_bytes(b"abc")
    >>> file_digest(p)[:16]
    'ba7816bf8f01cfea'
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while block := fh.read(chunk_size):
                h.update(block)
    except OSError as err:
        raise InputError(f"{path}: cannot read the file ({err.strerror})") from None
    return h.hexdigest()


# ----------------------------------------------------------------------------- to JSON


def _stored_path(p: Path, base: Path, relative: bool) -> str:
    if relative:
        try:
            return Path(os.path.relpath(p, base)).as_posix()
        except ValueError:  # another drive
            pass
    return str(p)


def session_to_json(
    session: Session,
    base_dir: str | os.PathLike[str] | None = None,
    digests: bool = True,
    relative: bool = True,
) -> dict[str, Any]:
    """The session as a JSON-compatible dict (file paths stored relative to ``base_dir``).

    Relative paths in ``session.files`` are taken relative to the working folder. Files that
    do not exist get ``sha256`` and ``size`` of None.
    """
    base = Path(base_dir).resolve() if base_dir is not None else Path.cwd()
    files: dict[str, Any] = {}
    for role, p in session.files.items():
        if p is None:
            continue
        path = Path(os.path.abspath(Path(p).expanduser()))  # relative: to the working folder
        exists = path.is_file()
        files[str(role)] = {
            "path": _stored_path(path, base, relative),
            "absolute": str(path),
            "sha256": file_digest(path) if (exists and digests) else None,
            "size": path.stat().st_size if exists else None,
        }
    return {
        "schema": SCHEMA,
        "version": VERSION,
        "saved": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "software": _software_version(),
        "files": files,
        "model": model_to_json(session.model),
        "kernels": {k: dict(v) for k, v in session.kernels.items()},
        "voxel": None if session.voxel is None else [int(v) for v in session.voxel],
        "map": session.map,
        "marks": session.marks.to_json(),
        "layout": session.layout,
    }


def _software_version() -> str:
    from voxelscope import __version__

    return __version__


def save_session(
    session: Session,
    path: str | os.PathLike[str],
    force: bool = False,
    digests: bool = True,
    relative: bool = True,
) -> Path:
    """Write a session file atomically; refuses to overwrite an existing file unless ``force``.

    Parameters
    ----------
    session : Session
    path : path-like
        Session file; ``.voxelscope.json`` is the suggested ending.
    force : bool
        Overwrite an existing file (the window asks first).
    digests : bool
        Store the SHA-256 of each input (reads every input once).
    relative : bool
        Store input paths relative to the session file's folder where possible.
    """
    p = Path(path)
    data = session_to_json(session, p.parent, digests=digests, relative=relative)
    try:
        text = json.dumps(data, indent=1, ensure_ascii=False, allow_nan=False)
    except (TypeError, ValueError) as err:
        raise InputError(
            f"{p}: the map settings or layout are not plain JSON data ({err})"
        ) from None
    return write_text(p, text + "\n", force=force, kind="session")


# --------------------------------------------------------------------------- from JSON


def _map_from_json(d: dict[str, Any], c: FieldCheck, warnings: list[str]) -> dict[str, Any]:
    """Map settings checked field by field: numbers in range, names from the known lists."""
    out: dict[str, Any] = {}

    def number(name: str, allow_none: bool = False):
        def check():
            v = c.number(d[name], f"map.{name}", allow_none=allow_none)
            problem = setting_problem(name, v)
            if problem is not None:
                raise c.fail(f"map.{name}", problem)
            return v

        return check

    def boolean(name: str):
        def check():
            if not isinstance(d[name], bool):
                raise c.fail(f"map.{name}", f"must be true or false, not {excerpt(repr(d[name]))}")
            return d[name]

        return check

    def one_of(name: str, allowed: tuple[str, ...], allow_none: bool = False):
        def check():
            v = c.text(d[name], f"map.{name}", allow_none=allow_none)
            if v is not None and v not in allowed:
                raise c.fail(f"map.{name}", f"is '{excerpt(v)}'; use one of {', '.join(allowed)}")
            return v

        return check

    def stat():
        v = c.text(d["stat"], "map.stat")
        v = EARLIER_STAT_NAMES.get(v, v)  # saved before the statistic was renamed
        if v not in MAP_STATS:
            raise c.fail("map.stat", f"is '{excerpt(v)}'; use one of {', '.join(MAP_STATS)}")
        return v

    checks = {
        "threshold": number("threshold"),
        "opacity": number("opacity"),
        "limit": number("limit", allow_none=True),
        "visible": boolean("visible"),
        "colour_scale": one_of("colour_scale", MAP_COLOUR_SCALES),
        "source": one_of("source", MAP_SOURCES),
        "kernel": one_of("kernel", KERNEL_NAMES, allow_none=True),
        "other_kernel": one_of("other_kernel", KERNEL_NAMES, allow_none=True),
        "stat": stat,
    }
    bad = object()
    for name in d:
        check = checks.get(name)
        if check is None:  # the window's own extra fields: kept as they are
            out[name] = d[name]
            continue
        v = c.collect(check, bad)
        if v is not bad:
            out[name] = v
    return out


def _upgrade(data: dict[str, Any], c: FieldCheck) -> dict[str, Any]:
    version = data.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise c.fail("version", f"must be a whole number, not {excerpt(repr(version))}")
    if version > VERSION:
        raise InputError(
            f"{c.source}: session version {version} was written by a newer voxelscope "
            f"(this one reads up to version {VERSION}); update voxelscope"
        )
    while version < VERSION:
        step = _UPGRADES.get(version)
        if step is None:
            raise InputError(
                f"{c.source}: session version {version} is not supported; save the view again"
            )
        data = step(dict(data))
        version += 1
        data["version"] = version
    return data


def session_from_json(
    data: Any, base_dir: str | os.PathLike[str] | None = None, source: str = "session"
) -> tuple[Session, dict[str, dict[str, Any]], list[str]]:
    """Validate and upgrade a session dict.

    Returns
    -------
    session : Session
        File paths resolved against ``base_dir``.
    file_records : dict
        Per role the stored record (``path``, ``absolute``, ``sha256``, ``size``).
    warnings : list of str
    """
    c = FieldCheck(source)
    if not isinstance(data, dict) or data.get("schema") != SCHEMA:
        raise InputError(f"{source}: not a voxelscope session (field 'schema' must be '{SCHEMA}')")
    data = _upgrade(data, c)
    warnings: list[str] = []
    base = Path(base_dir).resolve() if base_dir is not None else Path.cwd()

    files: dict[str, Path] = {}
    records: dict[str, dict[str, Any]] = {}
    for role, rec in (c.collect(lambda: c.obj(data.get("files", {}), "files"), {}) or {}).items():

        def one_file(role=role, rec=rec) -> None:
            rec = c.obj(rec, f"files.{role}")
            stored = c.text(rec.get("path"), f"files.{role}.path")
            absolute = c.text(rec.get("absolute"), f"files.{role}.absolute", allow_none=True)
            digest = c.text(rec.get("sha256"), f"files.{role}.sha256", allow_none=True)
            size = rec.get("size")
            if size is not None:
                size = c.integer(size, f"files.{role}.size")
                if size < 0:
                    raise c.fail(f"files.{role}.size", "must not be negative")
            if "\x00" in stored or (absolute and "\x00" in absolute):
                raise c.fail(f"files.{role}.path", "holds a NUL character")
            p = Path(stored).expanduser()
            files[role] = Path(os.path.abspath(p if p.is_absolute() else base / p))
            records[role] = {"path": stored, "absolute": absolute, "sha256": digest, "size": size}

        c.collect(one_file)

    model_json = c.collect(lambda: c.obj(data.get("model", {}), "model"), {})
    model = read_model_fields(model_json or {}, c, warnings)

    kernels: dict[str, dict[str, float]] = {}
    for name, params in (
        c.collect(lambda: c.obj(data.get("kernels", {}), "kernels"), {}) or {}
    ).items():

        def one_kernel(name=name, params=params) -> None:
            if name.lower() not in KERNEL_NAMES:
                raise c.fail(
                    f"kernels.{excerpt(name)}", f"is not a kernel; use {', '.join(KERNEL_NAMES)}"
                )
            params = c.obj(params, f"kernels.{name}")
            values = {k: c.number(v, f"kernels.{name}.{k}") for k, v in params.items()}
            try:
                from .hrf import get_kernel

                get_kernel(name, **values)  # unknown parameter names, impossible values
            except (InputError, TypeError, ValueError) as err:
                raise c.fail(f"kernels.{name}", f"is not valid ({excerpt(err, 80)})") from None
            kernels[name] = values

        c.collect(one_kernel)

    def get_voxel() -> tuple[int, int, int] | None:
        voxel = data.get("voxel")
        if voxel is None:
            return None
        if not isinstance(voxel, list) or len(voxel) != 3:
            raise c.fail("voxel", "must be [i, j, k] or null")
        ijk = tuple(c.integer(v, "voxel") for v in voxel)
        if min(ijk) < 0:
            raise c.fail("voxel", "must not be negative")
        if max(ijk) > MAX_VOXEL_INDEX:
            raise c.fail("voxel", f"has an index above {MAX_VOXEL_INDEX}, larger than any grid")
        return ijk  # type: ignore[return-value]

    voxel = c.collect(get_voxel)
    map_json = c.collect(lambda: c.obj(data.get("map", {}), "map"), {})
    map_settings = _map_from_json(map_json or {}, c, warnings)

    def get_marks() -> MarkList:
        try:
            return MarkList.from_json(data.get("marks", []))
        except InputError as err:
            raise c.fail("marks", f"is not valid: {excerpt(err, 120)}") from None

    marks = c.collect(get_marks, MarkList())

    def get_layout():
        layout = data.get("layout")
        if layout is not None and not isinstance(layout, (dict, str)):
            raise c.fail("layout", "must be an object, text or null")
        return layout

    layout = c.collect(get_layout)
    if c.problems:
        raise SessionInvalid(c.problems)
    session = Session(files, model, kernels, voxel, map_settings, marks, layout)
    return session, records, warnings


def _check_file(
    role: str, path: Path, rec: dict[str, Any], source: str, verify: bool
) -> tuple[Path, FileProblem | None]:
    candidates = [path]
    if rec.get("absolute") and Path(rec["absolute"]) != path:
        candidates.append(Path(rec["absolute"]))
    found = next((p for p in candidates if p.is_file()), None)
    stored = rec["path"]
    if found is None:
        msg = f"{source}: the {role} file {stored} is missing; open it again from where it moved"
        return path, FileProblem(role, stored, path, "missing", msg)
    digest = rec.get("sha256")
    if verify and not digest:
        msg = (
            f"{source}: the {role} file {stored} has no recorded content digest; locate it "
            "to confirm it is the right file"
        )
        return found, FileProblem(role, stored, found, "unverified", msg)
    if verify and digest:
        size = rec.get("size")
        same = (size is None or found.stat().st_size == size) and file_digest(found) == digest
        if not same:
            msg = (
                f"{source}: the {role} file {stored} has changed since the session was saved "
                "(content digest differs); check it is the right file or open the right one"
            )
            return found, FileProblem(role, stored, found, "digest", msg)
    return found, None


def load_session(path: str | os.PathLike[str], verify: bool = True) -> LoadedSession:
    """Read, validate and upgrade a session file.

    A moved or changed input is not an error: it is listed in ``problems``. Invalid JSON,
    a wrong schema or a bad field raises one :class:`InputError` line naming the file and
    the field.

    Parameters
    ----------
    path : path-like
    verify : bool
        Compare each input's SHA-256 with the stored one (reads every input once).
    """
    p = Path(path)
    source = str(p)
    text = read_input_text(p, "session")  # bounded; one line for size, encoding, access
    data = parse_json(text, source, "session")
    session, records, warnings = session_from_json(data, p.parent, source)
    problems = []
    for role in list(session.files):
        found, problem = _check_file(role, session.files[role], records[role], source, verify)
        session.files[role] = found
        if problem is not None:
            problems.append(problem)
    return LoadedSession(session, problems, warnings, p)


# ----------------------------------------------------------------------------- autosave


def autosave_dir() -> Path:
    """Folder for recovery files: ``platformdirs.user_state_dir("voxelscope")``.

    On Linux this honours ``XDG_STATE_HOME`` (default ``~/.local/state/voxelscope``).
    """
    import platformdirs

    return Path(platformdirs.user_state_dir("voxelscope", appauthor=False))


def autosave_path(name: str = "recovery", directory: str | os.PathLike[str] | None = None) -> Path:
    """The recovery file for ``name`` (one per window if the window uses several names)."""
    safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name) or "recovery"
    folder = Path(directory) if directory is not None else autosave_dir()
    return folder / f"{safe}{SESSION_SUFFIX}"


def write_recovery(
    session: Session, name: str = "recovery", directory: str | os.PathLike[str] | None = None
) -> Path:
    """Write (or replace) the recovery file atomically; absolute paths, no digests (fast)."""
    p = autosave_path(name, directory)
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(
            f"{p.parent}: cannot create the autosave folder ({err.strerror})"
        ) from None
    return save_session(session, p, force=True, digests=False, relative=False)


def read_recovery(
    name: str = "recovery", directory: str | os.PathLike[str] | None = None
) -> LoadedSession | None:
    """The recovery session, or None when there is none."""
    p = autosave_path(name, directory)
    if not p.is_file():
        return None
    return load_session(p, verify=False)


def clear_recovery(name: str = "recovery", directory: str | os.PathLike[str] | None = None) -> bool:
    """Delete the recovery file (after a clean exit); True if there was one."""
    p = autosave_path(name, directory)
    try:
        p.unlink()
    except FileNotFoundError:
        return False
    return True
