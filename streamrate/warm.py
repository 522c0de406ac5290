"""Compile every model kernel ahead of time, so that no first event pays for it.

The compiled (numba) loops are cached on disk (see :mod:`streamrate._kernel_cache`
for where). A cold cache costs about 20 s of compiling on the first use of each
loop: in a service that is the first batch of events, in a test the first model
built. ``streamrate warm`` (or :func:`warm_kernels`) runs every loop once on a
tiny invented world, so an image can be built with the cache already filled::

    RUN streamrate warm

>>> seconds = warm_kernels()  # fast when the cache is already warm
>>> seconds >= 0.0
True
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Mapping, Sequence

from numba.core import event

# Each setting routes events through a different compiled loop: the solo loop
# (1v1, no context), the general sequential loop (context, teams, features), the
# mini-batch loop and the prediction loop, for both matchup forms and Elo.
_SETUPS: tuple[tuple[str, Mapping[str, object]], ...] = (
    ("bradley_terry", {}),
    ("blade_chest", {"dims": 2}),
    ("blade_chest", {"dims": 2, "context": "stacked", "feature_width": 4}),
    ("blade_chest", {"dims": 2, "context": "gated", "draws": True}),
    ("blade_chest_dist", {"dims": 2, "context": "stacked"}),
    ("elo", {}),
    ("bayes_strength", {}),
    ("recalibrated", {}),  # the served default: a mixture under a recalibration
)


def compile_models(setups: Sequence[tuple[str, Mapping[str, object]]]) -> None:
    """Run every learning and prediction path of these (kind, settings) models once."""
    from streamrate.events import Matchup
    from streamrate.models.registry import build_model
    from streamrate.simulate import simulate, world_spec

    solo = simulate(world_spec("cyclic", entities=8, matches=40, features=True, seed=1)).events
    teams = simulate(world_spec("teams", entities=12, matches=20, seed=1)).events
    for kind, settings in setups:
        for events in (solo, teams):
            model = build_model(kind, **settings)
            model.learn_many(events[: len(events) // 2])
            model.learn_batch(events[len(events) // 2 :])
            model.learn(events[0])
            ev = events[-1]
            model.predict(Matchup(first=ev.first, second=ev.second, context=ev.context))


def _compile_all() -> None:
    from streamrate.scan import warm_up as warm_scan

    compile_models(_SETUPS)
    warm_scan()  # the writer's scan of payloads


def warm_kernels(
    say: Callable[[str], None] | None = None,
    compile_all: Callable[[], None] = _compile_all,
) -> float:
    """Compile (or load from the cache) every kernel; return the seconds it took.

    When a kernel actually has to be compiled (the cache is cold or stale), ``say``
    is told once what is going on, so that a first run does not look hung.
    """
    from streamrate._kernel_cache import ENV

    where = os.environ.get(ENV) or "numba's default cache folder"
    announce = _Announce(
        say,
        "compiling model kernels (first run only: about 20 s on an idle machine, "
        f"longer under load; cached in {where})...",
    )
    t0 = time.monotonic()
    with event.install_listener("numba:compile", announce):
        compile_all()
    return time.monotonic() - t0


class _Announce(event.Listener):
    """Says its line at the first compile it sees (numba reports no event on a cache hit)."""

    def __init__(self, say: Callable[[str], None] | None, line: str) -> None:
        self.say, self.line, self.compiled = say, line, False

    def on_start(self, ev: event.Event) -> None:
        if not self.compiled and self.say is not None:
            self.say(self.line)
        self.compiled = True

    def on_end(self, ev: event.Event) -> None:
        return None
