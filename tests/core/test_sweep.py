"""The study-wide sweep (voxelscope/core/sweep.py, sweep_out.py) on a generated study.

The study (tests/sweep_study.py, invented data) plants a real response at the centre of
the brain in every run and, in one run, head motion locked to the task that shows at the
brain's edge. The sweep must find the response in every subject and flag the artifact.
The Dask scheduler here is a local cluster of threads in the test process (loopback);
the command-line tests compare it with a cluster of worker processes.
"""

from __future__ import annotations

import csv
import doctest
import io
import json
import re

import numpy as np
import pytest

from tests.sweep_study import ARTIFACT, CENTRE, EDGE_PATCH, make_study
from voxelscope.core import sweep, sweep_out
from voxelscope.core.errors import InputError
from voxelscope.core.model import ModelSettings
from voxelscope.core.session import load_session
from voxelscope.core.sweep import (
    SweepSettings,
    plan_sweep,
    run_sweep,
    sweep_run,
)
from voxelscope.core.sweep_out import CAUTION, FINDING_COLUMNS, write_outputs


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    return make_study(tmp_path_factory.mktemp("study") / "ds", broken=True)


@pytest.fixture(scope="module")
def scheduler():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=1,
        threads_per_worker=2,
        processes=False,
        protocol="tcp://",
        host="127.0.0.1",
        dashboard_address=":0",
    )
    yield cluster.scheduler_address
    cluster.close()


@pytest.fixture(scope="module")
def swept(study, scheduler, tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "out"
    settings = SweepSettings(ModelSettings())
    seen = []
    result = run_sweep(
        study, out, settings, scheduler=scheduler, progress=lambda *a: seen.append(a)
    )
    rows = write_outputs(result, settings)
    return {"out": out, "result": result, "rows": rows, "settings": settings, "progress": seen}


def _table(out):
    text = (out / "findings.tsv").read_text()
    return list(csv.DictReader(io.StringIO(text), delimiter="\t"))


def near(row, voxel, tol=1):
    ijk = (int(row["peak_i"]), int(row["peak_j"]), int(row["peak_k"]))
    return max(abs(a - b) for a, b in zip(ijk, voxel)) <= tol


def test_plan_takes_the_preprocessed_runs_with_events(study):
    plan = plan_sweep(study, SweepSettings(ModelSettings()))
    assert len(plan.runs) == 7  # 3 subjects x 2 runs + the broken one; raw copies left out
    assert all(j.dataset == "prep" for j in plan.runs)
    assert [s.subject for s in plan.subjects] == ["01", "02", "03"]
    assert all(len(s.run_keys) == 2 for s in plan.subjects)
    assert len({j.key for j in plan.runs}) == 7


def test_plan_refuses_a_study_without_runs_with_events(tmp_path, study):
    with pytest.raises(InputError, match="no runs with events of task 'other'"):
        plan_sweep(study, SweepSettings(ModelSettings(), task="other"))
    with pytest.raises(InputError, match="not a folder"):
        plan_sweep(tmp_path / "missing", SweepSettings(ModelSettings()))


def test_the_table_has_the_issue_columns_flagged_first(swept):
    rows = _table(swept["out"])
    assert list(rows[0].keys()) == list(FINDING_COLUMNS)
    flagged = [bool(r["flags"]) for r in rows]
    assert flagged == sorted(flagged, reverse=True)  # flagged rows first
    assert {r["run"] for r in rows} >= {"1", "2", "all"}


def test_the_real_response_is_found_in_every_subject(swept):
    rows = _table(swept["out"])
    for sub in ("01", "02", "03"):
        combined = [r for r in rows if r["subject"] == sub and r["run"] == "all"]
        assert any(near(r, CENTRE) and float(r["t"]) > 6 for r in combined), sub
        for run in ("1", "2"):
            mine = [r for r in rows if r["subject"] == sub and r["run"] == run]
            assert any(near(r, CENTRE) for r in mine), (sub, run)
    # nowhere else in the clean subjects: one cluster per map
    clean = [r for r in rows if r["subject"] in ("01", "03")]
    assert all(near(r, CENTRE) for r in clean)


def test_the_motion_artifact_at_the_edge_is_flagged(swept):
    rows = _table(swept["out"])
    sub, run = ARTIFACT
    edge = [r for r in rows if r["subject"] == sub and r["run"] == run and near(r, EDGE_PATCH[0])]
    assert len(edge) == 1
    flags = edge[0]["flags"].split(";")
    assert "task-motion" in flags and "edge" in flags and "this-run-only" in flags
    assert float(edge[0]["task_motion_r"]) > 0.5 and float(edge[0]["estimate_kept"]) < 0.5
    assert float(edge[0]["edge_mm"]) <= 6.0
    # the real response in the same run keeps its effect once motion joins the model
    real = [r for r in rows if r["subject"] == sub and r["run"] == run and near(r, CENTRE)]
    assert "task-motion" not in real[0]["flags"] and float(real[0]["estimate_kept"]) > 0.5
    # the combined map still shows the edge, flagged
    comb = [r for r in rows if r["subject"] == sub and r["run"] == "all" and near(r, EDGE_PATCH[0])]
    assert comb and {"task-motion", "edge"} <= set(comb[0]["flags"].split(";"))


def test_a_failing_run_is_a_row_with_its_reason(swept):
    rows = _table(swept["out"])
    failed = [r for r in rows if r["flags"] == "failed"]
    assert len(failed) == 1 and failed[0]["subject"] == "09"
    assert "not a NIfTI image" in failed[0]["reason"] and "\n" not in failed[0]["reason"]
    assert rows.index(failed[0]) < [bool(r["flags"]) for r in rows].index(False)


def test_progress_counts_every_task(swept):
    seen = [p for (p,) in swept["progress"]]
    last = seen[-1]
    assert (last.runs_done, last.runs, last.subjects_done, last.subjects) == (7, 7, 3, 3)
    assert last.fraction == 1.0 and seen[0].runs_done == 0
    done = [p.runs_done + p.subjects_done for p in seen]
    assert done == sorted(done) and done[-1] == 10


def test_resumed_sweep_redoes_nothing(swept, study, scheduler):
    out = swept["out"]
    before = {p.name: p.stat().st_mtime_ns for p in (out / "runs").iterdir()}
    again = run_sweep(study, out, swept["settings"], scheduler=scheduler)
    assert again.computed == []
    assert {p.name: p.stat().st_mtime_ns for p in (out / "runs").iterdir()} == before
    table = (out / "findings.tsv").read_text()
    write_outputs(again, swept["settings"])
    assert (out / "findings.tsv").read_text() == table


def _as_earlier_layout(out, study, settings, monkeypatch):
    """Turn a sweep's output folder into what the code before RESULTS_FORMAT 2 wrote: the
    contrast estimate saved as ``beta`` (the .npz key, the findings' keys) and fingerprints
    whose settings digest has no format in it (the earlier ``SweepSettings.digest``)."""
    import hashlib

    def earlier_digest(self):
        text = json.dumps(self.to_json(), sort_keys=True, default=str)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    renamed = {"estimate": "beta", "estimate_kept": "beta_kept"}

    def rename(obj):
        if isinstance(obj, dict):
            return {renamed.get(k, k): rename(v) for k, v in obj.items()}
        if isinstance(obj, list):
            return [rename(v) for v in obj]
        return obj

    plan = plan_sweep(study, settings)
    with monkeypatch.context() as m:
        m.setattr(SweepSettings, "digest", earlier_digest)
        prints = {j.key: j.fingerprint(settings) for j in plan.runs}
        for sj in plan.subjects:
            parts = [settings.digest(), *(prints[k] for k in sj.run_keys)]
            prints[sj.key] = hashlib.sha256("\n".join(parts).encode("utf-8")).hexdigest()
    for folder in ("runs", "subjects"):
        for path in (out / folder).glob("*.json"):
            data = rename(json.loads(path.read_text()))
            data["fingerprint"] = prints[data["key"]]
            path.write_text(json.dumps(data))
    for path in (out / "runs").glob("*.npz"):
        with np.load(path) as z:
            arrays = {renamed.get(k, k): z[k] for k in z.files}
        np.savez_compressed(path, **arrays)
    return prints


def test_results_saved_by_the_earlier_layout_are_computed_again(
    swept, study, scheduler, tmp_path, monkeypatch
):
    """A sweep resumed on a folder written before the estimate was named ``estimate`` (its
    .npz key and findings said ``beta``) neither crashes nor mixes the two: every run and
    combination is computed again and the table is the one a fresh sweep writes."""
    import shutil

    out = tmp_path / "out"
    shutil.copytree(swept["out"], out)
    settings = swept["settings"]
    prints = _as_earlier_layout(out, study, settings, monkeypatch)
    key = swept["result"].runs[0]["key"]
    assert json.loads((out / "runs" / f"{key}.json").read_text())["fingerprint"] == prints[key]
    with np.load(out / "runs" / f"{key}.npz") as z:
        assert "beta" in z.files and "estimate" not in z.files
    again = run_sweep(study, out, settings, scheduler=scheduler)
    plan = plan_sweep(study, settings)
    assert sorted(again.computed) == sorted(
        [f"run {j.key}" for j in plan.runs] + [f"subject {s.key}" for s in plan.subjects]
    )
    with np.load(out / "runs" / f"{key}.npz") as z:
        assert set(z.files) == {"estimate", "variance", "mask", "edge"}
    write_outputs(again, settings)
    assert (out / "findings.tsv").read_text() == (swept["out"] / "findings.tsv").read_text()


def test_a_changed_input_is_swept_again(swept, study, tmp_path):
    out = tmp_path / "out"
    (out / "runs").mkdir(parents=True)
    settings = swept["settings"]
    job = plan_sweep(study, settings).runs[0]
    first = sweep_run(job, settings, str(out))
    assert first["status"] == "ok" and not first["reused"]
    assert sweep_run(job, settings, str(out))["reused"]
    assert not sweep_run(job, SweepSettings(ModelSettings(), threshold=4.0), str(out))["reused"]
    events = next(p for p in job.inputs if p.endswith("_events.tsv"))
    st = __import__("os").stat(events)
    __import__("os").utime(events, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    assert not sweep_run(job, settings, str(out))["reused"]


def test_each_finding_has_a_session_at_its_peak(swept):
    out = swept["out"]
    rows = _table(out)
    for r in rows:
        if r["flags"] == "failed":
            assert r["session_file"] == ""
            continue
        loaded = load_session(out / r["session_file"])  # digests checked
        assert loaded.problems == []
        s = loaded.session
        assert s.voxel == (int(r["peak_i"]), int(r["peak_j"]), int(r["peak_k"]))
        assert s.model.kernels == ("double-gamma",) and s.model.noise == "arp"
        assert s.map["threshold"] == 3.5 and s.map["kernel"] == "double-gamma"
        roles = set(s.files)
        assert {"run", "events", "confounds"} <= roles
        assert ("run 2" in roles) == (r["run"] == "all")


def test_the_page_is_self_contained(swept):
    page = (swept["out"] / "index.html").read_text()
    assert "<script>" in page and "<style>" in page
    assert not re.search(r"(src|href)=\"(https?:)?//", page)  # nothing fetched
    n_figures = page.count('src="data:image/png;base64,')
    assert n_figures == sum(1 for r in swept["rows"] if r["_finding"] is not None)
    assert page.count(CAUTION) == 2
    assert "settings.json" in page and "SHA-256" in page
    for r in _table(swept["out"]):
        if r["session_file"]:
            assert f'href="{r["session_file"]}"' in page
    settings = json.loads((swept["out"] / "settings.json").read_text())
    assert settings["kernel"] == "double-gamma" and settings["model"]["noise"] == "arp"


def test_run_results_are_small(swept):
    """Only peaks, flags and small figures travel back from a worker."""
    for r in swept["result"].runs:
        figures = [f.pop("figure_png") for f in json.loads(json.dumps(r))["findings"]]
        assert all(len(f) < 64_000 for f in figures)  # a few tens of KB each
        rest = {
            **r,
            "findings": [{k: v for k, v in f.items() if k != "figure_png"} for f in r["findings"]],
        }
        assert len(json.dumps(rest)) < 20_000
    npz = next((swept["out"] / "runs").glob("*.npz"))
    with np.load(npz) as z:
        assert set(z.files) == {"estimate", "variance", "mask", "edge"}


def test_doctests():
    for module in (sweep, sweep_out):
        assert doctest.testmod(module, optionflags=doctest.ELLIPSIS).failed == 0


def test_an_unexpected_error_is_a_row_and_is_tried_again(study, tmp_path, monkeypatch):
    out = tmp_path / "out"
    (out / "runs").mkdir(parents=True)
    settings = SweepSettings(ModelSettings())
    job = plan_sweep(study, settings).runs[0]

    def boom(*args):
        raise RuntimeError("disk went away")

    monkeypatch.setattr(sweep, "_sweep_run", boom)
    res = sweep_run(job, settings, str(out))
    assert res["status"] == "failed" and "RuntimeError: disk went away" in res["reason"]
    assert not list((out / "runs").iterdir())  # not saved: the next sweep tries again
    lost = sweep._lost(job, MemoryError("out of memory"))
    assert lost["status"] == "failed" and "the worker stopped" in lost["reason"]


def test_importing_the_sweep_loads_no_dask_and_no_qt():
    import subprocess
    import sys

    code = (
        "import sys, voxelscope.core.sweep, voxelscope.core.sweep_out\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] in "
        "('dask', 'distributed', 'PySide6', 'pyqtgraph')))"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "[]"
