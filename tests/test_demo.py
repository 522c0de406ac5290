"""The demo waits on readiness signals, not on timers that race a slow first batch."""

from __future__ import annotations

import threading
import time
from typing import Any

import numba
import pytest

from streamrate.demo import run_demo
from streamrate.models.elo import Elo
from streamrate.warm import warm_kernels

SLOW_FIRST_BATCH_S = 8.0  # longer than any short client timeout the demo might use


class _SlowStart:
    """Makes the model's first learning call take long, like compiling its kernel."""

    def __init__(self) -> None:
        self.done = threading.Event()
        self.lock = threading.Lock()

    def first_call(self) -> None:
        with self.lock:
            if not self.done.is_set():
                time.sleep(SLOW_FIRST_BATCH_S)
                self.done.set()


@pytest.mark.slow
def test_demo_survives_a_first_batch_slower_than_a_short_timeout(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    slow = _SlowStart()
    learn_many, learn = Elo.learn_many, Elo.learn

    def real(events: Any) -> bool:  # not the service's own warm-up while it starts
        return any(not ev.match_id.startswith("warm-up") for ev in events)

    def slow_learn_many(self: Elo, events: Any) -> Any:
        if real(events):
            slow.first_call()
        return learn_many(self, events)

    def slow_learn(self: Elo, event: Any) -> Any:
        if real([event]):
            slow.first_call()
        return learn(self, event)

    monkeypatch.setattr(Elo, "learn_many", slow_learn_many)
    monkeypatch.setattr(Elo, "learn", slow_learn)
    lines: list[str] = []
    summary = run_demo(matches=600, entities=20, rate_per_s=20_000, model="elo", out=lines.append)
    assert slow.done.is_set()
    assert summary["applied"] == 600
    assert any(line.startswith("[matchmaker]") for line in lines)


def test_demo_prints_whole_dead_letter_reasons() -> None:
    lines: list[str] = []
    run_demo(matches=300, entities=12, rate_per_s=20_000, model="elo", out=lines.append)
    reasons = [line for line in lines if "dead letter:" in line]
    assert len(reasons) == 4
    # The event with every required field missing names all four fields.
    missing = [r for r in reasons if "Field required" in r]
    assert missing and missing[0].endswith("score: Field required")


def test_demo_runs_the_served_default_and_scores_only_its_served_forecasts() -> None:
    # The default model serves recalibrated numbers and reports its raw model's
    # too (under its own label): the summary scores each match once.
    lines: list[str] = []
    summary = run_demo(matches=300, entities=12, rate_per_s=20_000, out=lines.append)
    assert summary["applied"] == 300
    assert 0.0 < summary["log_loss"] < 1.0
    assert any("model recalibrated" in line for line in lines)


def test_warm_up_says_what_it_does_only_when_it_compiles() -> None:
    said: list[str] = []

    def compile_something_new() -> None:
        @numba.njit(cache=False)
        def add_one(x: int) -> int:
            return x + 1

        assert add_one(1) == 2

    warm_kernels(say=said.append, compile_all=compile_something_new)
    assert len(said) == 1 and said[0].startswith("compiling model kernels (first run only")
    said.clear()
    warm_kernels(say=said.append, compile_all=lambda: None)
    assert said == []
