"""File → Open study… (voxelscope/gui/study_browser.py and the window's study actions).

The listing itself is core (tests/core/test_study.py); here: the browser shows found/missing
per companion, opens a run with all of its companions (BIDS entities, as the command line),
remembers recent studies, and a dropped folder opens as a study.
"""

from __future__ import annotations

import json

from tests.gui.conftest import SAMPLE


def test_browser_lists_the_demo_study_and_opens_a_run(window, demo_files):
    browser = window.open_study(SAMPLE / "study")
    assert browser is not None and browser.isVisible()
    model = browser.model
    assert model.rowCount() == 2
    cells = [[model.index(r, c).data() for c in range(model.columnCount())] for r in range(2)]
    assert [row[:4] for row in cells] == [
        ["demo", "–", "tonetap", "1"],
        ["demo", "–", "tonetap", "2"],
    ]
    assert all(row[5:9] == ["found", "2 found", "found", "found"] for row in cells)
    assert "1 subject(s)" in browser.summary.text() and "2 run(s)" in browser.summary.text()
    assert browser.open_row(1, background=False), window.last_error
    run = window.state.run
    assert run.path.name.startswith("sub-demo_task-tonetap_run-2") and run.n_volumes == 112
    used = window.state.bundle.inputs.used_files()
    assert used["events"].endswith("sub-demo_task-tonetap_run-2_events.tsv")
    assert used["mask"].endswith("run-2_space-phantom_desc-brain_mask.nii.gz")
    assert "StartTime 0.625 s" in window.run_label.toolTip()
    assert window.recent_studies()[0] == str(SAMPLE / "study")


def test_missing_companions_are_shown_and_a_dropped_folder_opens(window, tmp_path):
    root = tmp_path / "ds"
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    (root / "dataset_description.json").write_text(json.dumps({"Name": "x", "BIDSVersion": "1.8"}))
    (func / "sub-01_task-a_bold.nii.gz").write_bytes(b"")
    assert window.open_dropped(str(root))
    model = window.study_browser.model
    assert [model.index(0, c).data() for c in range(5, 9)] == ["missing"] * 4
    assert "no events found" in model.index(0, 5).data(0x03)  # ToolTipRole


def test_a_folder_that_is_not_a_study_is_one_line(window, tmp_path):
    assert window.open_study(tmp_path) is None
    assert "not a BIDS dataset" in window.last_error and "\n" not in window.last_error
    (tmp_path / "dataset_description.json").write_text("{oops")
    assert window.open_study(tmp_path) is None
    assert "not valid JSON" in window.last_error


def test_several_runs_of_the_demo_study_open_together(window, demo_files):
    """Multi-select in the browser: both demo runs open, the second added and combined."""
    browser = window.open_study(SAMPLE / "study")
    browser.table.selectAll()
    assert browser.open_button.text() == "Open 2 runs together"
    assert browser.open_selected(background=False), window.last_error
    st = window.state
    assert [b.run.path.name[:30] for b in st.bundles] == [
        "sub-demo_task-tonetap_run-1_sp",
        "sub-demo_task-tonetap_run-2_sp",
    ]
    assert [r.label for r in st.run_fits] == ["run-1", "run-2"]
    assert st.combined and st.combined[0].n_runs == 2
