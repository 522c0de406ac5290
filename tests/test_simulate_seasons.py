"""The seasons world: a league whose strengths change slowly within seasons and
strongly between them, with roster changes and newcomers."""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from streamrate.cli import app
from streamrate.errors import ConfigError
from streamrate.simulate import WorldSpec, season_label, simulate, world_spec

runner = CliRunner()


def _rosters(spec: WorldSpec) -> list[set[str]]:
    world = simulate(spec)
    by_season: dict[str, set[str]] = {}
    for ev in world.events:
        by_season.setdefault(str(ev.context["season"]), set()).update(ev.first + ev.second)
    return [by_season[season_label(s)] for s in range(spec.seasons)]


def test_every_season_is_labelled_in_order_and_rosters_turn_over() -> None:
    spec = WorldSpec(entities=10, matches=3000, seasons=5, turnover=0.2, seed=3)
    world = simulate(spec)
    labels = [str(ev.context["season"]) for ev in world.events]
    assert labels == sorted(labels)  # seasons follow each other in time order
    assert sorted(set(labels)) == [season_label(s) for s in range(5)]
    assert [labels.count(season_label(s)) for s in range(5)] == [600] * 5
    rosters = _rosters(spec)
    # 600 matches among 10 entities: everyone on a roster plays; 2 leave each season.
    assert all(len(r) == 10 for r in rosters)
    assert all(len(a & b) == 8 for a, b in itertools.pairwise(rosters))
    assert len(set().union(*rosters)) == 10 + 2 * 4
    times = [ev.finished_at for ev in world.events]
    assert times == sorted(times)


def test_no_turnover_keeps_the_roster() -> None:
    rosters = _rosters(WorldSpec(entities=8, matches=800, seasons=4, turnover=0.0, seed=4))
    assert all(r == rosters[0] for r in rosters)


def test_first_edge_and_draws_show_in_true_probabilities_and_outcomes() -> None:
    base = WorldSpec(entities=20, matches=6000, seasons=3, draw_rate=0.25, seed=5)
    flat = simulate(base)
    edged = simulate(WorldSpec(**{**base.__dict__, "first_edge": 0.5}))
    assert abs(flat.expected_score.mean() - 0.5) < 0.02
    # Same seed, same pairings and skills: the edge raises every true expected score.
    assert np.all(edged.expected_score > flat.expected_score)
    assert edged.expected_score.mean() - flat.expected_score.mean() > 0.05
    assert edged.scores.mean() == pytest.approx(edged.expected_score.mean(), abs=0.02)
    assert np.mean(edged.scores == 0.5) == pytest.approx(edged.p_draw.mean(), abs=0.02)


def test_strengths_change_more_between_seasons_than_within() -> None:
    # The true expected score of the same pairing, compared at the end of a season
    # and the start of the next (strong change) or within one season (slow drift).
    spec = world_spec("seasons", entities=6, matches=12_000, seasons=4, turnover=0.0, seed=6)
    world = simulate(spec)
    logit = np.log(world.expected_score / (1 - world.expected_score))
    pair = [(ev.first, ev.second) for ev in world.events]
    season = [str(ev.context["season"]) for ev in world.events]
    first_of, last_of, mid_of = {}, {}, {}
    for i, (p, s) in enumerate(zip(pair, season, strict=True)):
        first_of.setdefault((p, s), i)
        last_of[(p, s)] = i
        if i % 3000 < 1500:
            mid_of[(p, s)] = i
    across, within = [], []
    for s in range(3):
        a, b = season_label(s), season_label(s + 1)
        for p in set(pair):
            if (p, a) in last_of and (p, b) in first_of and (p, a) in mid_of:
                across.append(logit[first_of[(p, b)]] - logit[last_of[(p, a)]])
                within.append(logit[last_of[(p, a)]] - logit[mid_of[(p, a)]])
    assert len(across) > 20
    assert np.std(across) > 2 * np.std(within)


def test_bad_season_settings_are_config_errors() -> None:
    with pytest.raises(ConfigError):
        world_spec("seasons", turnover=1.0)
    with pytest.raises(ConfigError):
        world_spec("seasons", matches=5, seasons=10)


def test_cli_writes_a_seasons_world_with_its_floor(tmp_path: Path) -> None:
    out = tmp_path / "league.jsonl"
    result = runner.invoke(
        app,
        ["simulate", "--world", "seasons", "--matches", "400", "--seasons", "2", "-o", str(out)],
    )
    assert result.exit_code == 0, result.output
    lines = out.read_text().splitlines()
    assert len(lines) == 400
    assert json.loads(lines[-1])["context"]["season"] == "s02"
    truth = json.loads(Path(f"{out}.truth.json").read_text())
    assert 0.3 < truth["floor_log_loss"] < 0.7
    assert truth["world"]["seasons"] == 2
