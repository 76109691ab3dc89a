"""Shared test settings.

Hypothesis runs without a deadline (numerical code has uneven run times on shared machines)
and with a modest number of examples so the suite stays fast.
"""

from __future__ import annotations

from hypothesis import HealthCheck, settings

settings.register_profile(
    "voxelscope",
    deadline=None,
    max_examples=40,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.load_profile("voxelscope")


import pytest  # noqa: E402


@pytest.fixture(autouse=True)
def _private_dirs(tmp_path_factory, monkeypatch):
    """Keep every test away from the user's real cache, state and settings folders."""
    base = tmp_path_factory.getbasetemp()
    for var, sub in (
        ("XDG_CACHE_HOME", "cache"),
        ("XDG_STATE_HOME", "state"),
        ("XDG_CONFIG_HOME", "config"),
        ("XDG_DATA_HOME", "data"),
    ):
        monkeypatch.setenv(var, str(base / sub))


@pytest.fixture(autouse=True)
def _fresh_inputs():
    """Each test is one 'command': inputs noted by earlier tests do not protect its outputs."""
    from voxelscope.core.outputs import input_scope

    with input_scope():
        yield
