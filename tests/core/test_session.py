"""Tests of voxelscope/core/session.py: session files, moved inputs, upgrades and autosave.

Outside references: ``hashlib.sha256`` over the whole file (Python standard library) for the
chunked digest; ``json`` for the file format; the XDG Base Directory specification
(``XDG_STATE_HOME``) for where recovery files go on Linux, as implemented by platformdirs.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sys
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from voxelscope.core import session as S
from voxelscope.core.errors import InputError
from voxelscope.core.hrf import KERNEL_NAMES
from voxelscope.core.marks import Mark, MarkList
from voxelscope.core.model import ModelSettings


def _inputs(folder: Path) -> dict[str, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    files = {
        "run": folder / "sub-01_task-x_bold.nii.gz",
        "events": folder / "sub-01_task-x_events.tsv",
        "confounds": folder / "sub-01_task-x_confounds.tsv",
    }
    for i, p in enumerate(files.values()):
        p.write_bytes(os.urandom(1000 + 37 * i))
    return files


def _session(files) -> S.Session:
    return S.Session(
        files=dict(files),
        model=ModelSettings(
            kernels=("gamma", "fir"),
            contrast="tap - tone",
            noise="ar1",
            highpass_s=None,
            confound_columns=("a", "b"),
            onset_shift_s=-1.25,
            derivatives=1,
            fir_window_s=20.0,
            fir_bin_s=2.5,
            modulators=("gain", "loss"),
            orthogonalize=True,
        ),
        kernels={"gaussian": {"sigma_s": 2.5}},
        voxel=(3, 4, 5),
        map={"kernel": "gamma", "threshold": 3.1, "two_sided": True, "colours": [1, 2]},
        marks=MarkList([Mark(1, 2, 3, "late peak", "note\twith tab"), Mark(-4, 5, -6, "é")]),
        layout="AAAA/w==",
    )


def test_round_trip_equals_original(tmp_path):
    files = _inputs(tmp_path / "data")
    s = _session(files)
    p = S.save_session(s, tmp_path / "view.voxelscope.json")
    loaded = S.load_session(p)
    assert loaded.problems == [] and loaded.warnings == []
    got = loaded.session
    assert got.files == {k: v.resolve() for k, v in files.items()}
    assert got.model == s.model
    assert got.kernels == s.kernels and got.voxel == s.voxel and got.map == s.map
    assert got.marks == s.marks and got.layout == s.layout
    data = json.loads(p.read_text(encoding="utf-8"))
    assert data["schema"] == "voxelscope-session" and data["version"] == 1
    assert data["files"]["run"]["path"] == "data/sub-01_task-x_bold.nii.gz"  # relative
    assert sorted(os.listdir(tmp_path)) == ["data", "view.voxelscope.json"]  # no temp files


settings_st = st.builds(
    ModelSettings,
    kernels=st.lists(st.sampled_from(KERNEL_NAMES), min_size=1, max_size=5, unique=True).map(tuple),
    contrast=st.one_of(st.none(), st.text(max_size=20)),
    noise=st.sampled_from(["ols", "ar1"]),
    highpass_s=st.one_of(st.none(), st.floats(1.0, 1000.0)),
    confound_columns=st.one_of(st.none(), st.lists(st.text(max_size=8), max_size=4).map(tuple)),
    onset_shift_s=st.floats(-20, 20),
    derivatives=st.sampled_from([0, 1, 2]),
    fir_window_s=st.floats(0.5, 100.0),
    fir_bin_s=st.one_of(st.none(), st.floats(0.1, 10.0)),
    modulators=st.lists(st.text(max_size=8), max_size=3).map(tuple),
    orthogonalize=st.booleans(),
)


@given(settings_st, st.dictionaries(st.text(max_size=10), st.integers() | st.text(max_size=10)))
def test_model_settings_and_map_round_trip(settings, map_settings):
    s = S.Session(model=settings, map=map_settings, layout={"splitter": [1, 2]})
    data = json.loads(json.dumps(S.session_to_json(s)))
    got, _records, warnings = S.session_from_json(data)
    assert got.model == settings and got.map == map_settings and warnings == []
    assert got.layout == {"splitter": [1, 2]}


def test_digest_is_chunked_sha256(tmp_path):
    p = tmp_path / "blob"
    p.write_bytes(os.urandom(300_001))
    assert S.file_digest(p, chunk_size=4096) == hashlib.sha256(p.read_bytes()).hexdigest()


def test_moved_file_is_reported_not_raised(tmp_path):
    files = _inputs(tmp_path / "data")
    p = S.save_session(_session(files), tmp_path / "view.voxelscope.json")
    shutil.move(files["run"], tmp_path / "elsewhere.nii.gz")
    loaded = S.load_session(p)
    assert [(q.role, q.kind) for q in loaded.problems] == [("run", "missing")]
    q = loaded.problems[0]
    assert q.stored_path == "data/sub-01_task-x_bold.nii.gz"
    assert "view.voxelscope.json" in q.message and q.stored_path in q.message
    assert "\n" not in q.message
    assert loaded.session.voxel == (3, 4, 5)  # the rest of the view still loads
    with pytest.raises(
        InputError, match=r"the run file data/sub-01_task-x_bold\.nii\.gz is missing"
    ):
        loaded.raise_for_problems()


def test_changed_file_is_reported(tmp_path):
    files = _inputs(tmp_path / "data")
    p = S.save_session(_session(files), tmp_path / "v.voxelscope.json")
    files["events"].write_bytes(b"onset\tduration\n")
    loaded = S.load_session(p)
    assert [(q.role, q.kind) for q in loaded.problems] == [("events", "digest")]
    assert "changed since the session was saved" in loaded.problems[0].message
    assert S.load_session(p, verify=False).problems == []


def test_moving_session_and_data_together_keeps_working(tmp_path):
    files = _inputs(tmp_path / "a" / "data")
    S.save_session(_session(files), tmp_path / "a" / "v.voxelscope.json")
    shutil.move(tmp_path / "a", tmp_path / "b")
    loaded = S.load_session(tmp_path / "b" / "v.voxelscope.json")
    assert loaded.problems == []
    assert loaded.session.files["run"] == (tmp_path / "b" / "data" / files["run"].name)


def test_moving_only_the_session_file_uses_the_absolute_path(tmp_path):
    files = _inputs(tmp_path / "data")
    p = S.save_session(_session(files), tmp_path / "v.voxelscope.json")
    (tmp_path / "sub").mkdir()
    moved = shutil.move(p, tmp_path / "sub" / "v.voxelscope.json")
    loaded = S.load_session(moved)
    assert loaded.problems == []
    assert loaded.session.files["run"] == files["run"]


def test_save_refuses_overwrite_without_force(tmp_path):
    p = S.save_session(S.Session(), tmp_path / "v.voxelscope.json")
    with pytest.raises(InputError, match="already exists"):
        S.save_session(S.Session(voxel=(1, 1, 1)), p)
    S.save_session(S.Session(voxel=(1, 1, 1)), p, force=True)
    assert S.load_session(p).session.voxel == (1, 1, 1)


def _write(tmp_path, data, name="s.voxelscope.json"):
    p = tmp_path / name
    p.write_text(data if isinstance(data, str) else json.dumps(data))
    return p


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"schema": "other"}, r"not a voxelscope session \(field 'schema'"),
        ({"version": 99}, r"session version 99 was written by a newer voxelscope"),
        ({"version": "1"}, r"field 'version' must be a whole number"),
        ({"model": {"noise": "ar2"}}, r"field 'model.noise' must be 'arp', 'ols' or 'ar1'"),
        ({"model": {"kernels": ["spline"]}}, r"field 'model.kernels' has unknown kernel"),
        ({"model": {"highpass_s": -5}}, r"field 'model.highpass_s' must be at least 1 s"),
        ({"voxel": [1, 2]}, r"field 'voxel' must be \[i, j, k\]"),
        ({"files": {"run": {"sha256": "x"}}}, r"field 'files.run.path' must be text"),
        ({"marks": [{"x_mm": "a"}]}, r"field 'marks' is not valid"),
        ({"kernels": {"gamma": {"k": "big"}}}, r"field 'kernels.gamma.k' must be a number"),
        ({"map": {"stat": "effect"}}, r"field 'map.stat' is 'effect'; use one of t, z, estimate"),
    ],
)
def test_bad_fields_give_one_line_naming_file_and_field(tmp_path, change, match):
    data = S.session_to_json(S.Session())
    data.update(change)
    p = _write(tmp_path, data)
    with pytest.raises(InputError, match=match) as err:
        S.load_session(p)
    assert str(p) in str(err.value) and "\n" not in str(err.value)


def test_a_session_with_the_earlier_name_of_the_estimate_opens(tmp_path):
    """Before the contrast estimate was named ``estimate`` everywhere, a session saved the
    Map part's statistic as ``beta``. Such a file (written out here as those versions wrote
    it) opens with the statistic ``estimate``; saved again, it says ``estimate``."""
    text = """{
 "schema": "voxelscope-session",
 "version": 1,
 "files": {},
 "model": {"noise": "ols", "kernels": ["gamma", "double-gamma"]},
 "voxel": [2, 3, 4],
 "map": {"source": "model", "kernel": "gamma", "stat": "beta", "threshold": 2.5,
         "opacity": 0.8, "visible": true, "colour_scale": "CET-D1"}
}"""
    loaded = S.load_session(_write(tmp_path, text))
    assert loaded.problems == [] and loaded.warnings == []
    assert loaded.session.map["stat"] == "estimate" and loaded.session.map["threshold"] == 2.5
    assert S.session_to_json(loaded.session)["map"]["stat"] == "estimate"


def test_invalid_json_and_missing_file(tmp_path):
    p = _write(tmp_path, '{"schema": "voxelscope-session",\n "version": 1,,}')
    with pytest.raises(InputError, match=r"not valid JSON \(line 2"):
        S.load_session(p)
    with pytest.raises(InputError, match="session file not found"):
        S.load_session(tmp_path / "none.json")


def test_unknown_model_field_is_a_warning(tmp_path):
    data = S.session_to_json(S.Session())
    data["model"]["smoothing"] = 4
    loaded = S.load_session(_write(tmp_path, data))
    assert any("smoothing" in w for w in loaded.warnings)


def test_upgrade_hook_runs_for_older_versions(tmp_path, monkeypatch):
    def from_0(d):
        d["model"] = {"noise": d.pop("noise_model")}
        return d

    data = S.session_to_json(S.Session())
    data.pop("model")
    data.update(version=0, noise_model="ar1")
    p = _write(tmp_path, data)
    with pytest.raises(InputError, match="version 0 is not supported"):
        S.load_session(p)
    monkeypatch.setitem(S._UPGRADES, 0, from_0)
    assert S.load_session(p).session.model.noise == "ar1"


def test_recovery_write_read_clear(tmp_path):
    files = _inputs(tmp_path / "data")
    assert S.read_recovery(directory=tmp_path / "state") is None
    p = S.write_recovery(_session(files), directory=tmp_path / "state")
    assert p.parent == tmp_path / "state"
    rec = S.read_recovery(directory=tmp_path / "state")
    assert rec is not None and rec.session.marks == _session(files).marks
    data = json.loads(p.read_text(encoding="utf-8"))
    assert Path(data["files"]["run"]["path"]).is_absolute()  # recovery keeps absolute paths
    S.write_recovery(S.Session(voxel=(0, 0, 1)), directory=tmp_path / "state")  # replaces
    assert S.read_recovery(directory=tmp_path / "state").session.voxel == (0, 0, 1)
    assert S.clear_recovery(directory=tmp_path / "state") is True
    assert S.clear_recovery(directory=tmp_path / "state") is False
    assert os.listdir(tmp_path / "state") == []


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="XDG applies on Linux")
def test_autosave_dir_honours_xdg_state_home(tmp_path, monkeypatch):
    """XDG Base Directory specification: state files go under $XDG_STATE_HOME."""
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg"))
    assert S.autosave_dir() == tmp_path / "xdg" / "voxelscope"
    assert S.autosave_path("win 2").name == "win_2.voxelscope.json"
