"""Response kernels: the shape a brief neural event takes in the BOLD signal.

Each kernel is a small frozen dataclass holding its parameters, with one sampling function
:meth:`Kernel.basis` that returns the kernel's basis functions on a fine time grid.

Unit-area convention
--------------------
Every single-shape kernel (boxcar, Gaussian, gamma, double-gamma) is scaled so that its
samples sum to one over the fine grid (``sum(h) * dt == 1``). A sustained block of height 1
convolved with such a kernel therefore rises to a plateau of exactly 1, whatever the
kernel, so a condition's beta means "signal change during a sustained block" under every
kernel and betas are comparable across kernels. Derivative columns are not rescaled.

The FIR basis is the exception: its functions are indicator boxes of height 1, one per time
bin after each onset, so each FIR beta is the response, in data units, in its bin.

Examples
--------
>>> k = get_kernel("double-gamma")
>>> dt = 0.05
>>> h = k.basis(dt)[0][1]
>>> round(float(h.sum() * dt), 6)
1.0
>>> 4.5 <= k.peak_s() <= 6.5
True
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import ClassVar

import numpy as np

from .errors import InputError

__all__ = [
    "DEFAULT_KERNELS",
    "FIR",
    "KERNEL_NAMES",
    "Boxcar",
    "DoubleGamma",
    "Gamma",
    "Gaussian",
    "Kernel",
    "get_kernel",
]


def _gamma_pdf(t: np.ndarray, shape: float, scale: float) -> np.ndarray:
    """Gamma density of ``shape`` and ``scale`` at ``t`` (0 for ``t < 0``).

    ``t**(shape - 1) exp(-t / scale) / (Gamma(shape) scale**shape)``, in logs; equal to
    ``scipy.stats.gamma.pdf(t, shape, scale=scale)`` (checked in tests/core/test_hrf.py)
    with numpy and :func:`math.lgamma` only: importing scipy (even scipy.special) costs
    about half a second of every ``voxelscope map`` on a busy machine. ``(shape - 1) log x``
    is taken as 0 when ``shape == 1``, also at ``x = 0``.

    >>> round(float(_gamma_pdf(np.array([2.0]), 1.0, 2.0)[0]), 12) == round(math.exp(-1) / 2, 12)
    True
    """
    x = np.asarray(t, dtype=np.float64) / scale
    a = float(shape) - 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        xlogx = a * np.log(x) if a != 0.0 else np.zeros_like(x)
        log_pdf = xlogx - x - math.lgamma(shape) - math.log(scale)
        out = np.exp(log_pdf)
    return np.where(x >= 0, np.nan_to_num(out, nan=0.0, posinf=0.0), 0.0)


def _unit_area(h: np.ndarray, dt: float) -> np.ndarray:
    area = h.sum() * dt
    if not np.isfinite(area) or area <= 0:
        raise InputError("kernel parameters give a response with no positive area; check them")
    return h / area


@dataclass(frozen=True)
class Kernel:
    """Base class. Subclasses set ``name`` and implement :meth:`shape`.

    Attributes
    ----------
    length_s : float
        Support of the kernel in seconds; the response is zero after it.
    """

    name: ClassVar[str] = "kernel"
    #: True when the regressor uses event durations (blocks); FIR uses onsets only.
    uses_durations: ClassVar[bool] = True
    length_s: float = 32.0

    def shape(self, t: np.ndarray) -> np.ndarray:
        """Unscaled response at times ``t`` (seconds after onset)."""
        raise NotImplementedError

    def times(self, dt: float) -> np.ndarray:
        """Fine time grid ``0, dt, 2 dt, ...`` covering the kernel's support."""
        n = math.ceil(self.length_s / dt) + 1
        return np.arange(n) * dt

    def basis(self, dt: float, derivatives: int = 0) -> list[tuple[str, np.ndarray]]:
        """Basis functions sampled every ``dt`` seconds.

        Parameters
        ----------
        dt : float
            Fine-grid step in seconds.
        derivatives : {0, 1, 2}
            0: the kernel alone; 1: plus its temporal derivative (suffix ``_dt``);
            2: plus the dispersion derivative (suffix ``_dd``), where the kernel has one.

        Returns
        -------
        list of (suffix, samples)
            The first suffix is ``""`` (the kernel itself, unit area).
        """
        t = self.times(dt)
        h = _unit_area(self.shape(t), dt)
        out = [("", h)]
        if derivatives >= 1:
            out.append(("_dt", np.gradient(h, dt)))
        if derivatives >= 2:
            dd = self._dispersion_derivative(t, dt)
            if dd is not None:
                out.append(("_dd", dd))
        return out

    def _dispersion_derivative(self, t: np.ndarray, dt: float) -> np.ndarray | None:
        return None

    def peak_s(self, dt: float = 0.01) -> float:
        """Time to peak of the kernel, in seconds after onset."""
        t = self.times(dt)
        return float(t[int(np.argmax(self.shape(t)))])


@dataclass(frozen=True)
class Boxcar(Kernel):
    """No convolution: the regressor is the stimulus itself.

    The design reads it as the fraction of each volume's TR window that events cover
    (:func:`voxelscope.core.design.boxcar_regressor`); a brief event (duration 0) lasts
    1 s, the area an impulse has under the unit-area kernels, so it never vanishes.
    """

    name: ClassVar[str] = "boxcar"
    length_s: float = 0.0

    def shape(self, t: np.ndarray) -> np.ndarray:
        out = np.zeros_like(t, dtype=float)
        out[0] = 1.0
        return out

    def basis(self, dt: float, derivatives: int = 0) -> list[tuple[str, np.ndarray]]:
        """The stimulus itself; a boxcar has no smooth shape, so no derivative columns."""
        return [("", np.array([1.0 / dt]))]

    def peak_s(self, dt: float = 0.01) -> float:
        return 0.0


@dataclass(frozen=True)
class Gaussian(Kernel):
    """A Gaussian bump: peak ``centre_s`` seconds after onset, width ``sigma_s``.

    Defaults (peak 5 s, sigma 1.5 s) are our own choice, placing the peak where the
    haemodynamic response usually peaks (common practice: 4.5-6.5 s).
    """

    name: ClassVar[str] = "gaussian"
    centre_s: float = 5.0
    sigma_s: float = 1.5
    length_s: float = 16.0

    def shape(self, t: np.ndarray) -> np.ndarray:
        return np.exp(-0.5 * ((t - self.centre_s) / self.sigma_s) ** 2)


@dataclass(frozen=True)
class Gamma(Kernel):
    """Single gamma function after a delay.

    ``h(t) = ((t - delay)/tau)**(n - 1) * exp(-(t - delay)/tau) / (tau * (n - 1)!)`` for
    ``t > delay``. Defaults n=3, tau=1.2 s, delay=2.5 s follow Boynton et al. (1996),
    J Neurosci 16:4207-4221 (parameters from memory); the peak is at
    ``delay + (n - 1) * tau`` = 4.9 s.
    """

    name: ClassVar[str] = "gamma"
    n: float = 3.0
    tau_s: float = 1.2
    delay_s: float = 2.5
    length_s: float = 24.0

    def shape(self, t: np.ndarray) -> np.ndarray:
        return _gamma_pdf(t - self.delay_s, self.n, self.tau_s)


@dataclass(frozen=True)
class DoubleGamma(Kernel):
    """Difference of two gamma densities: a peak and a later, smaller undershoot.

    ``h(t) = g(t; a1, b1) - c * g(t; a2, b2)`` with ``g`` the gamma density of shape ``a``
    and scale ``b`` (``scipy.stats.gamma.pdf``). Defaults a1=6, a2=16, b1=b2=1 s, c=1/6
    follow Friston et al. (1998), NeuroImage 7:30-40 (parameters from memory): peak at the
    first gamma's mode, 5 s; undershoot near 15 s.
    """

    name: ClassVar[str] = "double-gamma"
    a1: float = 6.0
    a2: float = 16.0
    b1: float = 1.0
    b2: float = 1.0
    c: float = 1.0 / 6.0
    length_s: float = 32.0

    def shape(self, t: np.ndarray) -> np.ndarray:
        return _gamma_pdf(t, self.a1, self.b1) - self.c * _gamma_pdf(t, self.a2, self.b2)

    def _dispersion_derivative(self, t: np.ndarray, dt: float) -> np.ndarray:
        # Derivative with respect to the width (scale) of the first gamma, by a central
        # difference on unit-area kernels.
        eps = 0.01
        hi = _unit_area(replace(self, b1=self.b1 + eps).shape(t), dt)
        lo = _unit_area(replace(self, b1=self.b1 - eps).shape(t), dt)
        return (hi - lo) / (2 * eps)


@dataclass(frozen=True)
class FIR(Kernel):
    """Finite impulse response basis: ``n_bins`` boxes of ``bin_s`` seconds after each onset.

    Column ``k`` is 1 while the time since an onset lies in ``[k * bin_s, (k + 1) * bin_s)``,
    so its beta is the mean response in that bin, in data units. Durations are ignored.
    """

    name: ClassVar[str] = "fir"
    uses_durations: ClassVar[bool] = False
    n_bins: int = 12
    bin_s: float = 2.0
    length_s: float = 24.0

    def __post_init__(self) -> None:
        if self.n_bins < 1 or self.bin_s <= 0:
            raise InputError("FIR needs at least one bin and a positive bin width in seconds")
        object.__setattr__(self, "length_s", self.n_bins * self.bin_s)

    def basis(self, dt: float, derivatives: int = 0) -> list[tuple[str, np.ndarray]]:
        t = self.times(dt)
        out = []
        for k in range(self.n_bins):
            box = ((t >= k * self.bin_s - 1e-9) & (t < (k + 1) * self.bin_s - 1e-9)).astype(float)
            # an impulse of area 1 (1/dt in one fine bin) convolved with this box, times dt,
            # is the box itself: height 1
            out.append((f"_fir{k}", box))
        return out

    def bin_centres(self) -> np.ndarray:
        """Centre of each bin in seconds after onset."""
        return (np.arange(self.n_bins) + 0.5) * self.bin_s

    def shape(self, t: np.ndarray) -> np.ndarray:
        return ((t >= 0) & (t < self.length_s)).astype(float)


_KERNELS: dict[str, type[Kernel]] = {k.name: k for k in (Boxcar, Gaussian, Gamma, DoubleGamma, FIR)}
#: Every kernel name, in display order.
KERNEL_NAMES: tuple[str, ...] = tuple(_KERNELS)
#: Kernels fitted when the user names none.
DEFAULT_KERNELS: tuple[str, ...] = ("boxcar", "gaussian", "gamma", "double-gamma")


def get_kernel(name: str | Kernel, **params: float) -> Kernel:
    """Kernel by name with default parameters (or ``params`` overriding them).

    >>> get_kernel("gamma").peak_s()
    4.9
    >>> get_kernel("fir", n_bins=4, bin_s=1.25).length_s
    5.0
    """
    if isinstance(name, Kernel):
        return replace(name, **params) if params else name
    key = str(name).strip().lower().replace("_", "-")
    if key in ("doublegamma", "double gamma", "canonical"):
        key = "double-gamma"
    if key not in _KERNELS:
        from .inputs import excerpt

        raise InputError(f"unknown kernel '{excerpt(name)}'; choose from {', '.join(KERNEL_NAMES)}")
    try:
        return _KERNELS[key](**params)
    except TypeError as exc:
        raise InputError(f"bad parameter for kernel '{key}': {exc}") from None
