"""Fault injection on the command line: hostile or unlucky input and output paths.

Every case runs the real command (``voxelscope.cli.main``, or a subprocess where the whole
process matters) and checks the promises of the project: exit code 2, exactly one line on
stderr naming the file and the field, no traceback, and inputs byte-for-byte unchanged.
Each test's name says what it protects.
"""

from __future__ import annotations

import hashlib
import os
import struct
import subprocess
import sys

import numpy as np
import pytest

from tests.cli.runs import write_run
from voxelscope.cli import main

TR = 1.5


def _run(tmp_path, name="sub-01_task-x_bold.nii"):
    rng = np.random.default_rng(3)
    data = 1000 + rng.standard_normal((4, 5, 3, 90)) * 10
    return write_run(tmp_path, data, TR, name=name)


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("voxelscope: error: "), err
    assert "Traceback" not in err
    return lines[0]


def _fit(run, *extra):
    return ["fit", str(run), "--voxel", "1", "1", "1", *map(str, extra)]


# ------------------------------------------------------------------ outputs never replace inputs


def test_map_clusters_over_events_is_refused_even_with_force(tmp_path, capsys):
    run, events = _run(tmp_path)
    before = _sha(events)
    argv = ["map", str(run), "-o", str(tmp_path / "m.nii"), "--clusters", str(events)]
    code = main([*argv, "--threshold", "2", "--force"])
    assert code == 2
    assert "is an input of this command" in _one_error_line(capsys)
    assert _sha(events) == before


def test_map_clusters_over_sidecar_is_refused(tmp_path, capsys):
    run, _ = _run(tmp_path)
    sidecar = tmp_path / "sub-01_task-x_bold.json"
    sidecar.write_text('{"RepetitionTime": 1.5}')
    before = _sha(sidecar)
    argv = ["map", str(run), "-o", str(tmp_path / "m.nii"), "--clusters", str(sidecar)]
    assert main([*argv, "--threshold", "2", "--force"]) == 2
    assert "is an input of this command" in _one_error_line(capsys)
    assert _sha(sidecar) == before


@pytest.mark.parametrize("link", ["symlink", "hardlink"])
def test_map_output_through_a_link_to_the_run_is_refused(tmp_path, capsys, link):
    run, _ = _run(tmp_path)
    before = _sha(run)
    out = tmp_path / "out.nii"
    (os.symlink if link == "symlink" else os.link)(run, out)
    assert main(["map", str(run), "-o", str(out), "--force"]) == 2
    assert "is an input of this command" in _one_error_line(capsys)
    assert _sha(run) == before


def test_map_over_an_existing_file_needs_force(tmp_path, capsys):
    run, _ = _run(tmp_path)
    out = tmp_path / "old.nii"
    out.write_bytes(b"keep me")
    assert main(["map", str(run), "-o", str(out)]) == 2
    assert "already exists; use --force" in _one_error_line(capsys)
    assert out.read_bytes() == b"keep me"


def test_report_into_the_run_path_is_refused(tmp_path, capsys):
    run, _ = _run(tmp_path)
    before = _sha(run)
    assert main(["report", str(run), "--voxel", "1", "1", "1", "-o", str(run), "--force"]) == 2
    _one_error_line(capsys)
    assert _sha(run) == before


@pytest.mark.parametrize("target", ["run", "events"])
def test_view_screenshot_over_an_input_is_refused(tmp_path, capsys, monkeypatch, target):
    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")
    run, events = _run(tmp_path)
    victim = run if target == "run" else events
    before = _sha(victim)
    code = main(["view", str(run), "--screenshot", str(victim), "--force"])
    assert code == 2
    assert "is an input of this command" in _one_error_line(capsys)
    assert _sha(victim) == before


def test_view_screenshot_over_an_existing_file_needs_force(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")
    run, _ = _run(tmp_path)
    png = tmp_path / "old.png"
    png.write_bytes(b"old picture")
    assert main(["view", str(run), "--screenshot", str(png)]) == 2
    assert "already exists; use --force" in _one_error_line(capsys)
    assert png.read_bytes() == b"old picture"


# ------------------------------------------------------------------ damaged NIfTI headers


def _patched(run, tmp_path, name, offset, fmt, value):
    raw = bytearray(run.read_bytes())
    struct.pack_into(fmt, raw, offset, value)
    out = tmp_path / name
    out.write_bytes(bytes(raw))
    return out


# NIfTI-1 header offsets (the standard's nifti_1_header struct): dim at 40 (int16 x 8),
# datatype at 70, vox_offset at 108 (float32), scl_slope 112, scl_inter 116.
HEADER_FAULTS = [
    ("negative_dim", 44, "<h", -3, "dim[2] is -3"),
    ("dim0_nine", 40, "<h", 9, "dim[0] is 9"),
    ("nan_scl_inter", 116, "<f", float("nan"), "scl_inter is nan"),
    ("vox_offset_16", 108, "<f", 16.0, "vox_offset is 16"),
    ("vox_offset_1e12", 108, "<f", 1e12, "vox_offset is 1e+12"),
    ("unknown_datatype", 70, "<h", 1234, "datatype is 1234"),
    ("huge_dims", 40, "<8h", (4, 30000, 30000, 30000, 90, 1, 1, 1), "dim gives"),
]


@pytest.mark.parametrize(("case", "offset", "fmt", "value", "says"), HEADER_FAULTS)
def test_bad_header_is_one_line_naming_the_field(tmp_path, capsys, case, offset, fmt, value, says):
    run, events = _run(tmp_path)
    values = value if isinstance(value, tuple) else (value,)
    raw = bytearray(run.read_bytes())
    struct.pack_into(fmt, raw, offset, *values)
    bad = tmp_path / f"{case}_bold.nii"
    bad.write_bytes(bytes(raw))
    before = _sha(bad)
    assert main([*_fit(bad, "--events", events)]) == 2
    line = _one_error_line(capsys)
    assert str(bad) in line and says in line
    assert _sha(bad) == before


def test_bad_header_in_a_compressed_run_is_one_line(tmp_path, capsys):
    import gzip

    run, events = _run(tmp_path)
    raw = bytearray(run.read_bytes())
    struct.pack_into("<h", raw, 44, -3)
    bad = tmp_path / "neg_bold.nii.gz"
    bad.write_bytes(gzip.compress(bytes(raw)))
    assert main([*_fit(bad, "--events", events)]) == 2
    assert "dim[2] is -3" in _one_error_line(capsys)


def test_nibabel_log_lines_never_reach_stderr(tmp_path):
    """A header nibabel would 'fix' with a log line (dim[0] = 9 looks byte-swapped to it):
    the whole process prints our one line and nothing else."""
    run, events = _run(tmp_path)
    bad = _patched(run, tmp_path, "nine_bold.nii", 40, "<h", 9)
    proc = subprocess.run(
        [sys.executable, "-m", "voxelscope.cli", *_fit(bad, "--events", events)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("voxelscope: error:")
    assert "not recognized" not in proc.stderr


# ------------------------------------------------------------------ text inputs


def test_dev_zero_as_events_is_refused_without_reading_it(tmp_path, capsys):
    run, _ = _run(tmp_path)
    assert main(_fit(run, "--events", "/dev/zero")) == 2
    assert "is a device" in _one_error_line(capsys)


def test_dev_zero_as_confounds_is_refused(tmp_path, capsys):
    run, events = _run(tmp_path)
    assert main(_fit(run, "--events", events, "--confounds", "/dev/zero")) == 2
    assert "is a device" in _one_error_line(capsys)


def test_huge_events_file_is_refused_early_with_its_size(tmp_path, capsys):
    run, _ = _run(tmp_path)
    big = tmp_path / "big_events.tsv"
    with open(big, "wb") as fh:  # sparse: no disk used
        fh.truncate(5 * 1024**3)
    assert main(_fit(run, "--events", big)) == 2
    line = _one_error_line(capsys)
    assert "5.0 GiB" in line and "big_events.tsv" in line


@pytest.mark.skipif(not os.path.exists("/proc/self/environ"), reason="Linux /proc")
def test_environment_file_as_events_does_not_leak_it(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("VOXELSCOPE_SECRET_PROBE", "s3cr3t-value")
    run, _ = _run(tmp_path)
    assert main(_fit(run, "--events", "/proc/self/environ")) == 2
    line = _one_error_line(capsys)
    assert "s3cr3t" not in line and "VOXELSCOPE_SECRET_PROBE" not in line


def test_long_header_line_is_quoted_only_as_an_excerpt(tmp_path, capsys):
    run, _ = _run(tmp_path)
    ev = tmp_path / "odd_events.tsv"
    ev.write_text("PRIVATE-" + "x" * 5000 + "\n1\t2\n")
    assert main(_fit(run, "--events", ev)) == 2
    line = _one_error_line(capsys)
    assert len(line) < 400 and "x" * 60 not in line


@pytest.mark.parametrize(
    ("encoding", "says"), [("latin-1", "Latin-1"), ("utf-16", "UTF-16"), ("utf-32", "UTF-32")]
)
def test_other_text_encodings_say_which_to_use(tmp_path, capsys, encoding, says):
    run, _ = _run(tmp_path)
    ev = tmp_path / "enc_events.tsv"
    ev.write_bytes("onset\tduration\ttrial_type\n6\t12\tcafé\n".encode(encoding))
    assert main(_fit(run, "--events", ev)) == 2
    line = _one_error_line(capsys)
    assert says in line and "UTF-8" in line


def test_unreadable_events_are_called_unreadable(tmp_path, capsys, monkeypatch):
    """Permission denied (simulated: the tests may run as root) says so."""
    import builtins

    run, events = _run(tmp_path)
    real_open = builtins.open

    def deny(file, *a, **k):
        if str(file) == str(events):
            raise PermissionError(13, "Permission denied", str(file))
        return real_open(file, *a, **k)

    monkeypatch.setattr(builtins, "open", deny)
    assert main(_fit(run, "--events", events)) == 2
    assert "unreadable (permission denied)" in _one_error_line(capsys)


def test_unreadable_run_is_called_unreadable_not_not_nifti(tmp_path, capsys, monkeypatch):
    run, events = _run(tmp_path)
    real_access = os.access
    monkeypatch.setattr(
        os, "access", lambda p, m, **k: False if str(p) == str(run) else real_access(p, m, **k)
    )
    assert main(_fit(run, "--events", events)) == 2
    line = _one_error_line(capsys)
    assert "unreadable (permission denied)" in line and "not a NIfTI" not in line


def test_deeply_nested_sidecar_is_one_line(tmp_path, capsys):
    run, events = _run(tmp_path)
    sidecar = tmp_path / "sub-01_task-x_bold.json"
    sidecar.write_text("[" * 200_000 + "]" * 200_000)
    assert main(_fit(run, "--events", events)) == 2
    assert "nests deeper than" in _one_error_line(capsys)


def test_control_characters_in_condition_names_do_not_reach_the_terminal(tmp_path, capsys):
    run, _ = _run(tmp_path)
    ev = tmp_path / "esc_events.tsv"
    ev.write_text("onset\tduration\ttrial_type\n6\t12\t\x1b[2Jtone\u202e\n30\t12\ttap\n")
    assert main(_fit(run, "--events", ev)) == 0
    out = capsys.readouterr()
    assert "\x1b" not in out.out + out.err and "\u202e" not in out.out + out.err
    assert "tone" in out.out


# ------------------------------------------------------------------ absurd option values


@pytest.mark.parametrize(
    ("option", "says"),
    [
        (["--kernels", "fir", "--fir-bin", "1e9"], "--fir-bin must be at most 600 s"),
        (["--kernels", "fir", "--fir-window", "1e9"], "--fir-window must be at most 600 s"),
        (["--highpass", "1e-320"], "--highpass must be at least 1 s"),
        (["--onset-shift", "nan"], "--onset-shift must be a finite number of seconds"),
        (["--onset-shift", "inf"], "--onset-shift must be a finite number"),
        (["--tr", "1e-320"], "--tr must be at least 0.01 s"),
        (["--contrast", "1e309*tap"], "coefficient 1e309 is not a number between"),
        (["--contrast", "nan*tap"], "unknown name"),
        (["--contrast", "2*tap+"], "expected a condition name after '+' at character 6"),
    ],
)
def test_absurd_option_values_are_one_line(tmp_path, capsys, option, says):
    run, events = _run(tmp_path)
    assert main(_fit(run, "--events", events, *option)) == 2
    assert says in _one_error_line(capsys)


def test_long_contrast_is_echoed_only_as_an_excerpt(tmp_path, capsys):
    run, events = _run(tmp_path)
    assert main(_fit(run, "--events", events, "--contrast", "q" * 100_000)) == 2
    line = _one_error_line(capsys)
    assert "100000 characters" in line and len(line) < 300


def test_unknown_contrast_name_is_echoed_only_as_an_excerpt(tmp_path, capsys):
    run, events = _run(tmp_path)
    assert main(_fit(run, "--events", events, "--contrast", "z" * 1500)) == 2
    line = _one_error_line(capsys)
    assert "unknown name" in line and "z" * 100 not in line


def test_long_bad_option_value_is_cut(tmp_path, capsys):
    run, events = _run(tmp_path)
    with pytest.raises(SystemExit) as info:
        main(_fit(run, "--events", events, "--kernels", "k" * 50_000))
    assert info.value.code == 2
    line = _one_error_line(capsys)
    assert len(line) < 500


# ------------------------------------------------------------------ maps never hold infinities


def test_variance_map_beyond_float32_is_written_without_inf(tmp_path, capsys):
    """A run in huge units: the variance exceeds float32 (3.4e38); the map is float64 and
    finite (read back with nibabel, the reference reader), with one warning line."""
    import nibabel as nib

    rng = np.random.default_rng(5)
    data = 1e25 + rng.standard_normal((4, 5, 3, 90)) * 1e24
    run, _ = write_run(tmp_path, data, TR)
    out = tmp_path / "var.nii"
    assert main(["map", str(run), "--stat", "variance", "--mask", "auto", "-o", str(out)]) == 0
    img = nib.load(out)
    values = np.asarray(img.dataobj)
    assert np.isfinite(values).all() and values.max() > np.finfo(np.float32).max
    assert img.get_data_dtype() == np.float64
    assert "written as float64" in capsys.readouterr().err


def test_absurd_condition_count_is_one_line(tmp_path, capsys):
    run, _ = _run(tmp_path)
    ev = tmp_path / "many_events.tsv"
    rows = "".join(f"{k * 0.01:.2f}\t0.5\tc{k}\n" for k in range(10_000))
    ev.write_text("onset\tduration\ttrial_type\n" + rows)
    assert main(_fit(run, "--events", ev)) == 2
    assert "10000 different trial_type values" in _one_error_line(capsys)


def test_screenshot_does_not_record_recent_runs(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")
    run, _ = _run(tmp_path)
    png = tmp_path / "shot.png"
    assert main(["view", str(run), "--screenshot", str(png), "--size", "900x600"]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    from PySide6.QtCore import QSettings

    from voxelscope.gui.main_window import APPLICATION, ORGANISATION

    value = QSettings(ORGANISATION, APPLICATION).value("recent_runs", []) or []
    value = [value] if isinstance(value, str) else list(value)
    assert not any(str(run.name) in str(v) for v in value)


def test_bad_session_prints_one_line_per_problem(tmp_path, capsys, monkeypatch):
    import json

    from voxelscope.core.session import Session, session_to_json

    monkeypatch.setenv("QT_QPA_PLATFORM", "offscreen")
    data = session_to_json(Session())
    data["map"] = {"threshold": "abc", "opacity": 1e308, "colour_scale": "no-such-scale"}
    data["voxel"] = [10**12, 0, 0]
    bad = tmp_path / "bad.voxelscope.json"
    bad.write_text(json.dumps(data))
    png = tmp_path / "never.png"
    assert main(["view", "--session", str(bad), "--screenshot", str(png)]) == 2
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 4 and all(ln.startswith("voxelscope: error: ") for ln in lines), err
    assert "Traceback" not in err and not png.exists()


def test_deeply_nested_dataset_description_is_one_line(tmp_path, capsys):
    """BIDS dataset_description.json goes through the same bounded reader and JSON limit."""
    deriv = tmp_path / "derivatives" / "prep"
    deriv.mkdir(parents=True)
    (deriv / "dataset_description.json").write_text("[" * 100_000 + "]" * 100_000)
    sub = deriv / "sub-01" / "func"
    sub.mkdir(parents=True)
    run, events = _run(sub, name="sub-01_task-x_bold.nii")
    assert main(_fit(run, "--events", events)) == 2
    line = _one_error_line(capsys)
    assert "dataset_description.json" in line and "nests deeper than 64 levels" in line
