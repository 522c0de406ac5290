"""The two ways kernels are compiled, typed once so callers keep their signatures.

``kernel``: compiled by numba and cached on disk. ``leaf``: the same without
numba's runtime (``_nrt=False``), for small helpers that allocate nothing; the
per-event loops call them many times per event, and without the runtime those
calls cost no reference counting. ``_nrt`` is an internal numba option, hence
the untyped handle below.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar

import numba

F = TypeVar("F", bound=Callable[..., Any])
_njit: Any = numba.njit


def kernel(fn: F) -> F:
    """Compile ``fn`` with numba, cached on disk."""
    return _njit(cache=True)(fn)  # type: ignore[no-any-return]


def leaf(fn: F) -> F:
    """Compile an allocation-free helper with numba, cached, without its runtime."""
    return _njit(cache=True, _nrt=False)(fn)  # type: ignore[no-any-return]
