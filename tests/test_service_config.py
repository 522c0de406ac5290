"""Service settings: validation, overrides, key names in one Redis Cluster slot."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import ValidationError
from redis.crc import key_slot

from streamrate.config import Settings, SpaceSettings, load_settings
from streamrate.errors import ConfigError

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


def test_redis_crc16_matches_the_cluster_spec_vector() -> None:
    # Redis Cluster specification, "Keys distribution model": CRC16 (XMODEM) of
    # "123456789" is 0x31C3; slot = CRC16 mod 16384.
    assert key_slot(b"123456789") == 0x31C3 % 16384


@pytest.mark.parametrize("prefix,space", [("sr", "duel"), ("prod.eu", "squad-5v5")])
def test_all_keys_of_a_space_share_one_cluster_slot(prefix: str, space: str) -> None:
    s = Settings(prefix=prefix, spaces=(SpaceSettings(name=space),))
    k = s.keys(s.spaces[0])
    names = [k.events, k.dead, k.ckpt, k.requests, k.live, k.errors]
    assert all(n.startswith("{" + f"{prefix}:{space}" + "}:") for n in names)
    assert len({key_slot(n.encode()) for n in names}) == 1
    assert len(set(names)) == len(names)


def test_spaces_get_separate_keys() -> None:
    s = Settings(spaces=(SpaceSettings(name="duel"), SpaceSettings(name="squad", model="elo")))
    assert s.keys(s.spaces[0]).events != s.keys(s.spaces[1]).events
    with pytest.raises(ValidationError, match="share a name"):
        Settings(spaces=(SpaceSettings(name="duel"), SpaceSettings(name="duel")))


def test_unknown_keys_are_errors_and_settings_are_frozen() -> None:
    with pytest.raises(ConfigError, match="batch_cuont"):
        load_settings(None, ["spaces.0.batch_cuont=5"])
    s = load_settings(None, [])
    with pytest.raises(ValidationError):
        s.prefix = "other"  # type: ignore[misc]


def test_overrides_apply_on_top_of_the_file() -> None:
    s = load_settings(
        CONFIGS / "service.toml",
        [
            "spaces.1.batch_count=77",
            "redis.url=rediss://user:pw@cache:6380/2",
            "metrics.enabled=true",
        ],
    )
    assert s.spaces[1].batch_count == 77
    assert s.spaces[0].batch_count == 500
    assert s.redis.url == "rediss://user:pw@cache:6380/2"
    assert s.metrics.enabled is True
    assert s.keys(s.spaces[1]).events == "{sr:squad}:events"


@pytest.mark.parametrize(
    "override,needle",
    [
        ("redis.url=http://x", "redis://"),
        ("spaces.0.batch_count=0", "batch_count"),
        ("checkpoint.store=disk", "store"),
        ("nonsense", "key=value"),
        ("spaces.4.name=x", "no list item"),
    ],
)
def test_bad_overrides_name_the_problem(override: str, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        load_settings(CONFIGS / "service.toml", [override])
