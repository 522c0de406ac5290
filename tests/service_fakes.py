"""Settings for running the service on fakeredis in unit tests (one model space)."""

from __future__ import annotations

from pathlib import Path

from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)


def fake_settings(tmp_path: Path, space: SpaceSettings) -> Settings:
    """One space, checkpoints in ``tmp_path``, fast reconnects (fakeredis never goes away
    unless a test makes it)."""
    return Settings(
        redis=RedisSettings(reconnect_min_s=0.01, reconnect_max_s=0.05),
        checkpoint=CheckpointSettings(dir=tmp_path),
        metrics=MetricsSettings(enabled=False),  # on by default; tests must not share a port
        spaces=(space,),
    )
