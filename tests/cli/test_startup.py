"""What the command line imports before it does any work (voxelscope/cli/__init__.py).

Start-up time is measured in tests/benchmarks/bench_startup.py; these tests only check the
imports that make it: ``--version`` loads no numpy, ``--help`` and ``fit --help`` load no
scipy, and ``fit`` on a run loads none of the heavy scipy subpackages (stats, signal,
optimize, interpolate, ndimage, special) and no Qt (under the default AR(p) model, once the run is
cached) and no numba. Each runs in a fresh interpreter.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from tests.cli.runs import write_run

HEAVY = (
    "scipy.stats",
    "scipy.signal",
    "scipy.optimize",
    "scipy.interpolate",
    "scipy.ndimage",
    "scipy.special",  # p and z of a few t values come from the math module
)
QT = ("PySide6", "pyqtgraph")


def _loaded_after(argv: list[str], prefixes: tuple[str, ...]) -> list[str]:
    code = (
        "import sys, contextlib, io\n"
        "from voxelscope.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    try:\n"
        f"        code = main({argv!r})\n"
        "    except SystemExit as e:\n"
        "        code = e.code\n"
        "assert code == 0, code\n"
        f"print(sorted({{m.split('.')[0] + '.' + m.split('.')[1] if m.count('.') else m "
        f"for m in sys.modules if m.startswith({prefixes!r})}}))\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return eval(proc.stdout.strip().splitlines()[-1])


DASK = ("dask", "distributed")


def test_version_loads_no_numpy():
    assert _loaded_after(["--version"], ("numpy", "scipy", "nibabel", *QT, *DASK)) == []


@pytest.mark.parametrize(
    "argv", [["--help"], ["fit", "--help"], ["map", "--help"], ["sweep", "--help"]]
)
def test_help_loads_no_scipy(argv):
    assert _loaded_after(argv, ("scipy", "nibabel", *QT, *DASK)) == []


def test_fit_loads_no_heavy_scipy(tmp_path):
    """Under OLS (and AR(1)). The default AR(p) model reads the brain mask, for the
    neighbourhood its coefficients are averaged over, and the mask rule needs
    scipy.ndimage."""
    rng = np.random.default_rng(3)
    path, events = write_run(tmp_path, 500 + rng.standard_normal((4, 5, 3, 60)), 1.5)
    argv = ["fit", str(path), "--events", str(events), "--voxel", "1", "1", "1", "--noise", "ols"]
    assert _loaded_after(argv, (*HEAVY, *QT)) == []


def test_fit_on_a_cached_run_loads_no_heavy_scipy(tmp_path, monkeypatch):
    """Under the default AR(p) model too, on a compressed run while its cache is built and
    once it is (the brain mask is then read from the cache)."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    rng = np.random.default_rng(4)
    data = 500 + rng.standard_normal((6, 7, 5, 60))
    path, events = write_run(tmp_path, data, 1.5, name="sub-01_task-y_bold.nii.gz")
    argv = ["fit", str(path), "--events", str(events), "--voxel", "2", "3", "2"]
    assert _loaded_after(argv, (*HEAVY, *QT)) == []
    assert list((tmp_path / "cache" / "voxelscope" / "runs").glob("*.mask"))
    # numpy.ma too: np.unique and np.setdiff1d import it (about 20 ms), marks do not
    assert _loaded_after(argv, (*HEAVY, *QT, "numpy.ma.")) == []
    # nor what a cached run's fit does not need (issue 18): platformdirs (the cache
    # folder by the XDG rule), threadpoolctl (BLAS on one thread from the start), numba
    # (only a map's batches take the compiled loops; its import is about 0.25 s)
    assert _loaded_after(argv, ("platformdirs", "threadpoolctl", "numba", "llvmlite")) == []


def test_every_command_is_registered_and_a_broken_one_is_not_hidden(monkeypatch):
    """The full parser (``voxelscope --help``) lists every command of the dispatch table; a
    command module that fails to import raises instead of vanishing from the list."""
    import voxelscope.cli as cli

    sub = next(a for a in cli.build_parser()._actions if a.dest == "command")
    assert set(sub.choices) == set(cli._COMMAND_MODULES)
    monkeypatch.setitem(sys.modules, "voxelscope.cli.report", None)  # its import fails
    with pytest.raises(ImportError):
        cli.build_parser()


def test_a_map_command_stays_in_numpy(tmp_path):
    """``voxelscope map`` under the default AR(p) model does not import numba: loading the
    compiled loops (about 0.7 s) costs one command more than they save on its one map
    (voxelscope.core.noise.load_loops; bench_maps' whole-process rows)."""
    rng = np.random.default_rng(5)
    path, events = write_run(tmp_path, 500 + rng.standard_normal((16, 16, 10, 60)), 1.5)
    argv = ["map", str(path), "--events", str(events), "-o", str(tmp_path / "t.nii")]
    assert _loaded_after(argv, ("numba", "llvmlite", *QT)) == []
