"""Tests of voxelscope/core/report.py: the standalone HTML report, CSVs and figures.

Numbers in the report are compared with ``Analysis.fit_voxel`` on the same voxel (the
function the window and ``voxelscope fit`` use) and, as an outside reference, with
statsmodels OLS ``t_test`` on the same design. The HTML is parsed with the standard
library's ``html.parser``, the CSV with ``csv``, digests checked with ``hashlib``.
"""

from __future__ import annotations

import base64
import csv
import hashlib
import io
import os
import re
from html.parser import HTMLParser

import nibabel as nib
import numpy as np
import pytest

from voxelscope import RESEARCH_CAUTION, __version__
from voxelscope.core import checks
from voxelscope.core.errors import InputError, ModelError
from voxelscope.core.events import read_events
from voxelscope.core.marks import Mark, MarkList
from voxelscope.core.model import Analysis, ModelSettings
from voxelscope.core.report import format_csv, slugify, write_report
from voxelscope.core.run import open_run

TR = 2.0
T = 70


@pytest.fixture
def demo(tmp_path):
    rng = np.random.default_rng(2024)
    shape = (6, 5, 4)
    t = np.arange(T) * TR
    box = ((t % 40) >= 10) & ((t % 40) < 26)
    data = 300 + rng.normal(0, 3, (*shape, T)) + 6 * box[None, None, None, :]
    img = nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 4.0, 1.0]))
    img.header.set_xyzt_units("mm", "sec")
    img.header["pixdim"][4] = TR
    run_path = tmp_path / "in" / "sub-02_task-y_bold.nii"
    run_path.parent.mkdir()
    nib.save(img, run_path)
    events = run_path.parent / "sub-02_task-y_events.tsv"
    events.write_text(
        "onset\tduration\ttrial_type\n"
        "6\t12\ttone\n31\t10\ttap\n52\t14\ttone\n77\t12\ttap\n96\t10\ttone\n121\t12\ttap\n"
    )
    run = open_run(run_path, use_cache=False)
    analysis = Analysis(read_events(events), run.n_volumes, run.tr)
    return run, analysis, run_path, events


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.attrs: list[tuple[str, str, str]] = []
        self.cells: list[dict] = []
        self._cell = None
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        d = dict(attrs)
        for k, v in attrs:
            self.attrs.append((tag, k, v or ""))
        if tag == "tr" and "data-kernel" in d:
            self.cells.append({"row": d["data-kernel"]})
        if tag == "td" and self.cells and "class" in d:
            self._cell = (d["class"].split()[-1], d.get("data-value"))
            self._buf = ""

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._buf += data

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            name, value = self._cell
            self.cells[-1][name] = (self._buf, value)
            self._cell = None


def _parse(path):
    p = _Collect()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def _sha(p):
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_report_numbers_equal_the_fit(demo, tmp_path):
    run, analysis, _run_path, events = demo
    settings = ModelSettings(
        noise="ols", kernels=("boxcar", "double-gamma", "fir"), contrast="tone - tap"
    )
    ijk = (2, 3, 1)
    res = write_report(
        tmp_path / "out", run, analysis, settings, voxel=ijk, inputs={"events": events}
    )
    fits = analysis.fit_voxel(run.timeseries(ijk), settings)
    html = _parse(res.html)
    assert [c["row"] for c in html.cells] == ["boxcar", "double-gamma", "fir"]
    for row, f in zip(html.cells, fits.fits):
        shown, value = row["t"]
        assert shown == f"{f.t:.2f}" and float(value) == f.t
        assert float(row["estimate"][1]) == f.estimate and float(row["variance"][1]) == f.variance
        assert int(row["df"][0]) == f.df and float(row["p"][1]) == f.p
    # outside reference: statsmodels OLS on the same design and contrast
    sm = pytest.importorskip("statsmodels.api")
    for row, f in zip(html.cells, fits.fits):
        tt = sm.OLS(run.timeseries(ijk), f.design.X).fit().t_test(f.result.weights)
        np.testing.assert_allclose(float(row["t"][1]), float(np.squeeze(tt.tvalue)), rtol=1e-9)

    rows = list(csv.DictReader(io.StringIO((tmp_path / "out" / "timeseries.csv").read_text())))
    assert len(rows) == run.n_volumes == T  # one row per volume
    assert list(rows[0]) == [
        "time_s", "signal",
        "fitted_boxcar", "residual_boxcar",
        "fitted_double-gamma", "residual_double-gamma",
        "fitted_fir", "residual_fir",
    ]  # fmt: skip
    col = lambda name: np.array([float(r[name]) for r in rows])  # noqa: E731
    np.testing.assert_array_equal(col("signal"), run.timeseries(ijk))
    np.testing.assert_array_equal(col("time_s"), np.arange(T) * TR)
    for f in fits.fits:
        np.testing.assert_array_equal(col(f"fitted_{f.kernel}"), f.fitted)
        np.testing.assert_array_equal(col(f"residual_{f.kernel}"), f.residuals)
        np.testing.assert_allclose(
            col(f"fitted_{f.kernel}") + col(f"residual_{f.kernel}"), col("signal"), rtol=1e-12
        )


def test_html_stands_alone(demo, tmp_path):
    run, analysis, _run_path, events = demo
    res = write_report(
        tmp_path / "out",
        run,
        analysis,
        ModelSettings(),
        marks=[Mark(3, 6, 4, "a"), Mark(6, 3, 0, "b")],
        inputs={"events": events},
    )
    html = _parse(res.html)
    refs = [(t, k, v) for t, k, v in html.attrs if k in ("src", "href", "srcset", "action", "data")]
    assert refs, "the page embeds its figures"
    for tag, k, v in refs:
        assert v.startswith(("data:", "#")), (tag, k, v)
    assert "link" not in html.tags and "script" not in html.tags and "iframe" not in html.tags
    text = res.html.read_text(encoding="utf-8")
    # base64 figures can spell any word ("http" turned up in one): look outside them
    prose = re.sub(r"data:[\w/+.-]+;base64,[A-Za-z0-9+/=]+", "data:", text)
    assert "url(" not in prose and "@import" not in prose and "http" not in prose
    # every anchor points at a section that exists
    ids = {v for _t, k, v in html.attrs if k == "id"}
    assert {v[1:] for _t, k, v in refs if k == "href"} <= ids
    # the embedded PNG is the figure written beside the page
    srcs = [v for t, k, v in html.attrs if t == "img" and k == "src"]
    # per mark: the signal figure and the response around the contrast's condition's onsets
    assert len(srcs) == 4
    assert text.count("Response around the onsets of <b>") == 2
    assert (
        base64.b64decode(srcs[0].split(",", 1)[1]) == (tmp_path / "out" / "01-a.png").read_bytes()
    )
    body = "".join(html.text)
    assert RESEARCH_CAUTION in body and f"voxelscope {__version__}" in body


def test_report_lists_inputs_settings_and_leaves_inputs_untouched(demo, tmp_path):
    run, analysis, run_path, events = demo
    before = {p: (_sha(p), os.stat(p).st_mtime_ns) for p in (run_path, events)}
    settings = ModelSettings(noise="ar1", highpass_s=None, onset_shift_s=1.0)
    res = write_report(
        tmp_path / "out",
        run,
        analysis,
        settings,
        voxel=(1, 1, 1),
        inputs={"events": events, "confounds": None},
    )
    assert {p: (_sha(p), os.stat(p).st_mtime_ns) for p in (run_path, events)} == before
    body = "".join(_parse(res.html).text)
    for p in (run_path, events):
        assert p.name in body and _sha(p) in body
    # the Model section speaks in words, not field names (issue 17 item 9)
    assert "Noise model" in body and "AR(1) prewhitening" in body
    assert "Onset shift" in body and "+1 s" in body
    assert "High-pass cut-off" in body and "none (no drift columns)" in body
    for internal in ("onset_shift_s", "highpass_s", "fir_bin_s", "censor_fd_mm", "ar1"):
        assert internal not in body, internal
    assert sorted(x.name for x in (tmp_path / "out").iterdir()) == [
        "figure.png", "figure.svg", "report.html", "timeseries.csv",
    ]  # fmt: skip


def test_marks_report_one_section_and_csv_per_mark(demo, tmp_path):
    run, analysis, _run_path, _events = demo
    marks = MarkList(
        [Mark(3, 6, 4, "Hearing: left!"), Mark(900, 0, 0, "far away"), Mark(6, 3, 0, "")]
    )
    settings = ModelSettings(kernels=("gamma",))
    res = write_report(tmp_path / "out", run, analysis, settings, marks=marks)
    names = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert names == [
        "01-hearing-left.csv", "01-hearing-left.png", "01-hearing-left.svg",
        "03-mark-3.csv", "03-mark-3.png", "03-mark-3.svg", "report.html",
    ]  # fmt: skip
    assert [s.number for s in res.sections] == [1, 2, 3]
    assert res.sections[1].error and "far away" in res.sections[1].error
    assert any("far away" in w for w in res.warnings)
    html = _parse(res.html)
    t_rows = [c["t"] for c in html.cells]
    for sec, shown in zip([res.sections[0], res.sections[2]], t_rows):
        noise = analysis.noise_at(run, sec.ijk, settings)  # the report's whitening
        f = analysis.fit_voxel(run.timeseries(sec.ijk), settings, noise).fits[0]
        assert sec.ijk == run.mm_to_voxel(marks[sec.number - 1].xyz_mm)
        assert shown == (f"{f.t:.2f}", repr(f.t))
        rows = list(csv.reader(io.StringIO((tmp_path / "out" / sec.csv.name).read_text())))
        assert len(rows) == T + 1


def test_existing_outputs_are_not_overwritten_without_force(demo, tmp_path):
    run, analysis, _run_path, _events = demo
    out = tmp_path / "out"
    write_report(out, run, analysis, ModelSettings(), voxel=(0, 0, 0))
    snapshot = {p.name: p.read_bytes() for p in out.iterdir()}
    with pytest.raises(InputError, match=r"report\.html already exists"):
        write_report(out, run, analysis, ModelSettings(kernels=("gamma",)), voxel=(1, 0, 0))
    assert {p.name: p.read_bytes() for p in out.iterdir()} == snapshot
    write_report(out, run, analysis, ModelSettings(kernels=("gamma",)), voxel=(1, 0, 0), force=True)
    assert sorted(p.name for p in out.iterdir()) == sorted(snapshot)  # no temp files left
    assert (out / "timeseries.csv").read_bytes() != snapshot["timeseries.csv"]


def test_bad_requests_are_one_line_errors(demo, tmp_path):
    run, analysis, run_path, _events = demo
    with pytest.raises(InputError, match="either one voxel or a list of marks"):
        write_report(tmp_path / "o", run, analysis, ModelSettings())
    with pytest.raises(InputError, match="outside the grid"):
        write_report(tmp_path / "o", run, analysis, ModelSettings(), voxel=(60, 0, 0))
    (tmp_path / "file").write_text("")
    with pytest.raises(InputError, match="is a file, not a folder"):
        write_report(tmp_path / "file", run, analysis, ModelSettings(), voxel=(0, 0, 0))
    with pytest.raises(InputError, match="is an input of this command"):
        write_report(
            run_path.parent,
            run,
            analysis,
            ModelSettings(),
            voxel=(0, 0, 0),
            inputs={"x": run_path.parent / "report.html"},
        )
    assert not (tmp_path / "o").exists()


def test_checks_that_cannot_run_are_a_note_and_bugs_surface(demo, tmp_path, monkeypatch):
    """A user-facing error from the checks (the model at this voxel) becomes a note in the
    report; any other exception is a bug and is not turned into "not available"."""
    run, analysis, _run_path, _events = demo

    def refuse(*_a, **_k):
        raise ModelError("too few volumes for the checks")

    monkeypatch.setattr(checks, "voxel_checks", refuse)
    res = write_report(tmp_path / "out", run, analysis, ModelSettings(), voxel=(0, 0, 0))
    assert "checks could not be run here: too few volumes" in res.html.read_text(encoding="utf-8")

    def broken(*_a, **_k):
        raise TypeError("a bug")

    monkeypatch.setattr(checks, "voxel_checks", broken)
    with pytest.raises(TypeError, match="a bug"):
        write_report(tmp_path / "out2", run, analysis, ModelSettings(), voxel=(0, 0, 0))


def test_checks_flags_appear_in_the_report(demo, tmp_path):
    run, analysis, _run_path, _events = demo
    settings = ModelSettings(kernels=("gamma",))
    res = write_report(tmp_path / "out", run, analysis, settings, voxel=(2, 2, 2))
    y = run.timeseries((2, 2, 2))
    flags = checks.voxel_checks(analysis, settings, "gamma", y, run=run, ijk=(2, 2, 2)).to_json()[
        "flags"
    ]
    body = "".join(_parse(res.html).text)
    for fl in flags:
        assert (fl["text"] if isinstance(fl, dict) else str(fl)) in body


def test_format_csv_and_slugify():
    assert slugify("Édge blob: motion, not brain") == "edge-blob-motion-not-brain"
    assert slugify("x" * 80) == "x" * 40
    from voxelscope.core.events import Condition

    an = Analysis([Condition("c", [3.0], [5.0])], n_volumes=12, tr=1.0)
    y = np.random.default_rng(1).normal(size=12)
    text = format_csv(an.fit_voxel(y, ModelSettings(kernels=("boxcar",), highpass_s=None)))
    rows = list(csv.reader(io.StringIO(text)))
    assert len(rows) == 13 and np.allclose([float(r[1]) for r in rows[1:]], y, rtol=0, atol=0)


def _chromium() -> str | None:
    import shutil

    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.slow
@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed (Debian: chromium)")
def test_report_renders_in_a_real_browser(demo, tmp_path):
    """Issue 17 item 9: the report as a browser draws it. Headless Chromium (Debian's package)
    renders the page to PNG; Pillow reads it. The page is not blank, the embedded figure
    loaded (its condition bands and fitted curves are on screen, which an image that
    failed to load would not give), and both research-use cautions are drawn."""
    import subprocess

    from PIL import Image

    from voxelscope.core.palette import colours

    run, analysis, _run_path, _events = demo
    res = write_report(tmp_path / "out", run, analysis, ModelSettings(), voxel=(2, 2, 2))
    shot = tmp_path / "page.png"
    cmd = [
        _chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", "--hide-scrollbars",
        f"--screenshot={shot}", "--window-size=1280,9000", res.html.as_uri(),
    ]  # fmt: skip
    subprocess.run(cmd, capture_output=True, timeout=180, check=False)
    assert shot.is_file(), "chromium wrote no screenshot"
    page = np.asarray(Image.open(shot).convert("RGB")).astype(int)
    assert page.shape[:2] == (9000, 1280)

    ink = (page < 235).any(axis=2)
    assert ink.mean() > 0.01  # not a blank page
    rows = np.where(ink.any(axis=1))[0]
    assert rows.max() - rows.min() > 1500  # header, figures, tables, model, inputs
    assert rows.max() < 8990, "the page is longer than the screenshot; make it taller"

    def near(colour: str, tol: int = 14) -> np.ndarray:
        rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)])
        return np.abs(page - rgb).sum(axis=2) <= tol

    # a condition band: the first condition's hue at the band opacity over white
    alpha = float(colours()["condition_band_alpha"])
    band = 255 - alpha * (255 - np.array([int(colours()["conditions"][0][i : i + 2], 16)
                                          for i in (1, 3, 5)]))  # fmt: skip
    band_px = (np.abs(page - band).sum(axis=2) <= 12).sum()
    assert band_px > 5000, band_px  # only the figures draw bands
    # every kernel's fitted curve, in its colour (table swatches alone are ~200 px each)
    for kernel in ModelSettings().kernels:
        if kernel == "boxcar":  # black, like the text
            continue
        assert near(colours()["kernels"][kernel]).sum() > 400, kernel
    # the research-use caution at the top and at the bottom of the page
    caution_rows = np.where(near("#fff7e0", 6).sum(axis=1) > 400)[0]
    assert caution_rows.size > 20
    assert caution_rows.min() < 400 and caution_rows.max() > rows.max() - 400


def test_every_model_setting_has_words_for_people():
    """Issue 17 item 9: the Model section shows labels, never field names."""
    from dataclasses import fields

    from voxelscope.core.report import _STYLE, SETTING_LABELS

    assert {f.name for f in fields(ModelSettings)} <= set(SETTING_LABELS)
    from voxelscope.core.palette import FIGURE_FONT

    assert f'font-family:"{FIGURE_FONT}"' in _STYLE  # the page in the figures' font
