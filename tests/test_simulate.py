"""The invented world: reproducible, honest about its probabilities, knobs that do something."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from streamrate.calibration import binary_entropy, log_loss
from streamrate.errors import ConfigError
from streamrate.events import event_to_json, parse_event
from streamrate.simulate import MAPS, PATCHES, WorldSpec, simulate, world_spec, write_world


def _lines(spec: WorldSpec) -> list[str]:
    return [event_to_json(ev) for ev in simulate(spec).events]


def test_same_seed_same_world_other_seed_other_world() -> None:
    spec = WorldSpec(entities=20, matches=300, styles=3, map_effect=0.5, drift=0.5, seed=11)
    assert _lines(spec) == _lines(spec)
    assert _lines(spec) != _lines(WorldSpec(**{**spec.__dict__, "seed": 12}))


def _chi_square_by_bins(e: np.ndarray, var: np.ndarray, y: np.ndarray) -> float:
    """p-value of sum over deciles of (observed - expected)^2 / variance, chi-square 10 df."""
    idx = np.minimum((e * 10).astype(int), 9)
    stat = 0.0
    df = 0
    for b in range(10):
        sel = idx == b
        if sel.sum() < 30:
            continue
        stat += (y[sel].sum() - e[sel].sum()) ** 2 / var[sel].sum()
        df += 1
    return float(stats.chi2.sf(stat, df))


def test_true_probabilities_match_outcome_frequencies() -> None:
    # Pearson-type chi-square over deciles of the true expected score (sum of independent
    # outcomes per bin, variance known from the true probabilities); we require p > 0.001.
    # The seed is fixed, so the test cannot flake; the tolerance says how wrong the
    # probabilities could be before a seed would fail.
    world = simulate(
        WorldSpec(entities=60, matches=20_000, styles=3, map_effect=0.5, draw_rate=0.2, seed=5)
    )
    e, pd, y = world.expected_score, world.p_draw, world.scores
    p_win = e - pd / 2
    var = p_win + pd / 4 - e**2
    assert _chi_square_by_bins(e, var, y) > 1e-3
    # Draws: binomial test of the number of draws against the sum of true draw chances.
    draws = int(np.sum(y == 0.5))
    expected_draws = pd.sum()
    z = (draws - expected_draws) / np.sqrt(np.sum(pd * (1 - pd)))
    assert abs(z) < 3.3  # two-sided p of about 0.001
    # Davidson's model: equal sides draw at draw_rate, unequal ones less often.
    assert pd.max() == pytest.approx(0.2, abs=0.01) and pd.min() < 0.15


def test_floor_and_realised_loss() -> None:
    world = simulate(WorldSpec(entities=30, matches=4000, seed=2))
    assert world.floor == pytest.approx(float(binary_entropy(world.expected_score).mean()))
    assert world.realised_log_loss == pytest.approx(log_loss(world.expected_score, world.scores))
    # With 4000 outcomes the realised loss is within a few standard errors of the floor.
    assert abs(world.realised_log_loss - world.floor) < 0.03
    # A coin flip forecast is much worse than the truth.
    assert log_loss(np.full(4000, 0.5), world.scores) > world.floor + 0.05


def test_events_are_valid_time_ordered_and_carry_context() -> None:
    world = simulate(
        WorldSpec(entities=12, matches=500, styles=3, patch_at=0.4, features=True, seed=4)
    )
    times = [ev.finished_at for ev in world.events]
    assert times == sorted(times)
    for ev in world.events:
        assert parse_event(event_to_json(ev)) == ev
        assert ev.context["map"] in MAPS and ev.context["mode"] == "duel"
        assert set(ev.features) == set(ev.entities())
        for f in ev.features.values():
            assert isinstance(f["style_hint"], str) and f["training_hours"] >= 0
    patches = [ev.context["patch"] for ev in world.events]
    assert patches[:200] == [PATCHES[0]] * 200 and patches[200:] == [PATCHES[1]] * 300


def test_patch_shifts_style_strength() -> None:
    # Style 0 gains and style 1 loses after the patch: with map effects and cycles off and
    # no skill spread, a style-0 player's true expected score rises after it.
    world = simulate(
        WorldSpec(
            entities=12,
            matches=400,
            styles=3,
            cycle_strength=0.0,
            skill_spread=0.0,
            patch_at=0.5,
            patch_shift=1.0,
            seed=8,
        )
    )
    e = world.expected_score
    assert np.allclose(e[:200], 0.5)
    assert np.abs(e[200:] - 0.5).max() > 0.3


def test_teams_and_modes() -> None:
    world = simulate(WorldSpec(entities=30, matches=50, team_size=3, seed=1))
    for ev in world.events:
        assert len(ev.first) == len(ev.second) == 3
        assert ev.context["mode"] == "trio"


def test_arrivals_over_time() -> None:
    world = simulate(WorldSpec(entities=40, matches=2000, arrival_fraction=0.25, seed=6))
    first_seen: dict[str, int] = {}
    for i, ev in enumerate(world.events):
        for p in ev.entities():
            first_seen.setdefault(p, i)
    assert sum(1 for i in first_seen.values() if i < 100) <= 12
    assert max(first_seen.values()) > 500


def test_cyclic_world_is_intransitive() -> None:
    # Same skills, three styles: each style beats the next by cycle_strength in logit.
    world = simulate(WorldSpec(entities=9, matches=300, styles=3, skill_spread=0.0, seed=3))
    gaps = np.abs(world.expected_score - 0.5)
    assert set(np.round(gaps, 6)) <= {0.0, round(1 / (1 + np.exp(-1.5)) - 0.5, 6)}
    assert gaps.max() > 0.2


def test_write_world_and_truth_sidecar(tmp_path: Path) -> None:
    world = simulate(WorldSpec(entities=10, matches=50, seed=9))
    out = tmp_path / "w.jsonl"
    side = write_world(world, out)
    assert side is not None
    doc = json.loads(side.read_text())
    assert doc["n"] == 50 and len(doc["expected_score"]) == 50
    assert doc["floor_log_loss"] == pytest.approx(world.floor)
    assert doc["match_ids"][0] == world.events[0].match_id
    assert len(out.read_text().splitlines()) == 50


def test_bad_knobs_are_config_errors() -> None:
    with pytest.raises(ConfigError, match="unknown world"):
        world_spec("square")
    with pytest.raises(ConfigError, match="draw_rate"):
        world_spec("plain", draw_rate=1.0)
    with pytest.raises(ConfigError, match="unknown world setting"):
        world_spec("plain", colour=1)
    with pytest.raises(ConfigError, match="styles"):
        world_spec("plain", patch_at=0.5)
