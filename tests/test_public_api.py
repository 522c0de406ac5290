"""The package's public surface is small and deliberate; growing it is a decision."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import streamrate
from streamrate._kernel_cache import default_cache_dir

PUBLIC = {
    "__version__",
    "build_model",
    "load_settings",
    "Settings",
    "MatchEvent",
    "Matchup",
    "StreamrateError",
    "ConfigError",
    "EventError",
    "LocalReader",  # the in-process reader for matchmakers
}


def test_all_is_exactly_the_public_api() -> None:
    assert set(streamrate.__all__) == PUBLIC
    assert len(streamrate.__all__) == len(PUBLIC)


def test_every_public_name_resolves_to_the_real_object() -> None:
    from streamrate.config import Settings, load_settings
    from streamrate.errors import ConfigError, EventError, StreamrateError
    from streamrate.events import MatchEvent, Matchup
    from streamrate.models.registry import build_model

    expected = {
        "build_model": build_model,
        "load_settings": load_settings,
        "Settings": Settings,
        "MatchEvent": MatchEvent,
        "Matchup": Matchup,
        "StreamrateError": StreamrateError,
        "ConfigError": ConfigError,
        "EventError": EventError,
    }
    for name, obj in expected.items():
        assert getattr(streamrate, name) is obj
    assert isinstance(streamrate.__version__, str) and streamrate.__version__.count(".") == 2
    assert issubclass(ConfigError, StreamrateError) and issubclass(EventError, StreamrateError)


def _run(code: str, env: dict[str, str]) -> str:
    out = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
    )
    return out.stdout.strip()


def test_kernel_cache_goes_to_a_per_user_folder_unless_set(tmp_path: Path) -> None:
    code = "import os, streamrate; print(os.environ.get('NUMBA_CACHE_DIR'))"
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path / "xdg")
    got = _run(code, env)
    assert got == str(tmp_path / "xdg" / "streamrate" / "numba")
    assert Path(got).is_dir()
    env["NUMBA_CACHE_DIR"] = str(tmp_path / "mine")
    assert _run(code, env) == str(tmp_path / "mine")
    assert default_cache_dir({"HOME": "/x"}).parts[-2:] == ("streamrate", "numba")
    # numba imported first: it is told to read its settings again.
    env.pop("NUMBA_CACHE_DIR")
    code = "import numba, streamrate; print(numba.core.config.CACHE_DIR)"
    assert _run(code, env) == str(tmp_path / "xdg" / "streamrate" / "numba")


def test_importing_the_package_does_not_import_numba_or_redis() -> None:
    code = "import sys, streamrate; print(sorted({'numba', 'redis'} & set(sys.modules)))"
    assert _run(code, dict(os.environ)) == "[]"
