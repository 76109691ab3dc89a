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
