"""Prequential replay, burn-in, ordering and the paired block bootstrap."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pytest

from streamrate.calibration import log_loss
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, EventError
from streamrate.evaluate import (
    Truth,
    build_report,
    paired_block_bootstrap,
    parse_burn_in,
    replay,
    replay_file,
    scored_mask,
)
from streamrate.events import MatchEvent, Matchup, event_to_json
from streamrate.models.base import Model, Prediction
from streamrate.modelspec import ModelSpec
from streamrate.simulate import WorldSpec, simulate, write_world

T0 = datetime(2026, 3, 1, tzinfo=UTC)


class RunningMean(Model):
    """Test-only model: forecasts the mean first-side score seen so far (0.5 at first)."""

    kind: ClassVar[str] = "running_mean"

    def __init__(self) -> None:
        self.entities_ = EntityTable()
        self.total_ = 0.0
        self.n_ = 0

    def predict(self, matchup: Matchup) -> Prediction:
        return Prediction(0.5 if self.n_ == 0 else self.total_ / self.n_)

    def learn(self, event: MatchEvent) -> Prediction:
        before = self.predict(event)
        self.total_ += event.score
        self.n_ += 1
        return before

    def get_params(self) -> dict[str, Any]:
        return {}

    def _state_arrays(self) -> dict[str, np.ndarray]:
        return {"sum": np.array([self.total_, self.n_])}

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        self.total_, self.n_ = float(arrays["sum"][0]), int(arrays["sum"][1])


def _event(i: int, score: float, minutes: float | None = None) -> MatchEvent:
    return MatchEvent(
        match_id=f"m-{i}",
        finished_at=T0 + timedelta(minutes=i if minutes is None else minutes),
        first=("kelvash",),
        second=("morvenn",),
        score=score,
        context={"map": "glasswood", "mode": "duel"},
    )


def test_replay_scores_the_forecast_made_before_learning() -> None:
    scores = [1.0, 0.0, 1.0, 1.0, 0.5, 0.0, 1.0]
    events = [_event(i, s) for i, s in enumerate(scores)]
    rec = replay(events, {"mean": RunningMean()}, chunk_events=3)
    want = [0.5] + [float(np.mean(scores[:k])) for k in range(1, len(scores))]
    np.testing.assert_allclose(rec.expected["mean"], want)
    np.testing.assert_array_equal(rec.score, scores)


def test_chunked_replay_equals_event_by_event_for_a_real_model() -> None:
    from streamrate.models.registry import build_model

    world = simulate(WorldSpec(entities=20, matches=700, styles=3, seed=31))
    a = replay(world.events, {"elo": build_model("elo")}, chunk_events=1)
    b = replay(world.events, {"elo": build_model("elo")}, chunk_events=256)
    np.testing.assert_allclose(a.expected["elo"], b.expected["elo"], rtol=0, atol=1e-12)


def test_burn_in_parsing() -> None:
    assert parse_burn_in("250") == 250
    assert parse_burn_in(None) == 0
    assert parse_burn_in("2026-03-02") == datetime(2026, 3, 2, tzinfo=UTC)
    assert parse_burn_in("2026-03-02T06:00:00+02:00") == datetime(2026, 3, 2, 4, tzinfo=UTC)
    with pytest.raises(ConfigError, match="offset"):
        parse_burn_in("2026-03-02T06:00:00")
    with pytest.raises(ConfigError, match="event count or a date"):
        parse_burn_in("soon")


def test_burn_in_masks_by_count_and_by_time() -> None:
    events = [_event(i, 1.0) for i in range(10)]
    rec = replay(events, {"mean": RunningMean()})
    assert scored_mask(rec, 4).tolist() == [False] * 4 + [True] * 6
    assert scored_mask(rec, 40).sum() == 0
    # Strictly after the time: the event at minute 3 is not scored.
    assert scored_mask(rec, T0 + timedelta(minutes=3)).tolist() == [False] * 4 + [True] * 6


def test_out_of_order_times_are_an_error_naming_the_line(tmp_path: Path) -> None:
    events = [_event(0, 1.0, 5), _event(1, 0.0, 6), _event(2, 1.0, 4)]
    path = tmp_path / "e.jsonl"
    path.write_text("\n".join(event_to_json(e) for e in events) + "\n")
    spec = [ModelSpec("elo", "elo")]
    with pytest.raises(EventError, match=r"e\.jsonl:3: finished_at"):
        replay_file(path, spec)
    rec = replay_file(path, spec, allow_unordered=True)
    assert rec.unordered_steps == 1 and rec.score.size == 3


def test_bad_line_is_an_event_error_with_line_number(tmp_path: Path) -> None:
    path = tmp_path / "e.jsonl"
    good = event_to_json(_event(0, 1.0))
    path.write_text(good + "\n\n" + good.replace('"score":1.0', '"score":2') + "\n")
    with pytest.raises(EventError, match=r"e\.jsonl:3: score"):
        replay_file(path, [ModelSpec("elo", "elo")])


def test_report_floor_and_bootstrap(tmp_path: Path) -> None:
    world = simulate(WorldSpec(entities=20, matches=1500, seed=41))
    out = tmp_path / "w.jsonl"
    write_world(world, out)
    specs = [ModelSpec("elo", "elo"), ModelSpec("hot", "elo", {"k": 64.0})]
    rec = replay_file(out, specs)
    truth = Truth.for_events(out)
    assert truth is not None
    report = build_report(rec, specs, 500, truth, resamples=300)
    assert report.scored == 1000
    floor = report.floor_log_loss
    assert floor is not None
    assert floor == pytest.approx(world.floor_of(slice(500, None)))
    for row in report.models.values():
        assert row["log_loss"] > floor
        assert row["n"] == 1000
    assert report.models["elo"]["log_loss_diff_ci"] is None
    ci = report.models["hot"]["log_loss_diff_ci"]
    e_hot = rec.expected["hot"][500:]
    e_elo = rec.expected["elo"][500:]
    y = rec.score[500:]
    assert ci["mean"] == pytest.approx(log_loss(e_hot, y) - log_loss(e_elo, y))
    assert ci["low"] <= ci["mean"] <= ci["high"] and ci["versus"] == "elo"
    json.dumps(report.to_json(), allow_nan=False)
    # A sidecar for another file is refused.
    with pytest.raises(ConfigError, match="truth sidecar"):
        build_report(rec, specs, 0, Truth(np.full(7, 0.5)))


def test_block_bootstrap_covers_the_true_difference() -> None:
    # Synthetic check: loss differences with true mean 0.02 and AR(1) serial dependence
    # (coefficient 0.6). Over 120 independent series the 95% interval should cover 0.02
    # about 95% of the time; we accept 85%..100% (binomial sd is 2%, and block bootstraps
    # under-cover a little on short series, common practice to expect).
    rng = np.random.default_rng(2026)
    covered = 0
    reps = 120
    for r in range(reps):
        noise = rng.normal(0.0, 1.0, 3000)
        x = np.empty_like(noise)
        x[0] = noise[0]
        for t in range(1, noise.size):
            x[t] = 0.6 * x[t - 1] + noise[t]
        d = paired_block_bootstrap(0.02 + 0.05 * x, np.zeros_like(x), resamples=400, seed=r)
        covered += d.low <= 0.02 <= d.high
    assert 0.85 * reps <= covered <= reps


def test_block_bootstrap_is_seeded_and_wider_than_iid_for_dependent_data() -> None:
    rng = np.random.default_rng(5)
    x = np.repeat(rng.normal(0.0, 1.0, 200), 20)  # blocks of 20 identical values
    a = paired_block_bootstrap(x, np.zeros_like(x), resamples=500, seed=1)
    b = paired_block_bootstrap(x, np.zeros_like(x), resamples=500, seed=1)
    iid = paired_block_bootstrap(x, np.zeros_like(x), resamples=500, seed=1, block=1)
    assert (a.low, a.high) == (b.low, b.high)
    assert a.block == 16  # ceil(4000 ** (1/3))
    assert (a.high - a.low) > 2.0 * (iid.high - iid.low)


CONFIGS = Path(__file__).resolve().parent.parent / "configs"
TRANSITIVE = ("elo", "bradley_terry", "glicko2", "trueskill")


def _shipped_replay(world_name: str, seed: int) -> tuple[Any, Any]:
    from streamrate.modelspec import specs_from_toml
    from streamrate.simulate import world_spec

    world = simulate(world_spec(world_name, seed=seed))
    specs = specs_from_toml(CONFIGS / "default.toml")
    rec = replay(world.events, {s.label: s.build() for s in specs})
    return world, build_report(rec, specs, 0, Truth(world.expected_score), resamples=1000)


@pytest.mark.slow
def test_aim_cyclic_world_best_model_near_floor_transitive_far_above() -> None:
    # The project's aim on the cyclic world (30,000 duels, 100 players, 3 cyclic styles,
    # map effects): whole-file prequential log loss of the best shipped model within
    # 0.04 nats of the floor; models with one strength per player stay far above.
    # Seed 7001 is not among the seeds the shipped configs were tuned on.
    world, report = _shipped_replay("cyclic", 7001)
    floor = report.floor_log_loss
    assert floor is not None and floor == pytest.approx(world.floor)
    losses = {label: row["log_loss"] for label, row in report.models.items()}
    assert min(losses.values()) - floor < 0.04, losses
    for kind in TRANSITIVE:
        assert losses[kind] - floor > 0.08, (kind, losses[kind], floor)


@pytest.mark.slow
def test_aim_plain_world_blade_chest_no_worse_than_elo() -> None:
    # Without cycles, blade-chest must not pay for its extra parameters beyond noise:
    # the 95% block-bootstrap interval of (blade_chest - elo) must reach zero or below.
    _, report = _shipped_replay("plain", 7002)
    ci = report.models["blade_chest"]["log_loss_diff_ci"]
    assert ci["versus"] == "elo"
    assert ci["low"] <= 0.0, ci
