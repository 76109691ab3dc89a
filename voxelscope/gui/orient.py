"""Display layout of a voxel grid: the array flipped and permuted into an R-A-S layout.

Whatever the storage order of a run (L-A-S, R-A-S, P-I-R, ...), the Slices show it the
same way: display axis 0 runs towards the subject's right (R), axis 1 towards anterior
(A), axis 2 towards superior (S). The flips and the permutation come from
:func:`nibabel.orientations.io_orientation` of the affine (nearest axis-aligned
orientation), so an oblique run is shown in its closest R-A-S layout. Clicks are mapped
back through the very same transform, so the voxel selected is the voxel the affine puts
under the mouse.

This module has no Qt; it is plain numpy and nibabel.

Examples
--------
>>> import numpy as np
>>> las = np.diag([-4.0, 4.0, 8.0, 1.0])
>>> g = DisplayGrid((17, 21, 3), las)
>>> g.to_display((0, 0, 0))
(16, 0, 0)
>>> g.to_voxel((16, 0, 0))
(0, 0, 0)
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from nibabel.orientations import apply_orientation, axcodes2ornt, io_orientation, ornt_transform

__all__ = ["DISPLAY_CODES", "DisplayGrid"]

#: Axis codes of the display layout (positive end of each display axis).
DISPLAY_CODES = ("R", "A", "S")
_NEGATIVE = {"R": "L", "A": "P", "S": "I"}


class DisplayGrid:
    """Flips and permutation between a voxel grid and its R-A-S display layout.

    Parameters
    ----------
    shape : sequence of 3 int
        Voxel grid (X, Y, Z) as stored.
    affine : ndarray
        4x4 voxel -> mm.

    Attributes
    ----------
    transform : ndarray (3, 2)
        nibabel orientation transform from storage to display layout.
    source_axis : tuple of 3 int
        Storage axis shown along each display axis.
    flipped : tuple of 3 bool
        Whether that storage axis runs backwards on the display.
    display_shape : tuple of 3 int
    display_voxel_mm : tuple of 3 float
        Voxel size along each display axis (for the pixel aspect ratio).
    """

    def __init__(self, shape: Sequence[int], affine: np.ndarray) -> None:
        self.shape = tuple(int(n) for n in shape[:3])
        self.affine = np.asarray(affine, dtype=float)
        ornt = io_orientation(self.affine)
        self.transform = ornt_transform(ornt, axcodes2ornt(DISPLAY_CODES))
        src = [0, 0, 0]
        flip = [False, False, False]
        for axis, (target, sign) in enumerate(self.transform):
            src[int(target)] = axis
            flip[int(target)] = bool(sign < 0)
        self.source_axis = tuple(src)
        self.flipped = tuple(flip)
        self.display_shape = tuple(self.shape[a] for a in self.source_axis)
        sizes = np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))
        self.display_voxel_mm = tuple(float(sizes[a]) for a in self.source_axis)

    def display(self, volume: np.ndarray) -> np.ndarray:
        """A 3D array in display layout (a view where possible, not a copy)."""
        return apply_orientation(np.asarray(volume), self.transform)

    def to_display(self, ijk: Sequence[int]) -> tuple[int, int, int]:
        """Display indices of a stored voxel."""
        out = []
        for d in range(3):
            a = self.source_axis[d]
            v = int(ijk[a])
            out.append(self.shape[a] - 1 - v if self.flipped[d] else v)
        return tuple(out)  # type: ignore[return-value]

    def to_voxel(self, dijk: Sequence[int]) -> tuple[int, int, int]:
        """Stored voxel indices of a display position."""
        out = [0, 0, 0]
        for d in range(3):
            a = self.source_axis[d]
            v = int(dijk[d])
            out[a] = self.shape[a] - 1 - v if self.flipped[d] else v
        return tuple(out)  # type: ignore[return-value]

    def display_affine(self) -> np.ndarray:
        """4x4 matrix from display indices to world mm (the affine of the display layout).

        >>> g = DisplayGrid((4, 5, 6), np.diag([-2.0, 3.0, 4.0, 1.0]))
        >>> g.display_affine() @ [0, 0, 0, 1]  # display voxel 0 is the stored voxel 3 on x
        array([-6.,  0.,  0.,  1.])
        """
        to_storage = np.zeros((4, 4))
        to_storage[3, 3] = 1.0
        for d in range(3):
            a = self.source_axis[d]
            if self.flipped[d]:
                to_storage[a, d] = -1.0
                to_storage[a, 3] = self.shape[a] - 1
            else:
                to_storage[a, d] = 1.0
        return self.affine @ to_storage

    def clamp_display(self, dijk: Sequence[int]) -> tuple[int, int, int]:
        """Display indices clipped into the grid."""
        return tuple(  # type: ignore[return-value]
            int(min(max(int(v), 0), n - 1)) for v, n in zip(dijk, self.display_shape)
        )

    @staticmethod
    def letters(display_axis: int) -> tuple[str, str]:
        """(negative end, positive end) letters of a display axis, e.g. ("L", "R")."""
        pos = DISPLAY_CODES[display_axis]
        return _NEGATIVE[pos], pos
