"""Acquisition timing of a run: the TR and where in each TR the regressors are sampled.

The TR comes from, in order: the ``tr`` argument; the BIDS sidecar (``RepetitionTime``
in the ``.json`` named after the run); the header (``pixdim[4]`` in the unit given by
``xyzt_units``: seconds, milliseconds or microseconds). A header TR above
:data:`MS_THRESHOLD_S` "seconds" is read as milliseconds, with a warning; a TR still
outside :data:`PLAUSIBLE_TR_S` is an :class:`~voxelscope.core.errors.InputError` asking
for the TR. When sidecar and header disagree, the sidecar wins and a warning says so.

``SliceTiming`` (sidecar, seconds) sets the reference time within each TR at which the
model's regressors are sampled (:func:`sampling_reference`): the median slice acquisition
time, so the sampled regressor is closest to the timing of the typical slice. Without
``SliceTiming`` it is 0.0 (the start of each volume's acquisition).

Examples
--------
>>> sampling_reference({}, {}, 2.0, np.array([0.0, 1.0, 0.5]))
(0.5, 'median SliceTiming 0.5 s')
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from voxelscope.core.companions import read_sidecar
from voxelscope.core.errors import InputError

__all__ = ["MS_THRESHOLD_S", "PLAUSIBLE_TR_S", "resolve_tr", "sampling_reference"]

#: A header TR above this many seconds is taken to be milliseconds (with a warning).
MS_THRESHOLD_S = 100.0
#: TRs (seconds) we accept from a header or sidecar: outside this range we ask for ``--tr``.
PLAUSIBLE_TR_S = (0.01, 100.0)

_TIME_FACTORS = {"sec": 1.0, "unknown": 1.0, "msec": 1e-3, "usec": 1e-6}


@dataclass
class _HeaderTR:
    value: float | None  # seconds, usable
    problem: str | None  # why the header TR cannot be used
    note: str | None  # warning when it is used


def _header_tr(path: Path, header: Any) -> _HeaderTR:
    raw = float(header["pixdim"][4])
    unit = header.get_xyzt_units()[1]
    where = f"header TR (pixdim[4] = {raw:g}, xyzt_units time unit '{unit}')"
    if unit not in _TIME_FACTORS:
        return _HeaderTR(None, f"the {where} is not a time", None)
    if not math.isfinite(raw) or raw <= 0:
        return _HeaderTR(None, f"the {where} gives no TR", None)
    value = raw * _TIME_FACTORS[unit]
    note = None
    if unit in ("sec", "unknown") and value > MS_THRESHOLD_S:
        value = raw / 1000.0
        note = (
            f"{path}: the {where} says {raw:g} s, which is implausible; reading it as "
            f"{raw:g} ms = {value:g} s (give the TR to override it)"
        )
    lo, hi = PLAUSIBLE_TR_S
    if not lo <= value <= hi:
        return _HeaderTR(None, f"the {where} gives an implausible TR of {value:g} s", None)
    return _HeaderTR(value, None, note)


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def resolve_tr(
    path: Path,
    header: Any,
    tr: float | None = None,
    sidecar: Path | None = None,
    n_slices: int | None = None,
    meta: dict[str, Any] | None = None,
    origin: dict[str, Path] | None = None,
) -> tuple[float, str, np.ndarray | None, list[str]]:
    """Decide the TR of a run and read its slice timing.

    Parameters
    ----------
    path : Path
        The run (for messages).
    header : nibabel header
    tr : float, optional
        Explicit TR in seconds; wins over everything.
    sidecar : Path, optional
        BIDS JSON sidecar (``RepetitionTime``, ``SliceTiming``, seconds).
    n_slices : int, optional
        Expected length of ``SliceTiming``.
    meta, origin : dict, optional
        The merged sidecar fields (BIDS inheritance, see
        :func:`voxelscope.core.companions.merge_sidecars`) and the file each came from;
        when given, ``sidecar`` is not read again.

    Returns
    -------
    tr : float
        Seconds.
    source : str
        ``"argument"``, ``"sidecar"`` or ``"header"``.
    slice_timing : ndarray or None
        Seconds, one per slice.
    warnings : list of str

    Raises
    ------
    InputError
        No usable TR anywhere, an implausible TR, or an unreadable sidecar.
    """
    notes: list[str] = []
    if meta is None:
        meta = read_sidecar(sidecar) if sidecar is not None else {}
    origin = dict(origin or {})

    def where(key: str) -> Path | None:
        return origin.get(key, sidecar)

    head = _header_tr(path, header)
    lo, hi = PLAUSIBLE_TR_S

    if tr is not None:
        value = _number(tr)
        if value is None or value <= 0:
            raise InputError(
                f"{path}: TR {tr!r} must be a positive number of seconds",
                file=path,
                field="TR",
                value=tr,
                remedy="tr",
            )
        if value > MS_THRESHOLD_S:
            raise InputError(
                f"{path}: TR {value:g} s is implausible", file=path, field="TR", value=value,
                remedy="tr",
            )  # fmt: skip
        chosen, source = value, "argument"
    elif "RepetitionTime" in meta:
        value = _number(meta["RepetitionTime"])
        if value is None or not lo <= value <= hi:
            raise InputError(
                f"{where('RepetitionTime')}: RepetitionTime {meta['RepetitionTime']!r} is not "
                f"a plausible TR in seconds (BIDS); fix the sidecar or give the TR",
                file=where("RepetitionTime"),
                field="RepetitionTime",
                value=meta["RepetitionTime"],
                remedy="tr",
            )
        chosen, source = value, "sidecar"
        if head.value is not None and abs(head.value - value) > 1e-3 * max(value, 1.0):
            notes.append(
                f"{path}: TR differs between the sidecar ({value:g} s, "
                f"{where('RepetitionTime').name}) and the header ({head.value:g} s); "
                f"using the sidecar"
            )
    elif head.value is not None:
        chosen, source = head.value, "header"
        if head.note:
            notes.append(head.note)
    else:
        where = f"; no RepetitionTime in {sidecar.name}" if sidecar is not None else ""
        raise InputError(
            f"{path}: no usable TR: {head.problem}{where}", file=path, field="TR", remedy="tr"
        )

    timing = None
    if "SliceTiming" in meta and meta.get("SliceTimingCorrected") is not True:
        timing = _slice_timing(where("SliceTiming"), meta["SliceTiming"], chosen, n_slices, notes)
    return chosen, source, timing, notes


def sampling_reference(
    meta: dict[str, Any],
    origin: dict[str, Path],
    tr: float,
    timing: np.ndarray | None,
) -> tuple[float, str]:
    """The time within each TR at which regressors are sampled, and why.

    BIDS (derivatives, preprocessed BOLD sidecars): when ``SliceTimingCorrected`` is true,
    every slice was interpolated to ``StartTime`` seconds after the start of the volume's
    acquisition, so that is the reference, and raw ``SliceTiming`` no longer describes the
    data (it is set aside). Otherwise, with a usable ``SliceTiming`` (one value per slice
    of the grid), the median slice time; otherwise 0, the start of each volume.

    Returns
    -------
    reference_time_s : float
    source : str
        Plain words for the status line and the table output.

    Raises
    ------
    InputError
        ``StartTime`` not a number, negative, or not below the TR.

    Examples
    --------
    >>> sampling_reference({"SliceTimingCorrected": True, "StartTime": 0.975}, {}, 2.0, None)
    (0.975, 'StartTime 0.975 s (slice-time corrected)')
    >>> sampling_reference({}, {}, 2.0, np.array([0.0, 1.0, 0.5]))
    (0.5, 'median SliceTiming 0.5 s')
    >>> sampling_reference({}, {}, 2.0, None)
    (0.0, 'start of each volume')
    """
    corrected = meta.get("SliceTimingCorrected") is True
    set_aside = "; SliceTiming set aside" if corrected and "SliceTiming" in meta else ""
    if corrected and "StartTime" in meta:
        where = origin.get("StartTime", "the sidecar")
        value = _number(meta["StartTime"])
        if value is None or not 0.0 <= value < tr:
            raise InputError(
                f"{where}: StartTime {meta['StartTime']!r} must be a number of seconds from 0 "
                f"up to but not including the TR ({tr:g} s) (BIDS); fix the sidecar"
            )
        return value, f"StartTime {value:g} s (slice-time corrected{set_aside})"
    if corrected:
        return 0.0, f"start of each volume (slice-time corrected, no StartTime{set_aside})"
    if timing is not None:
        ref = float(np.median(timing))
        return ref, f"median SliceTiming {ref:g} s"
    return 0.0, "start of each volume"


def _slice_timing(
    sidecar: Path | None, value: Any, tr: float, n_slices: int | None, notes: list[str]
) -> np.ndarray | None:
    nums = [_number(v) for v in value] if isinstance(value, list) else [None]
    if not nums or any(v is None for v in nums):
        notes.append(f"{sidecar}: SliceTiming is not a list of numbers; ignored")
        return None
    timing = np.asarray(nums, dtype=np.float64)
    if n_slices is not None and timing.size != n_slices:
        notes.append(
            f"{sidecar}: SliceTiming has {timing.size} values but the run has {n_slices} "
            f"slices; ignored"
        )
        return None
    if timing.min() < 0 or timing.max() >= tr:
        notes.append(
            f"{sidecar}: SliceTiming values must lie in [0, TR = {tr:g} s) (seconds, BIDS); ignored"
        )
        return None
    return timing
