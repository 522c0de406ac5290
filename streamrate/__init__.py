"""streamrate: win probabilities kept current as match results stream in.

The public surface is deliberately small (``__all__``, pinned by a test); the
command line (``streamrate --help``) is the main way in. Everything else is
importable from its module but may change between versions.

>>> import streamrate
>>> model = streamrate.build_model("elo", k=16.0)
>>> model.predict(streamrate.Matchup(first=("a",), second=("b",))).p_win
0.5
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from streamrate._kernel_cache import use_user_cache_dir

# Before anything imports numba: compiled kernels go to a per-user cache folder.
use_user_cache_dir()

__version__ = "0.1.0"

__all__ = [
    "ConfigError",
    "EventError",
    "LocalReader",
    "MatchEvent",
    "Matchup",
    "Settings",
    "StreamrateError",
    "__version__",
    "build_model",
    "load_settings",
]

if TYPE_CHECKING:
    from streamrate.config import Settings, load_settings
    from streamrate.errors import ConfigError, EventError, StreamrateError
    from streamrate.events import MatchEvent, Matchup
    from streamrate.models.registry import build_model
    from streamrate.replica import LocalReader

# name -> module; imported on first use so that `import streamrate` stays light.
_LAZY = {
    "ConfigError": "streamrate.errors",
    "EventError": "streamrate.errors",
    "StreamrateError": "streamrate.errors",
    "MatchEvent": "streamrate.events",
    "Matchup": "streamrate.events",
    "Settings": "streamrate.config",
    "load_settings": "streamrate.config",
    "build_model": "streamrate.models.registry",
    "LocalReader": "streamrate.replica",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'streamrate' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
