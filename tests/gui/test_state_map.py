"""ViewerState's map part: the overlay, its source, the map file and the model map.

The state's own promises (setters change the one state and say so with a signal); the
maps themselves are checked against the core in test_map_panel.py.
"""

import numpy as np
import pytest
from PySide6.QtCore import QObject

from voxelscope.core.maps import compute_map
from voxelscope.gui.loading import load_bundle, load_map
from voxelscope.gui.state import FIRST_THRESHOLD, LiveLayer, ViewerState


class _Seen(QObject):
    """Counts every signal of the map part."""

    def __init__(self, state: ViewerState) -> None:
        super().__init__()
        self.names: list[tuple] = []
        state.overlay_changed.connect(lambda: self.names.append(("map",)))
        state.file_layer_changed.connect(lambda: self.names.append(("file",)))
        state.model_map_changed.connect(lambda m: self.names.append(("model", m)))
        state.source_layer_changed.connect(lambda s: self.names.append(("layer", s)))


@pytest.fixture
def opened(ras_run):
    state = ViewerState()
    state.set_bundle(load_bundle(run_path=str(ras_run["run"])))
    assert state.analysis is not None
    return state, ras_run


def test_a_run_opened_with_a_map_keeps_the_file_aside_for_the_model_map(ras_run):
    state = ViewerState()
    seen = _Seen(state)
    bundle = load_bundle(run_path=str(ras_run["run"]), map_file=str(ras_run["map"]))
    state.set_bundle(bundle)
    assert state.file_layer is bundle.file_layer and state.file_layer.path == ras_run["map"]
    assert state.map_settings.source == "model" and state.overlay is None
    assert ("file",) in seen.names and ("map",) in seen.names


def test_a_run_without_events_shows_its_map_file(ras_run, tmp_path):
    import shutil

    run = tmp_path / "alone_bold.nii"
    shutil.copy(ras_run["run"], run)
    state = ViewerState()
    state.set_bundle(load_bundle(run_path=str(run), map_file=str(ras_run["map"])))
    assert state.analysis is None
    assert state.map_settings.source == "file" and state.overlay is state.file_layer


def test_opening_a_map_file_makes_it_the_file_source_and_shows_it(opened):
    state, spec = opened
    seen = _Seen(state)
    state.set_map_settings(limit=4.0)
    layer = load_map(spec["map"], state.run, [])
    state.set_file_layer(layer)
    assert state.file_layer is layer and state.overlay is layer
    assert state.map_settings.source == "file" and state.map_settings.limit is None
    assert seen.names[-2:] == [("file",), ("map",)]


def test_each_source_keeps_its_threshold(opened):
    state, _spec = opened
    seen = _Seen(state)
    state.set_map_settings(threshold=2.5)
    state.set_map_source("difference")
    assert state.map_settings.threshold == FIRST_THRESHOLD["difference"]
    state.set_map_settings(threshold=1.7)
    state.set_map_source("model")
    assert state.map_settings.threshold == 2.5
    state.set_map_source("difference")
    assert state.map_settings.threshold == 1.7
    assert seen.names.count(("map",)) == 5
    with pytest.raises(ValueError, match="unknown map source"):
        state.set_map_source("nosuch")


def test_model_map_is_set_with_a_signal_and_reset_by_a_new_run(opened):
    state, spec = opened
    seen = _Seen(state)
    m = compute_map(state.run, state.analysis, state.settings, "boxcar")
    state.set_model_map(m)
    assert state.model_map is m and seen.names[-1] == ("model", m)
    state.set_bundle(load_bundle(run_path=str(spec["run"])))
    assert state.model_map is None


def test_a_part_offers_a_source_layer(opened):
    state, _spec = opened
    seen = _Seen(state)
    assert "disagreement" not in state.source_layers
    state.set_source_layer("disagreement", None)
    assert "disagreement" in state.source_layers
    layer = LiveLayer(None, np.zeros(state.run.shape[:3], np.float32), 1, (-1.0, 1.0))
    state.set_source_layer("disagreement", layer)
    assert state.source_layers["disagreement"] is layer
    assert seen.names == [("layer", "disagreement")] * 2


def test_the_window_shows_a_part_layer_when_its_source_is_chosen(window, ras_run):
    assert window.open_run(ras_run["run"], background=False)
    window.live_map.flush()
    st = window.state
    layer = LiveLayer(
        None, np.ones(st.run.shape[:3], np.float32), 1, (-1.0, 1.0), source="disagreement"
    )
    st.set_source_layer("disagreement", layer)
    assert st.overlay is not layer  # not on screen until chosen
    st.set_map_source("disagreement")
    assert st.overlay is layer
    again = LiveLayer(None, layer.data * 2, 1, (-2.0, 2.0), source="disagreement")
    st.set_source_layer("disagreement", again)
    assert st.overlay is again
