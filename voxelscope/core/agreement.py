"""Agreement of our map with an outside map, and plain statements of why they differ.

An outside map ("theirs", e.g. a t map from an earlier pipeline) is brought onto the run's
grid with :func:`voxelscope.core.images.load_on_grid` and compared with ours over the
voxels where both are defined (and inside the mask):

* Pearson correlation ``r``;
* the slope of ``theirs ~ ours`` by ordinary least squares and by a robust (Huber) fit:
  a slope far from 1 at high ``r`` is a pure scale factor;
* a boolean map of the voxels where ``|theirs - ours|`` exceeds a tolerance;
* the two values at any voxel.

:func:`explain` recomputes our map under the alternatives the tool can test (every other
kernel, onsets shifted by -1 and +1 TR, the other noise model) and reports the one that
raises the correlation most, in one plain sentence.

Robust fit
----------
Iteratively reweighted least squares with Huber's weights (tuning constant 1.345) and the
scale re-estimated each pass as ``median(|residual|) / 0.6745``, starting from the OLS fit
and stopping when the summed Huber criterion changes by less than 1e-8 (the defaults of
``statsmodels.robust.robust_linear_model.RLM`` with ``HuberT``).

Examples
--------
>>> rng = np.random.default_rng(0)
>>> ours = rng.standard_normal((6, 6, 4))
>>> a = compare_maps(ours, 2.0 * ours + 0.5)
>>> round(a.r, 6), round(a.slope, 6), round(a.intercept, 6)
(1.0, 2.0, 0.5)
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .diagnostics import pearson_r
from .errors import InputError
from .hrf import DEFAULT_KERNELS
from .jsonsafe import finite_or_none
from .maps import MapResult, compute_map
from .model import Analysis, ModelSettings
from .numfmt import format_seconds, format_value

__all__ = [
    "Agreement",
    "Alternative",
    "Explanation",
    "compare_maps",
    "explain",
    "huber_fit",
    "load_their_map",
]

_HUBER_K = 1.345
_MAD_C = 0.6744897501960817  # norm.ppf(0.75)


def huber_fit(
    x: np.ndarray, y: np.ndarray, tol: float = 1e-8, max_iter: int = 50
) -> tuple[float, float]:
    """Robust straight line ``y ~ a + b x`` (Huber IRLS); returns ``(intercept, slope)``.

    Examples
    --------
    >>> x = np.arange(20.0); y = 3 * x + 1; y[5] = 500.0
    >>> [round(v, 3) for v in huber_fit(x, y)]
    [1.0, 3.0]
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    y = np.asarray(y, dtype=np.float64).ravel()
    X = np.column_stack([np.ones_like(x), x])
    coef = np.linalg.lstsq(X, y, rcond=None)[0]
    resid = y - X @ coef
    scale = float(np.median(np.abs(resid)) / _MAD_C)
    if scale <= 0 or not np.isfinite(scale):
        return float(coef[0]), float(coef[1])

    def criterion(r: np.ndarray, s: float) -> float:
        u = np.abs(r / s)
        return float(np.sum(np.where(u <= _HUBER_K, 0.5 * u * u, _HUBER_K * u - 0.5 * _HUBER_K**2)))

    prev = criterion(resid, scale)
    for _ in range(max_iter):
        u = np.abs(resid / scale)
        w = np.where(u <= _HUBER_K, 1.0, _HUBER_K / np.maximum(u, 1e-300))
        sw = np.sqrt(w)
        coef = np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)[0]
        resid = y - X @ coef
        new_scale = float(np.median(np.abs(resid)) / _MAD_C)
        if new_scale <= 0:
            break
        scale = new_scale
        crit = criterion(resid, scale)
        if abs(crit - prev) <= tol:
            break
        prev = crit
    return float(coef[0]), float(coef[1])


@dataclass(frozen=True, eq=False)
class Agreement:
    """How well two maps on the same grid agree.

    Attributes
    ----------
    n_voxels : int
        Voxels compared (inside the mask, finite in both maps).
    r : float
        Pearson correlation (NaN with fewer than 3 voxels or a constant map).
    slope, intercept : float
        OLS fit ``theirs = intercept + slope * ours``.
    robust_slope, robust_intercept : float
        The same line by a Huber fit.
    tolerance : float
    disagree : ndarray of bool (X, Y, Z)
        Compared voxels where ``|theirs - ours| > tolerance``.
    region : ndarray of bool (X, Y, Z)
        The compared voxels.
    ours, theirs : ndarray (X, Y, Z)
    """

    n_voxels: int
    r: float
    slope: float
    intercept: float
    robust_slope: float
    robust_intercept: float
    tolerance: float
    disagree: np.ndarray
    region: np.ndarray
    ours: np.ndarray
    theirs: np.ndarray

    @property
    def n_disagree(self) -> int:
        return int(np.count_nonzero(self.disagree))

    def value_at(self, ijk: Sequence[int]) -> tuple[float | None, float | None, bool]:
        """``(ours, theirs, compared)`` at a voxel; None where a map has no value.

        Examples
        --------
        >>> a = compare_maps(np.arange(8.0).reshape(2, 2, 2), np.ones((2, 2, 2)))
        >>> a.value_at((1, 1, 1))
        (7.0, 1.0, True)
        """
        i, j, k = (int(v) for v in ijk)
        if not all(0 <= a < n for a, n in zip((i, j, k), self.region.shape)):
            raise InputError(
                f"voxel ({i}, {j}, {k}) is outside the grid {'x'.join(map(str, self.region.shape))}"
            )

        ours, theirs = self.ours[i, j, k], self.theirs[i, j, k]
        return finite_or_none(ours), finite_or_none(theirs), bool(self.region[i, j, k])

    def describe(self) -> str:
        """One line with r, the slopes and the count of disagreeing voxels."""
        return (
            f"r {format_value('r', self.r)} over {self.n_voxels} voxels; theirs = "
            f"{format_value('value', self.slope)} x ours "
            f"{'+' if self.intercept >= 0 else '-'} "
            f"{format_value('value', abs(self.intercept))} "
            f"(robust slope {format_value('value', self.robust_slope)}); "
            f"{self.n_disagree} voxels differ by more than {self.tolerance:g}"
        )


def load_their_map(
    path: str | os.PathLike[str], run: Any, warnings: list[str] | None = None
) -> np.ndarray:
    """An outside map resampled (linearly) onto the run's grid; NaN where it has no data."""
    from .images import load_on_grid

    return load_on_grid(path, run, order=1, warnings=warnings)


def _as_array(m: Any, stat: str) -> tuple[np.ndarray, np.ndarray | None]:
    if isinstance(m, MapResult):
        return np.asarray(m.stat(stat), dtype=np.float64), m.mask
    return np.asarray(m, dtype=np.float64), None


def compare_maps(
    ours: np.ndarray | MapResult,
    theirs: np.ndarray,
    mask: np.ndarray | None = None,
    tolerance: float = 1.0,
    stat: str = "t",
) -> Agreement:
    """Compare our map with theirs over a mask.

    Parameters
    ----------
    ours : ndarray (X, Y, Z) or MapResult
        With a MapResult, its ``stat`` map and its mask are used.
    theirs : ndarray (X, Y, Z)
        Already on our grid (see :func:`load_their_map`); NaN where undefined.
    mask : ndarray of bool, optional
        Voxels to compare (intersected with the MapResult's mask and finite values).
    tolerance : float
        Absolute difference above which a voxel counts as disagreeing.
    stat : str
        Statistic of a MapResult to compare.

    Returns
    -------
    Agreement
    """
    a, own_mask = _as_array(ours, stat)
    b = np.asarray(theirs, dtype=np.float64)
    if a.shape != b.shape or a.ndim != 3:
        raise InputError(
            f"their map has shape {b.shape} but ours has {a.shape}; resample it onto the "
            "run's grid first"
        )
    if not (tolerance >= 0 and math.isfinite(tolerance)):
        raise InputError(f"the agreement tolerance must be a number >= 0, not {tolerance!r}")
    region = np.isfinite(a) & np.isfinite(b)
    if own_mask is not None:
        region &= own_mask
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != a.shape:
            raise InputError(f"the mask has shape {m.shape} but the maps have {a.shape}")
        region &= m
    x, y = a[region], b[region]
    n = int(x.size)
    r = slope = intercept = rslope = rintercept = float("nan")
    if n >= 3 and np.ptp(x) > 0:
        xc, yc = x - x.mean(), y - y.mean()
        sxx, sxy = float(xc @ xc), float(xc @ yc)
        slope = sxy / sxx
        intercept = float(y.mean() - slope * x.mean())
        r = pearson_r(x, y)
        rintercept, rslope = huber_fit(x, y)
    disagree = region & (np.abs(np.where(region, a - b, 0.0)) > tolerance)
    return Agreement(
        n_voxels=n,
        r=float(r),
        slope=float(slope),
        intercept=float(intercept),
        robust_slope=float(rslope),
        robust_intercept=float(rintercept),
        tolerance=float(tolerance),
        disagree=disagree,
        region=region,
        ours=a,
        theirs=b,
    )


@dataclass(frozen=True)
class Alternative:
    """Our map recomputed under one changed setting, and its agreement with theirs.

    ``kind`` is ``"as given"``, ``"kernel"``, ``"shift"``, ``"noise"`` or ``"confounds"``.
    ``round`` is the search round (0 for the model as given); from round 2 on, each change
    is made on top of the changes kept before, named in ``builds_on``.
    """

    kind: str
    label: str
    kernel: str
    settings: ModelSettings
    r: float
    slope: float
    round: int = 0
    builds_on: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class Explanation:
    """The outcome of :func:`explain`.

    Attributes
    ----------
    baseline : Agreement
        Our map as given against theirs.
    alternatives : tuple of Alternative
        Every recomputation, the given model first.
    best : Alternative
        The highest correlation (the given model when nothing beats it).
    statement : str
        One or two plain sentences for the user.
    """

    baseline: Agreement
    alternatives: tuple[Alternative, ...]
    best: Alternative
    statement: str


def _fmt_s(v: float) -> str:
    return format_seconds(v, signed=True)


def _improves(r_base: float, r_best: float, min_gain: float) -> bool:
    """A clear gain: r rises by ``min_gain``, or the unexplained share 1 - r^2 halves."""
    if not math.isfinite(r_best):
        return False
    if not math.isfinite(r_base):
        return True
    if r_best - r_base >= min_gain:
        return True
    return r_best > r_base + 1e-3 and (1 - r_best**2) <= 0.5 * (1 - r_base**2)


def _fmt_pair(a: float, b: float) -> tuple[str, str]:
    """Both numbers (r) with the fewest decimals (3, the one rule of core/numfmt.py, or 4)
    that tell them apart."""
    for d in (3, 4):
        if f"{a:.{d}f}" != f"{b:.{d}f}":
            break
    return f"{a:.{d}f}", f"{b:.{d}f}"


def _scale_note(slope: float, r: float) -> str | None:
    if math.isfinite(slope) and math.isfinite(r) and r >= 0.9 and abs(slope - 1.0) > 0.05:
        return (
            f"their values are about {format_value('value', slope)} times ours, a pure scale "
            "factor (another statistic, e.g. the contrast estimate instead of t, or another "
            "variance estimate)"
        )
    return None


def _candidate_plans(
    analysis: Analysis,
    settings: ModelSettings,
    kernel: str,
    kernels: Sequence[str],
    shifts_s: Sequence[float],
    other_noise: bool,
    skip: set[str],
) -> list[tuple[str, str, str, ModelSettings]]:
    """One-change alternatives to (kernel, settings), leaving out the kinds in ``skip``."""
    plans: list[tuple[str, str, str, ModelSettings]] = []
    if "kernel" not in skip:
        for k in kernels:
            if k != kernel:
                plans.append(("kernel", f"the {k} kernel is used", k, settings))
    if "shift" not in skip:
        for sh in shifts_s:
            if sh != 0:
                shifted = settings.with_(onset_shift_s=settings.onset_shift_s + float(sh))
                plans.append(
                    ("shift", f"onsets are shifted by {_fmt_s(float(sh))}", kernel, shifted)
                )
    if "noise" not in skip and other_noise:
        other = "ar1" if settings.noise == "ols" else "ols"
        name = "AR(1)" if other == "ar1" else "OLS"
        plans.append(
            ("noise", f"the {name} noise model is used", kernel, settings.with_(noise=other))
        )
    uses_confounds = analysis.confounds is not None and settings.confound_columns != ()
    if "confounds" not in skip and uses_confounds:
        plans.append(
            (
                "confounds",
                "the confound columns are left out",
                kernel,
                settings.with_(confound_columns=()),
            )
        )
    return plans


def explain(
    run: Any,
    analysis: Analysis,
    settings: ModelSettings,
    theirs: np.ndarray,
    kernel: str | None = None,
    mask: np.ndarray | None = None,
    stat: str = "t",
    kernels: Sequence[str] | None = None,
    shifts_s: Sequence[float] | None = None,
    other_noise: bool = True,
    min_gain: float = 0.05,
    ours: MapResult | None = None,
    progress: Callable[[float], bool | None] | None = None,
    steps: int = 2,
) -> Explanation:
    """Find which testable changes to our model make our map agree best with theirs.

    Recomputes our map under every other kernel, onsets shifted by -1 and +1 TR, the other
    noise model and (when the model has confounds) without the confound columns, and
    compares each with theirs. The best change that clearly raises the correlation (by
    ``min_gain``, or halving the unexplained share ``1 - r^2``) is kept, and the search is
    repeated once more from there with the remaining kinds of change (``steps`` rounds in
    all), so two causes together (say, no confounds in their model and onsets one TR late)
    can be found. The statement names the causes kept; otherwise it says the maps agree
    (noting a pure scale factor) or that none of the tested causes explains the difference.

    Parameters
    ----------
    run, analysis, settings
        As for :func:`voxelscope.core.maps.compute_map`.
    theirs : ndarray (X, Y, Z)
        Their map on our grid.
    kernel : str, optional
        Our kernel; default the first of ``settings.kernels``.
    mask : ndarray of bool, optional
        Voxels to fit and compare; default the run's mask.
    stat : str
        Statistic of our map to compare (their map is usually a t map).
    kernels : sequence of str, optional
        Kernels to try; default the four default kernels.
    shifts_s : sequence of float, optional
        Onset shifts to try in seconds; default ``(-TR, +TR)``.
    other_noise : bool
        Also try the other noise model (OLS <-> AR(1)).
    min_gain : float
        A rise in r this large always counts as an explanation.
    ours : MapResult, optional
        Our map under the given model, if already computed.
    progress : callable, optional
        ``progress(fraction)``; returning False cancels (Cancelled).
    steps : int
        Rounds of the search (1: single changes only).

    Returns
    -------
    Explanation
        ``best`` is the final model; ``alternatives`` lists every recomputation, the given
        model first.
    """
    kernel = str(kernel if kernel is not None else settings.kernels[0])
    tr = float(analysis.tr)
    if shifts_s is None:
        shifts_s = (-tr, tr)
    if kernels is None:
        kernels = DEFAULT_KERNELS

    done = [0]

    def run_plan(plan, total: int, round_no: int, builds_on: tuple[str, ...]) -> Alternative:
        kind, label, k, s = plan
        sub = None
        if progress is not None:
            n0 = done[0]

            def sub(f: float) -> bool | None:
                return progress(min(1.0, (n0 + f) / total))

        m = compute_map(run, analysis, s, k, mask=mask, progress=sub, stats=(stat,))
        done[0] += 1
        agr = compare_maps(m, theirs, mask=mask, stat=stat)
        return Alternative(kind, label, k, s, agr.r, agr.slope, round_no, builds_on)

    def key(a: Alternative) -> float:
        return a.r if math.isfinite(a.r) else -math.inf

    first = _candidate_plans(analysis, settings, kernel, kernels, shifts_s, other_noise, set())
    total = 1 + len(first) * max(1, steps)
    if ours is not None:
        baseline = compare_maps(ours, theirs, mask=mask, stat=stat)
        base = Alternative("as given", "as given", kernel, settings, baseline.r, baseline.slope)
    else:
        m0 = compute_map(run, analysis, settings, kernel, mask=mask, stats=(stat,))
        baseline = compare_maps(m0, theirs, mask=mask, stat=stat)
        base = Alternative("as given", "as given", kernel, settings, baseline.r, baseline.slope)
    done[0] = 1
    alternatives: list[Alternative] = [base]
    kept: list[Alternative] = []
    current = base
    plans = first
    for round_no in range(1, max(1, steps) + 1):
        on_top = tuple(a.label for a in kept)
        tried = [run_plan(pl, total, round_no, on_top) for pl in plans]
        alternatives.extend(tried)
        if not tried:
            break
        cand = max(tried, key=key)
        if not _improves(current.r, cand.r, min_gain):
            break
        kept.append(cand)
        current = cand
        plans = _candidate_plans(
            analysis,
            cand.settings,
            cand.kernel,
            kernels,
            shifts_s,
            other_noise,
            {a.kind for a in kept},
        )
    best = current

    if not math.isfinite(base.r) and not math.isfinite(best.r):
        statement = (
            "The maps cannot be compared: fewer than 3 voxels with values in both, or one "
            "map is constant; check that their map covers the run's mask."
        )
    elif kept:

        def cause(a: Alternative) -> str:
            if a.kind == "shift":
                step = abs(a.settings.onset_shift_s - settings.onset_shift_s)
                if math.isclose(step, tr, rel_tol=1e-6):
                    return "their event timing may be off by one TR"
                return "their event timing may differ from ours"
            return {
                "kernel": f"they may have used the {a.kernel} kernel",
                "noise": "they may have used another noise model",
                "confounds": "their model may not have had these confounds",
            }[a.kind]

        ra, rb = _fmt_pair(base.r, best.r)
        labels = " and ".join(a.label for a in kept)
        causes = "; ".join(cause(a) for a in kept)
        statement = f"Their map agrees best with ours when {labels} (r {ra} -> {rb}): {causes}."
        note = _scale_note(best.slope, best.r)
        if note:
            statement += f" Also, {note}."
    elif base.r >= 0.9:
        note = _scale_note(baseline.robust_slope, base.r)
        if note:
            statement = f"The maps agree in pattern (r {format_value('r', base.r)}), but {note}."
        else:
            statement = (
                f"The maps agree (r {format_value('r', base.r)}, "
                f"slope {format_value('value', baseline.slope)}); "
                "no tested change improves the agreement."
            )
    else:
        statement = (
            f"None of the tested changes (other kernels, onsets shifted by one TR, the other "
            f"noise model, no confounds) raises the agreement by {min_gain:.2f} or more "
            f"(r {format_value('r', base.r)}); the difference lies elsewhere (preprocessing, "
            "masks or smoothing)."
        )
    return Explanation(baseline, tuple(alternatives), best, statement)
