"""voxelscope: inspect a first-level fMRI model one voxel at a time.

The :mod:`voxelscope.core` package is a plain numpy/scipy/nibabel library (no Qt);
:mod:`voxelscope.gui` and :mod:`voxelscope.cli` are thin front ends on it.

Research software: not for clinical diagnosis. Local regulations and licensed
clinical practice come first.
"""

__version__ = "0.1.0"

RESEARCH_CAUTION = (
    "voxelscope is research software. It is not a medical device and is not for clinical "
    "diagnosis or treatment decisions; local regulations and licensed clinical practice "
    "come first."
)
