"""Whole-process timing, side by side: our command and a reference command, interleaved.

Both commands are started the same way (``subprocess.run`` of a fresh interpreter, output
to /dev/null), in alternation, so that a change of load on a shared machine hits both
alike. Each pair gives one ratio; a row reports the ratio of the medians and the spread of
the pairwise ratios (lower and upper quartile), plus the median milliseconds of each side
as secondary information.

Child processes get the parent's environment with byte-code caching switched on and
pointed at a temporary folder (``PYTHONPYCACHEPREFIX``), as in an installed package, where
pip has compiled every module; a warm-up run of each command fills it and the page cache.
"""

from __future__ import annotations

import atexit
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

_PYCACHE = tempfile.mkdtemp(prefix="vxs-bench-pycache-")
atexit.register(shutil.rmtree, _PYCACHE, ignore_errors=True)


def child_env(extra: dict[str, str] | None = None) -> dict[str, str]:
    """The environment for timed child processes (see the module docstring)."""
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    env["PYTHONPYCACHEPREFIX"] = _PYCACHE
    env.setdefault("QT_QPA_PLATFORM", "offscreen")
    root = str(Path(__file__).resolve().parents[2])
    env["PYTHONPATH"] = os.pathsep.join(
        [root, *[p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]]
    )
    if extra:
        env.update(extra)
    return env


def voxelscope_cmd(*args: str) -> list[str]:
    """``voxelscope ARGS`` as a user runs it: the installed console script when there is
    one beside this interpreter, else ``python -m voxelscope``."""
    script = Path(sys.executable).with_name("voxelscope")
    if script.exists():
        return [sys.executable, str(script), *args]
    return [sys.executable, "-m", "voxelscope", *args]


def python_cmd(code: str) -> list[str]:
    return [sys.executable, "-c", code]


def _once(cmd: Sequence[str], env: dict[str, str]) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(
        list(cmd), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env, check=False
    )
    dt = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {proc.stderr.decode()[-2000:]}")
    return dt


@dataclass
class Pair:
    """Timings of two commands measured in alternation."""

    ours: list[float]
    ref: list[float]

    @property
    def ratio(self) -> float:
        return statistics.median(self.ours) / statistics.median(self.ref)

    def spread(self) -> tuple[float, float]:
        """Lower and upper quartile of the pairwise ratios ours[i] / ref[i]."""
        r = sorted(a / b for a, b in zip(self.ours, self.ref))
        if len(r) < 4:
            return r[0], r[-1]
        q = statistics.quantiles(r, n=4)
        return q[0], q[2]

    def label(self) -> str:
        lo, hi = self.spread()
        return (
            f"ratio of medians; pairwise quartiles {lo:.2f}-{hi:.2f}; "
            f"{statistics.median(self.ours) * 1e3:.0f} vs "
            f"{statistics.median(self.ref) * 1e3:.0f} ms, n={len(self.ours)}"
        )


def side_by_side(
    ours: Sequence[str],
    ref: Sequence[str],
    repeats: int = 11,
    env: dict[str, str] | None = None,
    warmup: int = 1,
) -> Pair:
    """Time ``ours`` and ``ref`` in alternation (``repeats`` pairs after ``warmup``)."""
    env = child_env() if env is None else env
    for _ in range(warmup):
        _once(ours, env)
        _once(ref, env)
    a, b = [], []
    for i in range(repeats):
        if i % 2:  # alternate which goes first
            a.append(_once(ours, env))
            b.append(_once(ref, env))
        else:
            b.append(_once(ref, env))
            a.append(_once(ours, env))
    return Pair(a, b)


def row(name: str, pair: Pair, goal: float | None) -> tuple:
    """A runner row ``(name, ours_s, reference_s, ratio, goal, ok)`` for a ratio goal."""
    ratio = pair.ratio
    return (
        f"{name} [{pair.label()}]",
        statistics.median(pair.ours),
        statistics.median(pair.ref),
        ratio,
        "(info)" if goal is None else f"<= {goal:g}",
        None if goal is None else ratio <= goal,
    )


def machine_load() -> str:
    """One line on how busy the machine was (load averages and cores)."""
    try:
        one, five, _ = os.getloadavg()
    except OSError:  # pragma: no cover
        return "load unknown"
    return f"load average {one:.2f} (1 min), {five:.2f} (5 min) on {os.cpu_count()} cores"
