"""Region names at a position: a BIDS segmentation image (``dseg``) and its label table.

A user gives a discrete segmentation image on any grid (BIDS ``*_dseg.nii[.gz]``, one
integer label per voxel) and its table (BIDS ``*_dseg.tsv`` with the columns ``index``
and ``name``). The table is found beside the image by its BIDS name (the same name with
``.tsv``, else the ``*_dseg.tsv`` in the same folder whose entities all belong to the
image, the most specific first) or given explicitly.

Looking up a position goes through the affines, never through a resampled copy: a world
position (mm) becomes the atlas voxel ``round(inv(A) @ [x, y, z, 1])`` (nearest
neighbour), so a label is never blended with its neighbours. A position whose nearest
voxel lies outside the atlas grid is "outside the atlas"; label 0 is the background (BIDS:
index 0 is reserved for the background when the table does not name it).

Examples
--------
>>> import numpy as np
>>> atlas = Atlas(None, None, np.array([[[0, 2]]]), np.eye(4), {2: "hand area"})
>>> atlas.region_at((0.0, 0.0, 1.2)).text
'hand area'
>>> atlas.region_at((0.0, 0.0, 0.0)).text
'background'
>>> atlas.region_at((5.0, 0.0, 0.0)).text
'outside the atlas'
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = [
    "Atlas",
    "Region",
    "find_label_table",
    "load_atlas",
    "read_label_table",
]

#: More labels than this in one table is not a segmentation a person reads region by region.
MAX_LABELS = 100_000


@dataclass(frozen=True)
class Region:
    """The atlas answer at one position.

    Attributes
    ----------
    index : int or None
        The label (None outside the atlas grid).
    name : str or None
        The table's name for it (None outside, for the background without a name, or for
        a label the table does not list).
    """

    index: int | None
    name: str | None

    @property
    def text(self) -> str:
        """Words for the readout and reports."""
        if self.index is None:
            return "outside the atlas"
        if self.name:
            return self.name
        if self.index == 0:
            return "background"
        return f"label {self.index} (not in the table)"

    def to_json(self) -> dict:
        """``{"index": ..., "name": ..., "text": ...}`` (index null outside the grid)."""
        return {"index": self.index, "name": self.name, "text": self.text}


@dataclass(eq=False)
class Atlas:
    """A segmentation image with its label table.

    Attributes
    ----------
    path, table_path : Path or None
    labels : ndarray of int
        The integer label of every atlas voxel, shape (X, Y, Z).
    affine : ndarray
        4x4 atlas voxel -> mm (NIfTI-1 rule).
    names : dict of int -> str
    """

    path: Path | None
    table_path: Path | None
    labels: np.ndarray
    affine: np.ndarray
    names: dict[int, str]

    def voxel_of(self, mm: Sequence[float]) -> tuple[int, int, int] | None:
        """The atlas voxel nearest to a world position, or None off the grid.

        >>> a = Atlas(None, None, np.zeros((2, 2, 2), int), np.diag([2.0, 2.0, 2.0, 1.0]), {})
        >>> a.voxel_of((2.9, 0.0, 1.1)), a.voxel_of((-1.1, 0.0, 0.0))
        ((1, 0, 1), None)
        """
        p = np.append(np.asarray(mm, dtype=np.float64).reshape(3), 1.0)
        ijk = (np.linalg.inv(self.affine) @ p)[:3]
        if not np.all(np.isfinite(ijk)):
            return None
        idx = np.floor(ijk + 0.5).astype(np.int64)  # nearest centre; halves go up
        if np.any(idx < 0) or np.any(idx >= np.asarray(self.labels.shape)):
            return None
        return int(idx[0]), int(idx[1]), int(idx[2])

    def region_at(self, mm: Sequence[float]) -> Region:
        """The region at a world position (mm)."""
        ijk = self.voxel_of(mm)
        if ijk is None:
            return Region(None, None)
        index = int(self.labels[ijk])
        return Region(index, self.names.get(index))

    @property
    def name(self) -> str:
        """A short name for messages: the image's file name."""
        return self.path.name if self.path is not None else "atlas"


def read_label_table(path: str | os.PathLike[str]) -> dict[int, str]:
    """Read a BIDS ``dseg.tsv``: the columns ``index`` (integer) and ``name`` (text).

    Other columns (abbreviation, colour, mapping) are allowed and ignored. Each problem is
    one line naming the file, the row (1 = the header) and the column.

    Examples
    --------
    >>> import tempfile
    >>> p = Path(tempfile.mkdtemp()) / "x_dseg.tsv"
    >>> _ = p.write_text("index\\tname\\n1\\thand area\\n2\\thearing area\\n")
    >>> read_label_table(p)
    {1: 'hand area', 2: 'hearing area'}
    >>> _ = p.write_text("index\\tname\\n1\\thand area\\nx\\thearing area\\n")
    >>> read_label_table(p)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    voxelscope.core.errors.InputError: ...x_dseg.tsv: row 3, column index: 'x' is not a whole \
number; each label's index must be an integer (0 is the background)
    """
    from .inputs import excerpt, read_input_text

    path = Path(path).expanduser()
    if not path.exists():
        raise InputError(f"{path}: label table not found; check the path (a BIDS dseg.tsv)")
    text = read_input_text(path, "label table")
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise InputError(f"{path}: the label table is empty; it needs the columns index and name")
    header = [h.strip() for h in lines[0].split("\t")]
    for col in ("index", "name"):
        if col not in header:
            shown = ", ".join(excerpt(h, 20) for h in header[:8])
            raise InputError(
                f"{path}: row 1 (header): no column '{col}' (columns: {shown}); a BIDS "
                "dseg.tsv is tab-separated with the columns index and name"
            )
    i_col, n_col = header.index("index"), header.index("name")
    names: dict[int, str] = {}
    first_row: dict[int, int] = {}
    for row, line in enumerate(lines[1:], start=2):
        cells = line.split("\t")
        if len(cells) != len(header):
            raise InputError(
                f"{path}: row {row} has {len(cells)} tab-separated cells but the header has "
                f"{len(header)}; separate the columns with one tab each"
            )
        cell = cells[i_col].strip()
        try:
            index = int(cell)
        except ValueError:
            raise InputError(
                f"{path}: row {row}, column index: '{excerpt(cell)}' is not a whole number; "
                "each label's index must be an integer (0 is the background)"
            ) from None
        if index < 0:
            raise InputError(
                f"{path}: row {row}, column index: {index} is negative; labels are 0 or more"
            )
        if index in names:
            raise InputError(
                f"{path}: row {row}, column index: {index} is already named in row "
                f"{first_row[index]}; each index appears once"
            )
        name = cells[n_col].strip()
        if not name or name.lower() == "n/a":
            raise InputError(
                f"{path}: row {row}, column name: label {index} has no name; give each label a name"
            )
        names[index] = name
        first_row[index] = row
        if len(names) > MAX_LABELS:
            raise InputError(
                f"{path}: more than {MAX_LABELS} labels; this is not a label table of regions"
            )
    if not names:
        raise InputError(f"{path}: the label table has a header but no labels")
    return names


def find_label_table(image: str | os.PathLike[str]) -> Path | None:
    """The ``dseg.tsv`` of a segmentation image, by its BIDS name (see the module notes).

    Examples
    --------
    >>> import tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> _ = (d / "space-X_atlas-demo_dseg.tsv").write_text("index\\tname\\n1\\ta\\n")
    >>> find_label_table(d / "sub-01_space-X_atlas-demo_dseg.nii.gz").name
    'space-X_atlas-demo_dseg.tsv'
    """
    from .bids import applies_to, parse_name

    image = Path(image)
    name = image.name
    for ext in (".nii.gz", ".nii"):
        if name.lower().endswith(ext):
            same = image.with_name(name[: -len(ext)] + ".tsv")
            if same.is_file():
                return same
            break
    own = parse_name(name)
    if own is None:
        return None
    best: tuple[int, str, Path] | None = None
    try:
        entries = sorted(image.parent.iterdir())
    except OSError:
        return None
    for p in entries:
        if not p.name.endswith("_dseg.tsv") or not p.is_file():
            continue
        cand = parse_name(p.name)
        if cand is None or not applies_to(cand, own):
            continue
        key = (len(cand.entities), p.name, p)
        if best is None or key[0] > best[0]:
            best = key
    return None if best is None else best[2]


def load_atlas(path: str | os.PathLike[str], table: str | os.PathLike[str] | None = None) -> Atlas:
    """Open a segmentation image and its label table.

    Parameters
    ----------
    path : path-like
        A 3D NIfTI image of integer labels (BIDS ``*_dseg.nii[.gz]``), any grid.
    table : path-like, optional
        Its ``dseg.tsv``; default the one found by :func:`find_label_table`.

    Raises
    ------
    InputError
        One line: the image is unreadable, not 3D or not whole numbers, or the table is
        missing or malformed (file, row and column).
    """
    from .images import load_image

    path = Path(path).expanduser()
    table_path = Path(table).expanduser() if table is not None else find_label_table(path)
    if table_path is None:
        raise InputError(
            f"{path}: no label table beside the atlas (a BIDS dseg.tsv with the columns index "
            "and name, named like the image)",
            file=path,
            remedy="atlas_labels",
        )
    names = read_label_table(table_path)
    img = load_image(path, what="atlas")
    data = img.data
    finite = np.isfinite(data)
    if not finite.all() or not np.array_equal(data[finite], np.round(data[finite])):
        raise InputError(
            f"{path}: the atlas holds values that are not whole numbers; give a segmentation "
            "(one integer label per voxel, BIDS dseg), not a probability or intensity map"
        )
    return Atlas(path, table_path, data.astype(np.int64), img.affine, names)
