"""Where the compiled model kernels are cached on disk.

numba writes its cache beside the source files unless told otherwise, which
fails when the package is installed read-only (a system site-packages, a
container image). streamrate points numba at a per-user cache folder instead,
``$XDG_CACHE_HOME/streamrate/numba`` or ``~/.cache/streamrate/numba``, unless
``NUMBA_CACHE_DIR`` is already set. This must run before numba is imported: the
package's ``__init__`` calls :func:`use_user_cache_dir` first thing.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Mapping
from pathlib import Path

ENV = "NUMBA_CACHE_DIR"


def default_cache_dir(environ: Mapping[str, str] | None = None) -> Path:
    """``$XDG_CACHE_HOME/streamrate/numba``, else ``~/.cache/streamrate/numba``."""
    env = os.environ if environ is None else environ
    base = env.get("XDG_CACHE_HOME") or str(Path("~").expanduser() / ".cache")
    return Path(base) / "streamrate" / "numba"


def use_user_cache_dir() -> str | None:
    """Set ``NUMBA_CACHE_DIR`` to the per-user folder (when unset and writable); return it."""
    if os.environ.get(ENV):
        return os.environ[ENV]
    folder = default_cache_dir()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError:
        return None  # no writable home: numba's own fallbacks apply
    if not os.access(folder, os.W_OK):
        return None
    os.environ[ENV] = str(folder)
    numba = sys.modules.get("numba")
    if numba is not None:  # imported before streamrate: let it read the setting again
        numba.config.reload_config()
    return str(folder)
