"""The one bounded reader for text inputs, and safe quoting of what was read.

Every text input (events, confounds, sidecars, sessions, marks) is read here:

- the size is checked before reading (a regular file larger than the limit is refused with
  its size; a device such as ``/dev/zero`` is refused; anything else is read at most up to
  the limit, so an endless stream cannot fill memory);
- the file is noted as an input of the command (:mod:`voxelscope.core.outputs`), so no output
  can be written over it;
- the bytes are decoded as UTF-8 (a BOM is dropped); UTF-16/UTF-32 text, Latin-1 /
  Windows-1252 text and binary data each get one line that says what to do;
- JSON is parsed with a nesting limit.

Error messages never quote more of a file than :func:`excerpt` allows: a short, printable
piece. :func:`printable` strips control characters from anything going to a terminal.

Examples
--------
>>> import tempfile, pathlib
>>> p = pathlib.Path(tempfile.mkdtemp()) / "m.tsv"
>>> read_input_bytes(p, "marks")
Traceback (most recent call last):
...
voxelscope.core.errors.InputError: ...m.tsv: marks file not found; check the path
>>> _ = p.write_bytes("caf\\xe9\\n".encode("latin-1"))
>>> read_input_text(p, "marks")
Traceback (most recent call last):
...
voxelscope.core.errors.InputError: ...m.tsv: the marks file is not UTF-8 text (byte 0xe9 ...
>>> excerpt("a\\x1b[31mred" + "x" * 100, 12)
'a?[31mredxxx…'
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path
from typing import Any

from .errors import InputError
from .outputs import DOCUMENT_KINDS, note_input

__all__ = [
    "DEFAULT_TEXT_LIMIT",
    "EXCERPT_CHARS",
    "JSON_MAX_DEPTH",
    "TEXT_LIMITS",
    "decode_text",
    "excerpt",
    "format_size",
    "parse_json",
    "printable",
    "read_input_bytes",
    "read_input_text",
]

#: Largest text input read by default (bytes).
DEFAULT_TEXT_LIMIT = 64 * 1024**2
#: Per kind of file, when it differs from the default.
TEXT_LIMITS = {
    "confounds": 256 * 1024**2,
    "session": 256 * 1024**2,
    "sidecar": 16 * 1024**2,
}
#: Longest piece of a file quoted in an error message.
EXCERPT_CHARS = 40
#: Deepest nesting of JSON arrays and objects accepted in sidecars and sessions.
JSON_MAX_DEPTH = 64


def format_size(n: int) -> str:
    """Bytes in words.

    >>> format_size(1536), format_size(3 * 1024**3)
    ('1.5 KiB', '3.0 GiB')
    """
    value = float(n)
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB"):
        if value < 1024 or unit == "TiB":
            return f"{int(value)} bytes" if unit == "bytes" else f"{value:.1f} {unit}"
        value /= 1024
    return f"{n} bytes"  # pragma: no cover


def printable(text: Any, keep_newlines: bool = False) -> str:
    """``text`` with every control or format character (escape sequences, bidi overrides,
    NUL, ...) replaced by ``?``; tabs become spaces.

    >>> printable("ok\\x1b]0;pwned\\x07 \\u202efdp.exe")
    'ok?]0;pwned? ?fdp.exe'
    >>> printable("a\\nb", keep_newlines=True)
    'a\\nb'
    """
    out = []
    for ch in str(text):
        if ch == "\t":
            out.append(" ")
        elif ch == "\n" and keep_newlines:
            out.append(ch)
        elif ch.isprintable():
            out.append(ch)
        else:
            out.append("?")
    return "".join(out)


def excerpt(text: Any, limit: int = EXCERPT_CHARS) -> str:
    """A short, printable piece of ``text`` for an error message (``…`` when cut).

    >>> excerpt("tap - tone"), excerpt("x" * 100, 5)
    ('tap - tone', 'xxxxx…')
    """
    s = str(text)
    cut = len(s) > limit
    s = printable(s[:limit])
    return s + "…" if cut else s


def _a(word: str) -> str:
    """``word`` with its indefinite article ("an events", "a session")."""
    return f"an {word}" if word[:1].lower() in "aeiou" else f"a {word}"


def _limit_for(what: str, limit: int | None) -> int:
    if limit is not None:
        return int(limit)
    return TEXT_LIMITS.get(what, DEFAULT_TEXT_LIMIT)


def read_input_bytes(
    path: str | os.PathLike[str], what: str, limit: int | None = None, kind: str | None = None
) -> bytes:
    """The file's bytes, at most ``limit``; ``what`` names the kind of file in messages.

    Parameters
    ----------
    path : path-like
    what : str
        ``"events"``, ``"confounds"``, ``"sidecar"``, ``"session"``, ``"marks"``, ...
    limit : int, optional
        Largest size accepted (default :data:`TEXT_LIMITS` or :data:`DEFAULT_TEXT_LIMIT`).
    kind : str, optional
        How the file is noted as an input: ``"data"``, or ``"session"``/``"marks"``
        (documents that may be saved back over themselves). Default: from ``what``.

    Raises
    ------
    InputError
        Missing, a folder, a device, unreadable (permission), or larger than the limit.
    """
    p = Path(path).expanduser()
    cap = _limit_for(what, limit)
    try:
        fh = open(p, "rb")
    except FileNotFoundError:
        raise InputError(f"{p}: {what} file not found; check the path") from None
    except IsADirectoryError:
        raise InputError(f"{p} is a folder, not {_a(what)} file; give the file's path") from None
    except PermissionError:
        raise InputError(
            f"{p}: the {what} file is unreadable (permission denied); check its permissions"
        ) from None
    except OSError as err:
        raise InputError(f"{p}: cannot read the {what} file ({err.strerror})") from None
    with fh:
        try:
            st = os.fstat(fh.fileno())
            if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode):
                raise InputError(f"{p} is a device, not {_a(what)} file; give a text file")
            if stat.S_ISDIR(st.st_mode):
                raise InputError(f"{p} is a folder, not {_a(what)} file; give the file's path")
            if stat.S_ISREG(st.st_mode) and st.st_size > cap:
                raise InputError(
                    f"{p}: the {what} file is {format_size(st.st_size)}, more than the "
                    f"{format_size(cap)} {_a(what)} file may have; check that it is the right file"
                )
            data = fh.read(cap + 1)
        except IsADirectoryError:
            raise InputError(
                f"{p} is a folder, not {_a(what)} file; give the file's path"
            ) from None
        except OSError as err:
            raise InputError(f"{p}: cannot read the {what} file ({err.strerror})") from None
    if len(data) > cap:
        raise InputError(
            f"{p}: the {what} file is larger than the {format_size(cap)} {_a(what)} file may "
            "have; check that it is the right file"
        )
    if kind is None:
        kind = what if what in DOCUMENT_KINDS else "data"
    note_input(p, kind)
    return data


def _line_of(data: bytes, pos: int) -> int:
    return data.count(b"\n", 0, pos) + 1


def decode_text(data: bytes, source: str, what: str) -> str:
    """UTF-8 text of ``data`` (BOM dropped), or one line saying which encoding to use.

    >>> decode_text("\\ufeffonset".encode("utf-8"), "e.tsv", "events")
    'onset'
    >>> decode_text("onset".encode("utf-16"), "e.tsv", "events")
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: e.tsv: the events file is UTF-16 text; save it as UTF-8 ...
    """
    if data.startswith((b"\xff\xfe\x00\x00", b"\x00\x00\xfe\xff")):
        raise InputError(
            f"{source}: the {what} file is UTF-32 text; save it as UTF-8 (plain text) and try again"
        )
    head = data[:4096]
    half = max(len(head) // 2, 1)
    looks_utf16 = len(head) >= 4 and max(head[0::2].count(0), head[1::2].count(0)) > 0.4 * half
    if data.startswith((b"\xff\xfe", b"\xfe\xff")) or looks_utf16:
        raise InputError(
            f"{source}: the {what} file is UTF-16 text; save it as UTF-8 (plain text) and try again"
        )
    nul = data.find(b"\x00")
    if nul >= 0:
        raise InputError(
            f"{source}: the {what} file holds binary data (a NUL byte at line "
            f"{_line_of(data, nul)}), not text; give the right file"
        )
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as err:
        bad = data[err.start]
        try:
            data.decode("cp1252")
            guess = "it looks like Latin-1 / Windows-1252 text"
        except UnicodeDecodeError:
            guess = "it may be in another encoding"
        raise InputError(
            f"{source}: the {what} file is not UTF-8 text (byte 0x{bad:02x} at line "
            f"{_line_of(data, err.start)}); {guess}: save it as UTF-8"
        ) from None


def read_input_text(
    path: str | os.PathLike[str], what: str, limit: int | None = None, kind: str | None = None
) -> str:
    """The file as UTF-8 text, through :func:`read_input_bytes` and :func:`decode_text`."""
    data = read_input_bytes(path, what, limit=limit, kind=kind)
    return decode_text(data, str(Path(path).expanduser()), what)


def _depth_exceeds(text: str, max_depth: int) -> bool:
    """Whether brackets outside strings nest deeper than ``max_depth`` (a linear scan)."""
    depth = 0
    in_string = False
    escaped = False
    for ch in text:
        if in_string:
            if escaped:
                escaped = False
            elif ch == "\\":
                escaped = True
            elif ch == '"':
                in_string = False
        elif ch == '"':
            in_string = True
        elif ch in "[{":
            depth += 1
            if depth > max_depth:
                return True
        elif ch in "]}":
            depth -= 1
    return False


def parse_json(text: str, source: str, what: str, max_depth: int = JSON_MAX_DEPTH) -> Any:
    """Parse JSON text; nesting deeper than ``max_depth`` and bad JSON are one line each.

    NaN and Infinity are not JSON and are refused.

    >>> parse_json('{"a": [1, 2]}', "s.json", "session")
    {'a': [1, 2]}
    >>> parse_json("[" * 100 + "]" * 100, "s.json", "session")
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: s.json: the session file nests deeper than 64 levels; ...
    """
    # cheap pre-check: only texts with that many brackets can nest that deep
    if (text.count("[") + text.count("{")) > max_depth and _depth_exceeds(text, max_depth):
        raise InputError(
            f"{source}: the {what} file nests deeper than {max_depth} levels; it is not a "
            f"valid {what} file"
        )

    def _no_constants(name: str) -> Any:
        raise ValueError(f"{name} is not a JSON number")

    try:
        return json.loads(text, parse_constant=_no_constants)
    except json.JSONDecodeError as err:
        raise InputError(
            f"{source}: the {what} is not valid JSON (line {err.lineno}, column "
            f"{err.colno}: {err.msg}); fix it or save it again"
        ) from None
    except (ValueError, RecursionError) as err:
        raise InputError(
            f"{source}: the {what} is not valid JSON ({excerpt(err, 60)}); fix it"
        ) from None
