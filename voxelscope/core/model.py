"""A first-level model of one run: conditions, confounds and settings, fitted per kernel.

:class:`Analysis` is what both front ends use. It caches, per kernel and model setting,
everything that does not depend on the data (design matrix, its pseudo-inverse, contrast
weights), so a change of voxel costs only a few small matrix products.

Examples
--------
>>> import numpy as np
>>> from voxelscope.core.events import Condition
>>> a = Analysis([Condition("tone", [10.0, 60.0], [15.0, 15.0])], n_volumes=80, tr=1.25)
>>> y = 100 + 2 * a.design("double-gamma", ModelSettings()).column("tone")
>>> fits = a.fit_voxel(y + np.sin(np.arange(80)), ModelSettings(kernels=("boxcar", "gamma")))
>>> [f.kernel for f in fits.fits]
['boxcar', 'gamma']
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .confounds import Confounds
from .design import DesignMatrix, build_design
from .errors import InputError, VoxelscopeError
from .events import Condition, EventsFile, events_sanity, shift_conditions
from .glm import FitResult, PreparedDesign, condition_f_matrix, f_test, fit, parse_contrast, prepare
from .hrf import DEFAULT_KERNELS, KERNEL_NAMES, Kernel, get_kernel
from .jsonsafe import finite_or_none

__all__ = ["DF_EFFECTIVE", "Analysis", "KernelFit", "ModelSettings", "VoxelFits"]


#: How outputs name the effective df of the default AR(p) model.
DF_EFFECTIVE = "effective (estimated AR coefficients, Worsley et al. 2002)"


@dataclass(frozen=True)
class ModelSettings:
    """Model choices that the user can change; hashable, plain data.

    Attributes
    ----------
    kernels : tuple of str
        Kernels to fit, in display order.
    contrast : str or None
        Contrast expression; None means the first condition.
    noise : {"arp", "ols", "ar1"}
        ``arp`` (the default): AR(p) prewhitening with bias-corrected coefficients smoothed
        in space (:mod:`voxelscope.core.noise`); ``ols``: ordinary least squares;
        ``ar1``: AR(1) with rho from the voxel's own OLS residuals (Prais-Winsten).
    highpass_s : float or None
        Discrete cosine drift cutoff; None for no drift columns. 128 s is a common default.
    confound_columns : tuple of str or None
        Confound columns to include; None means all columns of a small confounds table (at
        most :data:`~voxelscope.core.confounds.SMALL_TABLE`; a bigger one raises InputError
        listing the named sets).
    onset_shift_s : float
        Added to every onset (timing checks).
    derivatives : {0, 1, 2}
    fir_window_s : float
        Span of the FIR kernel after each onset, seconds (24 s by default, long enough for
        a slow response whatever the TR); the last bin may reach past it.
    fir_bin_s : float or None
        FIR bin width in seconds; None means one TR.
    modulators : tuple of str
        Events columns used as parametric modulators (``CONDITION:MODULATOR`` columns).
    orthogonalize : bool
        Serially orthogonalise each condition's modulators (off by default).
    drop_volumes : int
        Leave the first N volumes out of the fit (runs whose confounds table has no
        non-steady-state columns).
    censor_fd_mm : float or None
        Leave out volumes whose ``framewise_displacement`` exceeds this many mm.

    Volumes marked in the table's ``non_steady_state_outlier*`` columns always leave the fit,
    and so do those marked in chosen outlier columns (``motion_outlier*``); see
    :meth:`Analysis.excluded_volumes`.
    """

    kernels: tuple[str, ...] = DEFAULT_KERNELS
    contrast: str | None = None
    noise: str = "arp"
    highpass_s: float | None = 128.0
    confound_columns: tuple[str, ...] | None = None
    onset_shift_s: float = 0.0
    derivatives: int = 0
    fir_window_s: float = 24.0
    fir_bin_s: float | None = None
    drop_volumes: int = 0
    censor_fd_mm: float | None = None
    modulators: tuple[str, ...] = ()
    orthogonalize: bool = False

    def with_(self, **changes) -> ModelSettings:
        """A copy with some fields changed."""
        return replace(self, **changes)


@dataclass(frozen=True, eq=False)
class KernelFit:
    """One kernel's fit at one voxel (a batch of one of :class:`FitResult`)."""

    kernel: str
    design: DesignMatrix
    result: FitResult
    contrast: str
    f: float | None = None
    f_p: float | None = None
    f_df: tuple[int, int] | None = None
    #: AR(p) only: how the voxel's coefficients were obtained (None: from its own series).
    noise_estimate: Any = None

    @property
    def noise_text(self) -> str:
        """One line naming the noise model and, under AR(p), where its coefficients came
        from."""
        noise = self.result.noise
        if noise == "ols":
            return "OLS (white noise assumed)"
        if noise == "ar1":
            return f"AR(1), rho {finite_or_none(self.result.rho):.3f} from this voxel's residuals"
        if self.noise_estimate is not None:
            return self.noise_estimate.describe()
        coefs = ", ".join(f"{v:.3f}" for v in np.asarray(self.result.ar).reshape(-1))
        return f"AR(p) coefficients {coefs} from this voxel alone (no neighbourhood given)"

    @property
    def estimate(self) -> float | None:
        """The contrast estimate ``c'b`` (None when undefined)."""
        return finite_or_none(self.result.estimate)

    @property
    def beta(self) -> float | None:
        """The earlier name of :attr:`estimate`, kept so that older scripts keep working."""
        return self.estimate

    @property
    def variance(self) -> float | None:
        return finite_or_none(self.result.variance)

    @property
    def t(self) -> float | None:
        return finite_or_none(self.result.t)

    @property
    def p(self) -> float | None:
        return finite_or_none(self.result.p)

    @property
    def df(self) -> int | float:
        """The df of the t: ``n - rank``, or under the default AR(p) model with its
        neighbourhood the effective df (not a whole number; see :attr:`df_kind`)."""
        if self.result.df_eff is None:
            return int(self.result.df)
        return float(self.result.df_eff[0])

    @property
    def df_kind(self) -> str:
        """What :attr:`df` is, in a few words for tables and JSON."""
        return "n - rank" if self.result.df_eff is None else DF_EFFECTIVE

    @property
    def r2(self) -> float | None:
        return finite_or_none(self.result.r2)

    @property
    def rho(self) -> float | None:
        return None if self.result.rho is None else finite_or_none(self.result.rho)

    @property
    def fitted(self) -> np.ndarray:
        return self.result.fitted[:, 0]

    @property
    def residuals(self) -> np.ndarray:
        return self.result.residuals[:, 0]

    @property
    def betas(self) -> dict[str, float]:
        return {n: float(b) for n, b in zip(self.design.names, self.result.betas[:, 0])}


@dataclass(frozen=True, eq=False)
class VoxelFits:
    """Every kernel's fit at one voxel, with the data and any warnings."""

    y: np.ndarray
    fits: tuple[KernelFit, ...]
    warnings: tuple[str, ...] = field(default=())

    def by_kernel(self, name: str) -> KernelFit:
        for f in self.fits:
            if f.kernel == name:
                return f
        raise KeyError(name)


class Analysis:
    """Conditions and confounds of one run, with cached designs per kernel and setting.

    Parameters
    ----------
    conditions : sequence of Condition
    n_volumes : int
    tr : float
        Seconds.
    confounds : Confounds, optional
        One row per volume (checked).
    reference_time_s : float
        Sampling time of each volume within its TR (see :mod:`voxelscope.core.design`).
    """

    def __init__(
        self,
        conditions: Sequence[Condition],
        n_volumes: int,
        tr: float,
        confounds: Confounds | None = None,
        reference_time_s: float = 0.0,
    ) -> None:
        if not conditions:
            raise InputError("the events file gives no conditions")
        self.conditions = tuple(conditions)
        self.n_volumes = int(n_volumes)
        self.tr = float(tr)
        self.reference_time_s = float(reference_time_s)
        if confounds is not None:
            confounds.check_rows(self.n_volumes)
        self.confounds = confounds
        self._designs: dict[tuple, tuple[DesignMatrix, PreparedDesign]] = {}
        self._fast: dict[tuple, tuple[DesignMatrix, PreparedDesign]] = {}
        self._weights: dict[tuple, np.ndarray] = {}
        self._plans: dict[ModelSettings, list[tuple]] = {}
        self._excluded: dict[tuple, dict[int, str]] = {}
        self.warnings: list[str] = events_sanity(self.conditions, self.n_volumes, self.tr)
        #: The events file the conditions came from (its columns, for choices in the
        #: window); set by the loader, None for conditions made in code.
        self.events_file: EventsFile | None = None
        #: Unit the events file's onsets were given in (``"volumes"`` were multiplied by
        #: the TR); set by the loader.
        self.onset_unit = "seconds"

    @property
    def condition_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.conditions)

    @property
    def modulator_candidates(self) -> tuple[str, ...]:
        """Events columns with numbers that some condition's events carry, in file order."""
        out: dict[str, None] = {}
        for c in self.conditions:
            for name in c.columns:
                if c.carries(name):
                    out[name] = None
        return tuple(out)

    def check_modulators(self, settings: ModelSettings) -> list[str]:
        """Notes on the settings' modulators (n/a counts, constant ones left out).

        Raises
        ------
        InputError
            A modulator that no condition's events carry (the candidates are listed).
        """
        if not settings.modulators:
            return []
        known = self.modulator_candidates
        for m in settings.modulators:
            if m not in known:
                raise InputError(
                    f"modulator '{m}' is not a numeric column of the events file "
                    f"(numeric columns: {', '.join(known) or 'none'}); name one of them"
                )
        s = settings.with_(kernels=("boxcar",), highpass_s=None, confound_columns=())
        return list(self.design("boxcar", s).warnings)

    def modulator_columns(self, settings: ModelSettings) -> tuple[str, ...]:
        """Names of the settings' modulator columns (``condition:modulator``)."""
        if not settings.modulators:
            return ()
        s = settings.with_(kernels=("boxcar",), highpass_s=None, confound_columns=())
        return tuple(self.design("boxcar", s).modulators)

    def fir_kernel(self, settings: ModelSettings) -> Kernel:
        """The FIR kernel of these settings: bins of ``fir_bin_s`` (one TR by default)
        covering ``fir_window_s`` seconds."""
        bin_s = float(settings.fir_bin_s or self.tr)
        if not (settings.fir_window_s > 0 and math.isfinite(settings.fir_window_s)):
            raise InputError("the FIR window must be a positive number of seconds")
        n_bins = max(1, math.ceil(float(settings.fir_window_s) / bin_s - 1e-9))
        return get_kernel("fir", n_bins=n_bins, bin_s=bin_s)

    @property
    def confound_names(self) -> tuple[str, ...]:
        return () if self.confounds is None else self.confounds.file_columns

    def kernel(self, name: str | Kernel, settings: ModelSettings) -> Kernel:
        """The kernel object for a name under these settings (FIR bins from settings)."""
        if isinstance(name, Kernel):
            return name
        if str(name).lower() == "fir":
            return self.fir_kernel(settings)
        return get_kernel(name)

    def _key(self, kernel: Kernel, s: ModelSettings) -> tuple:
        return (
            kernel,
            s.derivatives,
            s.highpass_s,
            s.confound_columns,
            s.onset_shift_s,
            s.modulators,
            s.orthogonalize,
            s.drop_volumes,
            s.censor_fd_mm,
        )

    def excluded_volumes(self, settings: ModelSettings) -> dict[int, str]:
        """Volumes left out of the fit (0-based, sorted) and why, under these settings.

        In order of precedence for the reason: the confounds table's non-steady-state
        columns, ``drop_volumes``, chosen outlier columns, framewise displacement above
        ``censor_fd_mm``.

        >>> from voxelscope.core.events import Condition
        >>> a = Analysis([Condition("tap", [4.0], [8.0])], n_volumes=30, tr=1.0)
        >>> a.excluded_volumes(ModelSettings(drop_volumes=2))
        {0: 'one of the first 2 volumes, dropped', 1: 'one of the first 2 volumes, dropped'}
        """
        key = ("excluded", settings.confound_columns, settings.drop_volumes, settings.censor_fd_mm)
        hit = self._excluded.get(key)
        if hit is not None:
            return dict(hit)
        out: dict[int, str] = {}
        n = self.n_volumes
        conf = self.confounds
        if conf is not None:
            for v, col in conf.outlier_volumes(conf.non_steady_columns()).items():
                out.setdefault(v, f"non-steady-state ({col})")
        k = int(settings.drop_volumes)
        if k < 0 or k >= n:
            raise InputError(
                f"cannot drop the first {k} of {n} volumes; give a number from 0 to {n - 1}"
            )
        for v in range(k):
            out.setdefault(v, f"one of the first {k} volumes, dropped")
        if conf is not None:
            chosen = self._chosen_columns(settings)
            for v, col in conf.outlier_volumes(chosen).items():
                out.setdefault(v, f"marked in {col}")
        if settings.censor_fd_mm is not None:
            mm = float(settings.censor_fd_mm)
            if not (mm > 0 and np.isfinite(mm)):
                raise InputError(
                    f"the framewise displacement limit must be a positive number of mm, not {mm}"
                )
            if conf is None or "framewise_displacement" not in conf.names:
                where = "no confounds table" if conf is None else conf.source
                raise InputError(
                    f"{where}: censoring by framewise displacement needs a "
                    "framewise_displacement column; give a confounds table that has one"
                )
            fd = conf.column("framewise_displacement")
            for v in np.flatnonzero(fd > mm):
                out.setdefault(int(v), f"framewise displacement {fd[v]:.2f} mm > {mm:g} mm")
        out = dict(sorted(out.items()))
        self._excluded[key] = out
        return dict(out)

    def _chosen_columns(self, settings: ModelSettings) -> tuple[str, ...]:
        if self.confounds is None:
            return ()
        cols = settings.confound_columns
        # no choice: all columns of a small table; a pipeline-sized one asks for a choice
        return self.confounds.default_choice() if cols is None else tuple(cols)

    def keep_mask(self, settings: ModelSettings) -> np.ndarray | None:
        """Volumes that enter the fit (None when all do)."""
        ex = self.excluded_volumes(settings)
        if not ex:
            return None
        keep = np.ones(self.n_volumes, dtype=bool)
        keep[list(ex)] = False
        return keep

    def prepared(
        self, kernel: str | Kernel, settings: ModelSettings
    ) -> tuple[DesignMatrix, PreparedDesign]:
        """Design matrix and its precomputed inverse parts (cached)."""
        fast = (
            kernel,
            settings.derivatives,
            settings.highpass_s,
            settings.confound_columns,
            settings.onset_shift_s,
            settings.fir_window_s,
            settings.fir_bin_s,
            settings.drop_volumes,
            settings.censor_fd_mm,
            settings.modulators,
            settings.orthogonalize,
        )
        hit = self._fast.get(fast)
        if hit is not None:
            return hit
        k = self.kernel(kernel, settings)
        key = self._key(k, settings)
        hit = self._designs.get(key)
        if hit is None:
            conf = None
            if self.confounds is not None:
                # outlier columns mark volumes to leave out; they are not regressors
                cols = self._chosen_columns(settings)
                cols = [c for c in cols if not self.confounds.is_outlier_column(c)]
                conf = self.confounds.select(cols)
            if conf is not None and not conf.names:
                conf = None
            d = build_design(
                shift_conditions(self.conditions, settings.onset_shift_s),
                self.n_volumes,
                self.tr,
                kernel=k,
                derivatives=settings.derivatives,
                highpass_s=settings.highpass_s,
                confounds=conf,
                reference_time_s=self.reference_time_s,
                modulators=settings.modulators,
                orthogonalize=settings.orthogonalize,
            )
            hit = (d, prepare(d.X, d.names, keep=self.keep_mask(settings)))
            if len(self._designs) > 256:
                self._designs.clear()
                self._fast.clear()
                self._weights.clear()
                self._plans.clear()
            self._designs[key] = hit
        self._fast[fast] = hit
        return hit

    def design(self, kernel: str | Kernel, settings: ModelSettings) -> DesignMatrix:
        return self.prepared(kernel, settings)[0]

    def default_contrast(self) -> str:
        """The contrast used when none is given, by the one rule for every front end
        (:func:`voxelscope.core.events.default_condition`)."""
        from .events import default_condition

        levels = getattr(self.events_file, "levels", ()) or ()
        return default_condition([c.name for c in self.conditions], levels)

    def contrast_weights(self, kernel: str | Kernel, settings: ModelSettings) -> np.ndarray:
        """Weights of the settings' contrast on this kernel's design."""
        d = self.design(kernel, settings)
        key = (id(d), settings.contrast)
        w = self._weights.get(key)
        if w is None:
            w = parse_contrast(
                settings.contrast, d.names, d.condition_columns, default=self.default_contrast()
            )
            w.setflags(write=False)
            self._weights[key] = w
        return w

    def check_contrast(self, expr: str | None, settings: ModelSettings | None = None) -> np.ndarray:
        """Validate a contrast against the condition (and the settings' modulator) names.

        Raises
        ------
        InputError
            Unknown names or a malformed expression.
        """
        mods = () if settings is None else settings.modulators
        orth = False if settings is None else settings.orthogonalize
        s = ModelSettings(
            kernels=("boxcar",),
            contrast=expr,
            highpass_s=None,
            confound_columns=(),
            modulators=mods,
            orthogonalize=orth,
        )
        return self.contrast_weights("boxcar", s)

    def check_settings(self, settings: ModelSettings) -> None:
        """Raise the error a fit under ``settings`` would raise for the model itself.

        Builds what every fit under ``settings`` needs first and keeps it (each kernel's
        design and its prepared inverse, the contrast's weights, the F-test rows): the
        kernels are known, the contrast parses, the volumes left out leave a design that
        can be fitted. What it leaves to the fit is the voxel's own data and its noise
        estimate. A front end can so accept a change at once and fit the voxel later.

        Raises
        ------
        VoxelscopeError
            The one line a fit would give for these settings.

        Examples
        --------
        >>> from voxelscope.core.events import Condition
        >>> a = Analysis([Condition("tap", [10.0, 50.0], [10.0, 10.0])], 60, 2.0)
        >>> a.check_settings(ModelSettings(contrast="tap"))
        >>> from voxelscope.core.errors import InputError
        >>> try:
        ...     a.check_settings(ModelSettings(contrast="jump"))
        ... except InputError as err:
        ...     print(err)
        contrast 'jump': unknown name 'jump' at character 1; use tap
        """
        self._plan(settings)

    def noise_at(
        self,
        run: Any,
        ijk: Sequence[int],
        settings: ModelSettings,
        mask: np.ndarray | None = None,
    ) -> dict[str, Any]:
        """Per kernel, the voxel's AR(p) coefficients exactly as the map computes them
        (:func:`voxelscope.core.noise.voxel_ar`: its neighbourhood within the smoothing
        kernel, in ``mask``, default the run's); empty unless ``settings.noise == "arp"``.
        """
        if settings.noise != "arp":
            return {}
        from .blas import one_blas_thread
        from .noise import voxel_ar, voxel_box

        plan = self._plan(settings)
        out: dict[str, Any] = {}
        with one_blas_thread():  # small products: one BLAS thread is faster, as in maps
            box = voxel_box(run, ijk, mask=mask)  # read once, shared by every kernel
            for name, _d, prep, _w, _C in plan:
                out[name] = voxel_ar(run, prep, ijk, box=box)
        return out

    def _plan(self, settings: ModelSettings) -> list[tuple]:
        """Per kernel: name, design, prepared design, weights, F-test rows (cached)."""
        plan = self._plans.get(settings)
        if plan is None:
            expr = settings.contrast or self.default_contrast()
            plan = []
            for name in settings.kernels:
                if not isinstance(name, Kernel) and str(name).lower() not in KERNEL_NAMES:
                    get_kernel(name)  # raises a clear error
                d, prep = self.prepared(name, settings)
                w = self.contrast_weights(name, settings)
                C = None
                if settings.derivatives or d.kernel.name == "fir":
                    cond = _single_condition(expr, d)
                    if cond is not None:
                        C = condition_f_matrix(d.names, d.condition_columns, cond)
                plan.append((str(name), d, prep, w, C))
            if len(self._plans) > 64:
                self._plans.clear()
            self._plans[settings] = plan
        return plan

    def fit_voxel(
        self,
        y: np.ndarray,
        settings: ModelSettings,
        noise: Mapping[str, Any] | None = None,
    ) -> VoxelFits:
        """Fit one voxel's time series under every kernel in ``settings.kernels``.

        Each kernel goes through :func:`voxelscope.core.glm.fit` with a batch of one, the
        same path as whole-volume maps. Under ``noise="arp"``, ``noise`` maps each kernel
        to its :class:`~voxelscope.core.noise.ArEstimate` (from :meth:`noise_at`), so the
        voxel is whitened exactly as in the map; without it the voxel's own estimate is
        used and a warning says so.
        """
        y = np.asarray(y, dtype=float).reshape(-1)
        if y.size != self.n_volumes:
            raise InputError(
                f"the time series has {y.size} points but the run has {self.n_volumes} volumes"
            )
        plan = self._plan(settings)
        expr = settings.contrast or self.default_contrast()
        fits = []
        arp = settings.noise == "arp"
        for name, d, prep, w, C in plan:
            est = (noise or {}).get(name) if arp else None
            ar = None if est is None else est.phi
            nu_rho = None if est is None else est.nu_rho
            res = fit(prep, y, w, noise=settings.noise, ar=ar, nu_rho=nu_rho)
            f = f_p = f_df = None
            if C is not None:
                fv, pv, q, dfd = f_test(res, C)
                f = float(fv[0]) if np.isfinite(fv[0]) else None
                f_p = float(pv[0]) if np.isfinite(pv[0]) else None
                f_df = (q, dfd)
            fits.append(KernelFit(name, d, res, expr, f, f_p, f_df, est))
        warnings = []
        if arp and not noise:
            warnings.append(
                "AR(p) coefficients from this voxel alone: the map smooths them over the "
                "neighbourhood, so its numbers can differ (give the run to use it)"
            )
        if fits and fits[0].result.degenerate[0]:
            if not np.all(np.isfinite(y)):
                warnings.append(
                    "the voxel's time series has non-finite values; it is outside the mask"
                )
            elif np.ptp(y) == 0:
                warnings.append(
                    "the voxel is constant over the run; t, p and variance are undefined"
                )
            else:
                warnings.append(
                    "the model fits this voxel exactly; t, p and variance are undefined"
                )
        warnings = self.design_warnings(settings) + warnings
        return VoxelFits(y, tuple(fits), tuple(warnings))

    def highpass_warning(self, settings: ModelSettings) -> str | None:
        """The line saying the high-pass cut-off is shorter than the task's on/off cycle
        (:func:`voxelscope.core.design.task_cycle_warning`), or None; the same line is
        among :meth:`design_warnings` (the window's Model shows it beside the cut-off).

        >>> from voxelscope.core.events import Condition
        >>> a = Analysis([Condition("tap", [40.0 * k for k in range(7)], [20.0] * 7)], 140, 2.0)
        >>> a.highpass_warning(ModelSettings()) is None
        True
        >>> a.highpass_warning(ModelSettings(highpass_s=10.0))[:36]
        'the high-pass cut-off 10 s is shorte'
        """
        from .design import task_cycle_warning

        line = task_cycle_warning(
            shift_conditions(self.conditions, settings.onset_shift_s),
            self.n_volumes,
            self.tr,
            settings.highpass_s,
            self.reference_time_s,
        )
        if line is None:
            return None
        try:
            kernels = settings.kernels or ("boxcar",)
            d = self.design(kernels[0], settings)
        except VoxelscopeError:
            return line
        return line if line in d.warnings else None

    def design_warnings(self, settings: ModelSettings) -> list[str]:
        """Warnings about the designs of these settings (drift from the confounds table, a
        poorly conditioned design), each once; builds the designs (raises their errors)."""
        out: list[str] = []
        for _name, d, prep, _w, _c in self._plan(settings):
            for w in (*d.warnings, *prep.warnings):
                if w not in out:
                    out.append(w)
        return out


def _single_condition(expr: str, d: DesignMatrix) -> str | None:
    e = expr.strip()
    return e if e in d.condition_columns else None
