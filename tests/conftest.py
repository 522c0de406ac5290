"""Shared test settings.

Hypothesis runs without per-example deadlines and without the too-slow health
check: CI machines have two cores shared with a Redis server and numba compiles,
and tests must never depend on wall-clock time.
"""

from __future__ import annotations

from hypothesis import HealthCheck, settings

settings.register_profile(
    "streamrate",
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    derandomize=False,
)
settings.load_profile("streamrate")
