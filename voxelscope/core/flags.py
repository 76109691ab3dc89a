"""The plain-language rules: which findings of :func:`voxelscope.core.checks.voxel_checks`
become a :class:`Flag`, and the sentence each one says.

The computations live in :mod:`voxelscope.core.checks`; this module only reads a finished
:class:`~voxelscope.core.checks.VoxelChecks` and compares it with the documented
thresholds below.

Examples
--------
>>> jump_size("rot_x", 0.01), jump_size("trans_y", 1.25)
('rot_x 0.57°', 'trans_y 1.2 mm')
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .diagnostics import LJUNG_BOX_LAGS, RMS_SPIKE_K
from .numfmt import format_value as fmt

if TYPE_CHECKING:
    from .checks import VoxelChecks
    from .design import DesignMatrix

__all__ = [
    "ACF_POSITIVE",
    "AR1_LIMIT",
    "CONFOUND_R_LIMIT",
    "DRIFT_FRACTION_LIMIT",
    "EDGE_LIMIT_MM",
    "FLAG_LAGS",
    "INFLUENCE_REL_CHANGE",
    "INFLUENCE_T_CHANGE",
    "LJUNG_BOX_ALPHA",
    "SHIFT_LIMIT_S",
    "SHIFT_REL_GAIN",
    "SHIFT_T_GAIN",
    "SHIFT_T_MIN",
    "SLOW_TASK_RATIO",
    "VIF_LIMIT",
    "Flag",
    "edge_flags",
    "flags_for",
    "jump_size",
]

#: Lag-1 autocorrelation called strong in the flag's wording (no longer a condition for it).
AR1_LIMIT = 0.3
#: Flag autocorrelation when the Ljung-Box p (10 lags) of the model's whitened residuals
#: is below this.
LJUNG_BOX_ALPHA = 0.01
#: Autocorrelations of the whitened residuals quoted in the flag (lags 1..this) ...
FLAG_LAGS = 3
#: ... of which at least one must exceed this: positive autocorrelation is what makes t
#: too large (residuals of a fit with drift columns are slightly negatively correlated).
ACF_POSITIVE = 0.1
#: Flag influence when dropping volumes changes t by at least this much ...
INFLUENCE_T_CHANGE = 1.0
#: ... and by at least this fraction of the larger of the two |t|.
INFLUENCE_REL_CHANGE = 0.2
#: Flag a condition regressor that correlates at least this strongly (|r|) with a confound.
CONFOUND_R_LIMIT = 0.5
#: Flag a condition regressor whose variance inflation factor exceeds this
#: (common practice puts the worry line at 5-10).
VIF_LIMIT = 5.0
#: Flag a voxel this close to the edge of the brain mask (mm).
EDGE_LIMIT_MM = 6.0
#: Flag timing when the best onset shift is at least this far from zero (s) ...
SHIFT_LIMIT_S = 1.0
#: ... the best t is at least this large ...
SHIFT_T_MIN = 3.0
#: ... and it beats the t at zero shift by at least this much ...
SHIFT_T_GAIN = 1.0
#: ... and by at least this fraction of that t. (In simulated block designs with white
#: noise the scan's best t beats the unshifted t by under 5% in 99% of clean voxels.)
SHIFT_REL_GAIN = 0.1
#: Flag slow drift when this share of the voxel's power lies below the high-pass cutoff.
DRIFT_FRACTION_LIMIT = 0.5
#: Flag a task whose frequency is below this multiple of the high-pass cutoff frequency.
SLOW_TASK_RATIO = 1.5


@dataclass(frozen=True)
class Flag:
    """One finding in plain words.

    Attributes
    ----------
    id : str
        Stable identifier: ``autocorrelation``, ``outliers``, ``run-spikes``,
        ``influence``, ``timing``, ``confound``, ``collinear``, ``edge``, ``outside-mask``,
        ``drift``, ``slow-task`` or ``no-signal``.
    text : str
        One plain sentence.
    figure : str
        The plot that supports it: ``acf``, ``influence``, ``shift_scan``, ``fir``,
        ``spectrum``, ``confounds`` or ``edge``.

    >>> Flag("edge", "The voxel is 2.0 mm from the brain edge.", "edge").to_json()["figure"]
    'edge'
    """

    id: str
    text: str
    figure: str

    def to_json(self) -> dict[str, str]:
        return {"id": self.id, "text": self.text, "figure": self.figure}


def jump_size(name: str, size: float) -> str:
    """A jump's size in the column's unit: mm for translations; degrees for rotations, which
    pipeline tables give in radians (common practice)."""
    if name.startswith("rot_"):
        return f"{name} {math.degrees(size):.2g}°"
    if name.startswith("trans_"):
        return f"{name} {size:.2g} mm"
    return f"{name} {size:.2g}"


def _vols(v: Sequence[int], limit: int = 5) -> str:
    v = list(v)
    text = ", ".join(str(i) for i in v[:limit])
    return text + (f" and {len(v) - limit} more" if len(v) > limit else "")


def flags_for(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    flags: list[Flag] = []
    for make in (
        edge_flags,
        _autocorrelation_flag,
        _outlier_flags,
        _motion_flag,
        _influence_flag,
        _timing_flag,
        _confound_flags,
        _spectrum_flags,
    ):
        flags.extend(make(c, d))
    return flags


def edge_flags(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    if c.in_mask is False:
        return [Flag("outside-mask", "The voxel lies outside the brain mask.", "edge")]
    if c.edge_distance_mm is not None and c.edge_distance_mm <= EDGE_LIMIT_MM:
        text = (
            f"The voxel is {fmt('mm', c.edge_distance_mm)} mm from the brain edge, where head "
            "motion can look like activation."
        )
        return [Flag("edge", text, "edge")]
    return []


_NEXT_MODEL = {
    "ols": "Fit with the default noise model, AR(p), which allows for autocorrelation",
    "ar1": "AR(1) does not describe this noise; use the default AR(p) model",
}


def _autocorrelation_flag(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    p = c.whitened_ljung_box_p
    first = np.asarray(c.whitened_acf, dtype=float)[1 : FLAG_LAGS + 1]
    if not (math.isfinite(p) and p < LJUNG_BOX_ALPHA and np.nanmax(first) > ACF_POSITIVE):
        return []
    lags = ", ".join(fmt("r", v) for v in first)
    strong = "strongly " if abs(float(np.asarray(c.whitened_acf)[1])) > AR1_LIMIT else ""
    where = {"ols": "Residuals", "ar1": "Residuals after AR(1) prewhitening"}.get(
        c.noise, "Residuals after AR(p) prewhitening"
    )
    text = (
        f"{where} are {strong}autocorrelated (lags 1-{FLAG_LAGS}: {lags}; Ljung-Box p "
        f"{fmt('p', p)} over {LJUNG_BOX_LAGS} lags), so the t is likely too large. "
    )
    text += _NEXT_MODEL.get(
        c.noise,
        "Look for what the model misses: slow drift (lower the high-pass cutoff), "
        "a missing confound, or a response the kernel does not fit.",
    )
    if c.noise in _NEXT_MODEL:
        text += "."
    return [Flag("autocorrelation", text, "acf")]


def _outlier_flags(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    out = []
    v = c.studentized_outliers
    if v:
        worst = max(v, key=lambda i: abs(c.studentized[i]))
        size = fmt("t", c.studentized[worst])
        if len(v) == 1:
            text = f"Volume {v[0]} is an outlier at this voxel (studentized residual {size})."
        else:
            text = (
                f"Volumes {_vols(v)} are outliers at this voxel (largest studentized residual "
                f"{size}, at volume {worst})."
            )
        out.append(Flag("outliers", text, "influence"))
    if c.rms_spikes:
        also = [s for s in c.rms_spikes if s in v]
        plural = "s" if len(c.rms_spikes) > 1 else ""
        text = (
            f"The whole brain changes suddenly at volume{plural} {_vols(c.rms_spikes)} "
            f"(volume-to-volume change above the median + {RMS_SPIKE_K:g} MAD)"
        )
        text += f"; volume {_vols(also)} is an outlier here too." if also else "."
        out.append(Flag("run-spikes", text, "influence"))
    return out


def _motion_flag(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    """Confound jumps at which this voxel stands out (an outlier or influential volume at the
    jump or one volume either side): names the jump volume, the (at most three) columns
    that jump most there with their size, and whether those columns are in the model."""
    if not c.confound_jumps:
        return []
    suspects = set(c.studentized_outliers) | set(c.influential_volumes)
    hits: dict[int, list[tuple[float, str, float]]] = {}
    for name, jumps in c.confound_jumps.items():
        for v, (size, ratio) in jumps.items():
            if {v - 1, v, v + 1} & suspects:
                hits.setdefault(v, []).append((ratio, name, size))
    if not hits:
        return []
    vols = sorted(hits)
    best: dict[str, tuple[float, float]] = {}
    for v in vols:
        for ratio, name, size in hits[v]:
            if name not in best or ratio > best[name][0]:
                best[name] = (ratio, size)
    top = sorted(best, key=lambda n: -best[n][0])[:3]
    sizes = ", ".join(jump_size(n, best[n][1]) for n in top)
    more = len(best) - len(top)
    if more:
        sizes += f" and {more} more"
    where = "volume" if len(vols) == 1 else "volumes"
    text = (
        f"The confounds jump at {where} {_vols(vols)} ({sizes}) and this voxel stands out "
        "there: head motion is a likely cause"
    )
    inside = [n for n in top if n in c.confounds_in_model]
    outside = [n for n in top if n not in c.confounds_in_model]
    if not outside:
        text += "; these columns are in the model"
    elif not inside:
        it = "this column is" if len(outside) == 1 else "these columns are"
        text += f"; {it} not in the model, so try adding {'it' if len(outside) == 1 else 'them'}"
    else:
        text += (
            f"; {', '.join(inside)} {'is' if len(inside) == 1 else 'are'} in the model, "
            f"{', '.join(outside)} {'is' if len(outside) == 1 else 'are'} not"
        )
    return [Flag("motion", text + ".", "influence")]


def _influence_flag(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    if not math.isfinite(c.t):
        return []
    for m, tk in enumerate(c.t_dropping, start=1):
        if not math.isfinite(tk):
            continue
        change = abs(c.t - tk)
        if change >= INFLUENCE_T_CHANGE and change >= INFLUENCE_REL_CHANGE * max(abs(c.t), abs(tk)):
            vols = c.influential_volumes[:m]
            who = f"One volume ({vols[0]}) alone" if m == 1 else f"{m} volumes ({_vols(vols)})"
            verb = (
                ("raises" if c.t > tk else "lowers")
                if m == 1
                else ("raise" if c.t > tk else "lower")
            )
            text = f"{who} {verb} t from {fmt('t', tk)} to {fmt('t', c.t)}."
            return [Flag("influence", text, "influence")]
    return []


def _secs(x: float) -> str:
    """Seconds by the one rule (core/numfmt.py): 8, 7.5, 7.25.

    >>> _secs(8.0), _secs(7.5), _secs(7.25)
    ('8', '7.5', '7.25')
    """
    return fmt("s", x)


def _timing_flag(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    if c.best_shift_s is None or c.peak_latency_s is None or not math.isfinite(c.t_at_zero_shift):
        return []
    # in the direction of the t as given: a deactivation or an A - B where B wins is
    # judged on -t (see voxelscope.core.timing.shift_scan)
    sign = -1.0 if c.t_at_zero_shift < 0 else 1.0
    t_best = sign * float(np.nanmax(sign * c.shift_t))
    gain = sign * (t_best - c.t_at_zero_shift)
    if (
        abs(c.best_shift_s) < SHIFT_LIMIT_S
        or abs(t_best) < SHIFT_T_MIN
        or gain < SHIFT_T_GAIN
        or gain < SHIFT_REL_GAIN * abs(c.t_at_zero_shift)
    ):
        return []
    when = "later" if c.best_shift_s > 0 else "earlier"
    text = (
        f"The response peaks at {_secs(c.peak_latency_s)} s, {when} than the kernel's "
        f"{_secs(c.kernel_peak_s)} s (t {fmt('t', c.t_at_zero_shift)} as given, "
        f"{fmt('t', t_best)} with the onsets moved by {fmt('s', c.best_shift_s, signed=True)} s)"
    )
    if c.best_shift_s in (float(c.shifts_s[0]), float(c.shifts_s[-1])):
        text += "; the best shift is at the end of the scanned range"
    return [Flag("timing", text + ".", "shift_scan")]


def _confound_flags(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    out = []
    for cond, row in c.confound_correlation.items():
        hits = [(k, r) for k, r in row.items() if math.isfinite(r) and abs(r) >= CONFOUND_R_LIMIT]
        if hits:
            name, r = max(hits, key=lambda h: abs(h[1]))
            more = ""
            if len(hits) > 1:
                more = f" (and {len(hits) - 1} other column{'s' * (len(hits) > 2)})"
            text = (
                f"The {cond} regressor correlates {fmt('r', r)} with confound column {name}{more}."
            )
            out.append(Flag("confound", text, "confounds"))
    for cond, idx in d.condition_columns.items():
        v = c.vif.get(d.names[idx[0]], math.nan)
        if math.isfinite(v) and v > VIF_LIMIT:
            text = (
                f"The {cond} regressor overlaps the rest of the model (VIF {fmt('value', v)}), "
                "so its beta is uncertain."
            )
            out.append(Flag("collinear", text, "confounds"))
    return out


def _spectrum_flags(c: VoxelChecks, d: DesignMatrix) -> list[Flag]:
    out = []
    if c.drift_fraction is not None and c.drift_fraction >= DRIFT_FRACTION_LIMIT:
        text = (
            f"{100 * c.drift_fraction:.0f}% of the voxel's variance is slow drift below the "
            "high-pass cutoff."
        )
        out.append(Flag("drift", text, "spectrum"))
    task, hp = c.spectrum.get("task_hz"), c.spectrum.get("highpass_hz")
    periodic = bool(c.spectrum.get("task_periodic", True))
    if task and hp and periodic and task < SLOW_TASK_RATIO * hp:
        text = (
            f"The task repeats about every {1 / task:.0f} s, close to the high-pass cutoff of "
            f"{1 / hp:.0f} s, which removes part of the response."
        )
        out.append(Flag("slow-task", text, "spectrum"))
    return out
