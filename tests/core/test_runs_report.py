"""Tests of voxelscope.core.runs_report: several-run reports.

The combined numbers in the page and in combined.csv are checked against the fixed-effects
formulas (common practice) on statsmodels OLS fits of each run (reference library), and
Cochran's Q p against scipy.stats.chi2 (Cochran 1954).
"""

from __future__ import annotations

import csv
import doctest
import io
import re

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from voxelscope import RESEARCH_CAUTION
from voxelscope.core import runs_report
from voxelscope.core.errors import InputError
from voxelscope.core.events import Condition
from voxelscope.core.marks import Mark
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.run import open_run
from voxelscope.core.runs_report import write_runs_report

TR = 1.5
T = 80


def test_doctests():
    assert doctest.testmod(runs_report).failed == 0


def _runs(tmp_path, n=2):
    rng = np.random.default_rng(9)
    runs, analyses = [], []
    for i in range(n):
        a = Analysis([Condition("tone", [6.0 + i, 50.0], [12.0, 12.0])], n_volumes=T, tr=TR)
        x = a.design("gamma", ModelSettings()).column("tone")
        data = 300 + rng.standard_normal((4, 4, 3, T)) * 3 + (i + 1) * 5 * x
        img = nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]))
        img.header["pixdim"][4] = TR
        img.header.set_xyzt_units("mm", "sec")
        p = tmp_path / f"s_run-{i + 1}_bold.nii"
        nib.save(img, p)
        runs.append(open_run(p))
        analyses.append(a)
    return runs, analyses


def test_voxel_report_numbers_files_and_caution(tmp_path):
    runs, analyses = _runs(tmp_path)
    settings = ModelSettings(noise="ols", kernels=("gamma", "boxcar"))
    before = [r.path.read_bytes() for r in runs]
    res = write_runs_report(
        tmp_path / "rep", runs, analyses, settings, ["run-1", "run-2"], voxel=(1, 2, 1), scale=1
    )
    names = sorted(p.name for p in res.files)
    assert names == sorted(
        ["report.html", "combined.csv", "runs.png", "runs.svg"]
        + [f"run-{i}.{e}" for i in (1, 2) for e in ("csv", "png", "svg")]
    )
    page = res.html.read_text(encoding="utf-8")
    assert page.count(RESEARCH_CAUTION) == 2
    rows = list(csv.DictReader(io.StringIO((tmp_path / "rep" / "combined.csv").read_text())))
    assert [r["run"] for r in rows] == ["run-1", "run-1", "run-2", "run-2", "combined", "combined"]
    for kernel in ("gamma", "boxcar"):
        b, v, d = [], [], []
        for r, a in zip(runs, analyses):
            des = a.design(kernel, settings)
            ref = sm.OLS(r.timeseries((1, 2, 1)), des.X).fit()
            tt = ref.t_test(a.contrast_weights(kernel, settings))
            b.append(float(np.squeeze(tt.effect)))
            v.append(float(np.squeeze(tt.sd)) ** 2)
            d.append(ref.df_resid)
        w = 1 / np.asarray(v)
        beta = float(np.sum(w * b) / w.sum())
        t = beta * np.sqrt(w.sum())
        q = float(np.sum(w * (np.asarray(b) - beta) ** 2))
        row = next(r for r in rows if r["run"] == "combined" and r["kernel"] == kernel)
        assert float(row["t"]) == pytest.approx(t, rel=1e-9)
        assert float(row["df"]) == sum(d)
        assert float(row["q_p"]) == pytest.approx(stats.chi2.sf(q, 1), rel=1e-7)
        shown = re.search(
            rf"<tr data-kernel='{kernel}'>.*?<td class='num t' data-value=\"([^\"]+)\"",
            page.split("class='combined'")[1],
            flags=re.S,
        )
        assert float(shown.group(1)) == pytest.approx(t, rel=1e-12)
    assert [r.path.read_bytes() for r in runs] == before
    # existing outputs are kept without force
    with pytest.raises(InputError):
        write_runs_report(tmp_path / "rep", runs, analyses, settings, ["a", "b"], voxel=(1, 2, 1))


def test_marks_report_and_a_mark_outside(tmp_path):
    runs, analyses = _runs(tmp_path, n=3)
    marks = [Mark(3.0, 6.0, 3.0, "Hearing, right", "late"), Mark(300.0, 0, 0, "far", "")]
    res = write_runs_report(
        tmp_path / "m",
        runs,
        analyses,
        ModelSettings(kernels=("gamma",)),
        ["run-1", "run-2", "run-3"],
        marks=marks,
        scale=1,
        checks=False,
    )
    assert (tmp_path / "m" / "01-hearing-right-runs.png").exists()
    assert (tmp_path / "m" / "01-hearing-right-run-3.csv").exists()
    assert any("far" in w and "cannot be reported" in w for w in res.warnings)
    assert res.sections[0].voxels == [(1, 2, 1)] * 3
    with pytest.raises(InputError):
        write_runs_report(tmp_path / "x", runs, analyses, ModelSettings(), ["a", "b", "c"])
