"""An invented Quillrock world whose true win probabilities are known.

:func:`simulate` draws a time-ordered list of :class:`~streamrate.events.MatchEvent`
together with the true expected score ``e = P(win) + P(draw) / 2`` of each match,
so a replay can be compared with the best any model could do.

How a match is decided (all strengths are on the logit scale):

* every entity has a skill (normal, std ``skill_spread``) that may drift as a random
  walk (total std ``drift`` over the whole run) and one of ``styles`` cyclic styles;
* style ``k`` beats style ``k + 1 (mod styles)`` by ``cycle_strength``; a side's
  style term is the mean over its members' style pairs against the other side;
* each map favours one style by ``map_effect`` (map ``m`` favours style ``m mod styles``);
* a balance patch at fraction ``patch_at`` of the matches adds ``patch_shift`` to
  style 0 and takes it from style 1 (context ``patch`` changes from 1.4 to 1.5);
* draws follow Davidson's model: ``P(draw) = nu sqrt(pi_a pi_b) / (pi_a + pi_b +
  nu sqrt(pi_a pi_b))`` with ``nu`` set so that equal sides draw at ``draw_rate``.

The log-loss floor is the mean binary entropy of the true expected scores: no
forecast has a lower expected log loss (see :mod:`streamrate.calibration`).

>>> world = simulate(WorldSpec(entities=6, matches=20, seed=3))
>>> len(world.events), world.events[0].context["map"] in MAPS
(20, True)
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, fields, replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from streamrate.calibration import binary_entropy, log_loss
from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, event_to_json

MAPS = ("saltflats", "ember-quarry", "glasswood", "sunken-bell")
PATCHES = ("1.4", "1.5")
STYLE_NAMES = ("brannuk", "quespel", "tovrik", "zuvrel", "ornwhit", "pashvo", "glimmek")
"""Play styles: invented words, so that no style reads as a real game's class or tier."""
# Handles are two (rarely three) of these invented syllables, e.g. "kavrilt".
_SYLLABLES = (
    "bru", "dov", "fesk", "gwi", "huv", "jor", "kav", "lyx", "murn", "nev", "oqu", "pry",
    "quon", "rilt", "sul", "tevo", "umb", "vash", "wex", "yeb", "zan", "thap", "crom", "idr",
)  # fmt: skip
# The syllable tables of the handle draws of earlier versions: the main random stream
# still makes those draws (see _skip_earlier_name_draws), so a seed keeps its world.
_EARLIER_HEAD = 14
_EARLIER_TAIL = 12
_EARLIER_FIXED = 6
START = datetime(2026, 3, 1, tzinfo=UTC)


@dataclass(frozen=True)
class WorldSpec:
    """Every knob of the invented world; the same spec and seed give the same events."""

    entities: int = 100
    matches: int = 30_000
    team_size: int = 1
    skill_spread: float = 1.0
    styles: int = 0
    cycle_strength: float = 1.5
    map_effect: float = 0.0
    draw_rate: float = 0.0
    arrival_fraction: float = 1.0
    drift: float = 0.0
    patch_at: float | None = None
    patch_shift: float = 1.0
    features: bool = False
    days: float = 60.0
    seed: int = 0
    seasons: int = 0
    season_shift: float = 0.6
    turnover: float = 0.15
    first_edge: float = 0.0

    def check(self) -> None:
        if self.entities < 2 * self.team_size:
            raise ConfigError("entities: need at least two full sides")
        if self.team_size < 1 or self.matches < 1:
            raise ConfigError("team_size and matches must be at least 1")
        if not 0.0 <= self.draw_rate < 1.0:
            raise ConfigError("draw_rate must be in [0, 1)")
        if not 0.0 < self.arrival_fraction <= 1.0:
            raise ConfigError("arrival_fraction must be in (0, 1]")
        if self.arrival_fraction * self.entities < 2 * self.team_size:
            raise ConfigError("arrival_fraction: too few entities present at the start")
        if self.patch_at is not None and not 0.0 <= self.patch_at <= 1.0:
            raise ConfigError("patch_at must be a fraction in [0, 1]")
        if self.styles < 0 or self.styles > len(STYLE_NAMES):
            raise ConfigError(f"styles must be between 0 and {len(STYLE_NAMES)}")
        if self.patch_at is not None and self.styles < 2:
            raise ConfigError("a balance patch shifts styles: set styles to 2 or more")
        if self.seasons < 0 or self.season_shift < 0 or not 0.0 <= self.turnover < 1.0:
            raise ConfigError("seasons and season_shift must be >= 0, turnover in [0, 1)")
        if self.seasons > self.matches:
            raise ConfigError("seasons: need at least one match per season")


PRESETS: dict[str, WorldSpec] = {
    "plain": WorldSpec(),
    "cyclic": WorldSpec(styles=3, cycle_strength=1.5, map_effect=0.5, skill_spread=0.8),
    "patch": WorldSpec(
        styles=3, cycle_strength=1.5, map_effect=0.5, skill_spread=0.8, patch_at=0.5
    ),
    "teams": WorldSpec(team_size=3, matches=20_000, skill_spread=0.5, draw_rate=0.1),
    "seasons": WorldSpec(
        entities=40,
        matches=24_000,
        seasons=12,
        drift=1.0,
        season_shift=0.6,
        turnover=0.15,
        first_edge=0.35,
        draw_rate=0.25,
        days=12 * 240.0,
    ),
}
"""Named worlds for ``streamrate simulate --world NAME``."""


def world_spec(preset: str | None = None, **overrides: Any) -> WorldSpec:
    """A preset (default ``plain``) with some knobs replaced; ``None`` values are ignored."""
    name = preset or "plain"
    try:
        base = PRESETS[name]
    except KeyError:
        raise ConfigError(f"unknown world {name!r}; worlds: {', '.join(PRESETS)}") from None
    known = {f.name for f in fields(WorldSpec)}
    bad = set(overrides) - known
    if bad:
        raise ConfigError(f"unknown world setting {sorted(bad)[0]!r}")
    spec = replace(base, **{k: v for k, v in overrides.items() if v is not None})
    spec.check()
    return spec


@dataclass(frozen=True)
class World:
    """Simulated events and their true expected scores (same order)."""

    spec: WorldSpec
    events: list[MatchEvent]
    expected_score: np.ndarray  # float64 (n,) true P(win) + P(draw)/2 of the first side
    p_draw: np.ndarray  # float64 (n,)

    @property
    def scores(self) -> np.ndarray:
        return np.array([ev.score for ev in self.events], dtype=np.float64)

    @property
    def floor(self) -> float:
        """Expected log loss of the true forecasts: the mean binary entropy."""
        return float(binary_entropy(self.expected_score).mean())

    def floor_of(self, sel: slice | np.ndarray) -> float:
        """The floor over some of the matches (e.g. those after a burn-in)."""
        return float(binary_entropy(self.expected_score[sel]).mean())

    @property
    def realised_log_loss(self) -> float:
        """Log loss of the true forecasts on the sampled outcomes."""
        return log_loss(self.expected_score, self.scores)

    def truth(self) -> dict[str, Any]:
        """The JSON sidecar: settings, both floors and the true expected scores in file order."""
        return {
            "world": asdict(self.spec),
            "n": len(self.events),
            "floor_log_loss": self.floor,
            "realised_log_loss": self.realised_log_loss,
            "match_ids": [ev.match_id for ev in self.events],
            "expected_score": [round(float(x), 12) for x in self.expected_score],
        }


def handles(n: int, rng: np.random.Generator) -> list[str]:
    """``n`` distinct invented player handles, from a random stream of their own.

    The handles come from a child stream of ``rng`` (``rng.spawn``), so they follow
    the seed; the draws ``rng`` itself makes are those of earlier versions, so a seed
    still gives the same skills, styles and matches (only the names changed).
    """
    (names_rng,) = rng.spawn(1)
    _skip_earlier_name_draws(n, rng)
    out: list[str] = []
    taken: set[str] = set()
    syllables = 2
    misses = 0
    while len(out) < n:
        picks = names_rng.integers(0, len(_SYLLABLES), syllables)
        name = "".join(_SYLLABLES[int(i)] for i in picks)
        if name in taken:
            misses += 1
            if misses > 50:  # two syllables are getting used up: use three
                syllables, misses = 3, 0
            continue
        taken.add(name)
        out.append(name)
    return out


def _skip_earlier_name_draws(n: int, rng: np.random.Generator) -> None:
    """Make the draws the handle generator of earlier versions made from ``rng``.

    That generator gave six fixed handles, then drew a head and a tail syllable per
    handle (14 and 12 of them), with a number from 2 to 99 appended on a clash; two
    of the fixed handles could also be drawn. Only the draws matter here, not the names.
    """
    taken: set[tuple[int, int, int]] = {(3, 3, 0), (5, 5, 0)}  # the two drawable fixed ones
    made = min(n, _EARLIER_FIXED)
    while made < n:
        name = (int(rng.integers(0, _EARLIER_HEAD)), int(rng.integers(0, _EARLIER_TAIL)), 0)
        if name in taken:
            name = (name[0], name[1], int(rng.integers(2, 100)))
        if name not in taken:
            taken.add(name)
            made += 1


def _style_matrix(styles: int, strength: float) -> np.ndarray:
    """C[a, b]: logit advantage of style a over style b (a beats a + 1 mod styles)."""
    c = np.zeros((max(styles, 1), max(styles, 1)))
    if styles >= 2:
        for a in range(styles):
            c[a, (a + 1) % styles] += strength
            c[(a + 1) % styles, a] -= strength
    return c


def _mode(team_size: int) -> str:
    return {1: "duel", 3: "trio"}.get(team_size, "squad")


def simulate(spec: WorldSpec, progress: Callable[[int], None] | None = None) -> World:
    """Draw a world from ``spec`` (see the module docstring); ``progress(k)`` after each k."""
    spec.check()
    if spec.seasons > 0:
        return simulate_seasons(spec, progress)
    rng = np.random.default_rng(spec.seed)
    n, k = spec.entities, spec.team_size
    names = handles(n, rng)
    skill = rng.normal(0.0, spec.skill_spread, n)
    style = rng.integers(0, max(spec.styles, 1), n)
    arrivals = np.zeros(n, dtype=np.int64)
    n_late = n - max(2 * k, math.ceil(spec.arrival_fraction * n))
    if n_late > 0:
        late = rng.choice(n, n_late, replace=False)
        arrivals[late] = rng.integers(1, spec.matches, n_late)
    order = np.argsort(arrivals, kind="stable")
    cycle = _style_matrix(spec.styles, spec.cycle_strength)
    base_style = np.zeros(max(spec.styles, 1))
    patched_style = base_style.copy()
    if spec.styles >= 2:
        patched_style[0] += spec.patch_shift
        patched_style[1] -= spec.patch_shift
    map_bonus = np.zeros((len(MAPS), max(spec.styles, 1)))
    if spec.styles >= 1:
        for m in range(len(MAPS)):
            map_bonus[m, m % spec.styles] = spec.map_effect
    nu = 2.0 * spec.draw_rate / (1.0 - spec.draw_rate)
    step_sd = spec.drift / math.sqrt(spec.matches)
    patch_index = None if spec.patch_at is None else round(spec.patch_at * spec.matches)
    gaps = rng.exponential(1.0, spec.matches)
    offsets_s = np.cumsum(gaps) / gaps.sum() * spec.days * 86_400.0
    hints = _hints(style, skill, rng) if spec.features else None

    events: list[MatchEvent] = []
    exp_score = np.empty(spec.matches)
    p_draws = np.empty(spec.matches)
    present = 0
    for i in range(spec.matches):
        while present < n and arrivals[order[present]] <= i:
            present += 1
        if step_sd > 0.0:
            skill += rng.normal(0.0, step_sd, n)
        pool = order[:present]
        picked = rng.choice(pool, 2 * k, replace=False)
        a, b = picked[:k], picked[k:]
        m = int(rng.integers(0, len(MAPS)))
        patched = patch_index is not None and i >= patch_index
        style_bonus = patched_style if patched else base_style
        strength = skill[a].sum() - skill[b].sum()
        if spec.styles >= 2:
            strength += cycle[np.ix_(style[a], style[b])].mean()
        if spec.styles >= 1:
            bonus = map_bonus[m] + style_bonus
            strength += bonus[style[a]].mean() - bonus[style[b]].mean()
        # Davidson with pi_a = exp(s/2), pi_b = exp(-s/2): sqrt(pi_a pi_b) = 1.
        pa, pb = math.exp(0.5 * strength), math.exp(-0.5 * strength)
        total = pa + pb + nu
        p_win, p_draw = pa / total, nu / total
        u = rng.random()
        score = 1.0 if u < p_win else (0.5 if u < p_win + p_draw else 0.0)
        exp_score[i], p_draws[i] = p_win + 0.5 * p_draw, p_draw
        context: dict[str, str | float] = {"map": MAPS[m], "mode": _mode(k)}
        if patch_index is not None:
            context["patch"] = PATCHES[int(patched)]
        feats = {} if hints is None else {names[j]: hints[j] for j in picked}
        events.append(
            MatchEvent(
                match_id=f"q-{i + 1:06d}",
                finished_at=START + timedelta(seconds=float(offsets_s[i])),
                first=tuple(names[j] for j in a),
                second=tuple(names[j] for j in b),
                score=score,
                context=context,
                features=feats,
            )
        )
        if progress is not None and (i + 1) % 1000 == 0:
            progress(1000)
    if progress is not None and spec.matches % 1000:
        progress(spec.matches % 1000)
    return World(spec, events, exp_score, p_draws)


SEASON_PLAY_FRACTION = 2.0 / 3.0
"""Share of each season's span in which matches are played; the rest is the break."""


def season_label(index: int) -> str:
    """The ``season`` context value of the ``index``-th season (0-based): ``"s01"``..."""
    return f"s{index + 1:02d}"


def simulate_seasons(spec: WorldSpec, progress: Callable[[int], None] | None = None) -> World:
    """A league played in ``spec.seasons`` seasons of a roster of ``spec.entities``.

    * Skills start normal with std ``skill_spread``; within a season they walk
      slowly (``drift`` is the walk's std over the whole run, as in :func:`simulate`).
    * Between seasons every returning skill changes strongly: it shrinks toward 0
      and gains a fresh normal step of std ``season_shift``; the shrinkage keeps
      the spread of skills at ``skill_spread`` on average, so seasons neither
      spread nor bunch the field.
    * At each new season a share ``turnover`` of the roster leaves, replaced by
      newcomers (new ids) with skills drawn from the starting distribution.
    * The first side has a logit edge ``first_edge`` (a home side, say); draws
      follow Davidson's model as in :func:`simulate`; context ``season`` names the
      season (:func:`season_label`), ``mode`` the team size.
    * Matches of a season fall in the first :data:`SEASON_PLAY_FRACTION` of its
      span (``days / seasons``); the rest is the break between seasons.

    >>> w = simulate_seasons(WorldSpec(entities=6, matches=30, seasons=3, seed=1))
    >>> [w.events[i].context["season"] for i in (0, 10, 29)]
    ['s01', 's02', 's03']
    """
    spec.check()
    rng = np.random.default_rng(spec.seed)
    n, k, n_seasons = spec.entities, spec.team_size, max(spec.seasons, 1)
    leave = math.floor(spec.turnover * n)
    names = handles(n + leave * (n_seasons - 1), rng)
    roster = np.arange(n)  # indices into names / skill of who plays this season
    skill = np.zeros(len(names))
    skill[:n] = rng.normal(0.0, spec.skill_spread, n)
    nu = 2.0 * spec.draw_rate / (1.0 - spec.draw_rate)
    step_sd = spec.drift / math.sqrt(spec.matches)
    spread2 = spec.skill_spread**2
    walk2 = spec.drift**2 / n_seasons
    keep = math.sqrt(max(spread2 - spec.season_shift**2, 0.0) / max(spread2 + walk2, 1e-12))
    per_season = [spec.matches // n_seasons] * n_seasons
    per_season[-1] += spec.matches - sum(per_season)
    span_s = spec.days * 86_400.0 / n_seasons
    events: list[MatchEvent] = []
    exp_score = np.empty(spec.matches)
    p_draws = np.empty(spec.matches)
    newcomer = n
    i = 0
    for season, count in enumerate(per_season):
        if season > 0:
            skill[roster] = keep * skill[roster] + rng.normal(0.0, spec.season_shift, n)
            gone = rng.choice(n, leave, replace=False)
            fresh = np.arange(newcomer, newcomer + leave)
            newcomer += leave
            roster[gone] = fresh
            skill[fresh] = rng.normal(0.0, spec.skill_spread, leave)
        gaps = rng.exponential(1.0, count)
        offsets_s = season * span_s + np.cumsum(gaps) / gaps.sum() * span_s * SEASON_PLAY_FRACTION
        for j in range(count):
            if step_sd > 0.0:
                skill[roster] += rng.normal(0.0, step_sd, n)
            picked = roster[rng.choice(n, 2 * k, replace=False)]
            a, b = picked[:k], picked[k:]
            strength = skill[a].sum() - skill[b].sum() + spec.first_edge
            pa, pb = math.exp(0.5 * strength), math.exp(-0.5 * strength)
            total = pa + pb + nu
            p_win, p_draw = pa / total, nu / total
            u = rng.random()
            score = 1.0 if u < p_win else (0.5 if u < p_win + p_draw else 0.0)
            exp_score[i], p_draws[i] = p_win + 0.5 * p_draw, p_draw
            events.append(
                MatchEvent(
                    match_id=f"q-{i + 1:06d}",
                    finished_at=START + timedelta(seconds=float(offsets_s[j])),
                    first=tuple(names[x] for x in a),
                    second=tuple(names[x] for x in b),
                    score=score,
                    context={"season": season_label(season), "mode": _mode(k)},
                )
            )
            i += 1
            if progress is not None and i % 1000 == 0:
                progress(1000)
    if progress is not None and spec.matches % 1000:
        progress(spec.matches % 1000)
    return World(spec, events, exp_score, p_draws)


def _hints(
    style: np.ndarray, skill: np.ndarray, rng: np.random.Generator
) -> list[dict[str, str | float]]:
    """Entity features: a style hint right 80% of the time, training hours rising with skill."""
    out: list[dict[str, str | float]] = []
    n_styles = int(style.max()) + 1
    for s, z in zip(style, skill, strict=True):
        hint = int(s) if rng.random() < 0.8 else int(rng.integers(0, n_styles))
        hours = max(0.0, 200.0 + 60.0 * float(z) + float(rng.normal(0.0, 30.0)))
        out.append({"style_hint": STYLE_NAMES[hint], "training_hours": round(hours, 1)})
    return out


def write_world(world: World, out: Path | str, truth: bool = True) -> Path | None:
    """Write the events as JSON lines to ``out`` and, if asked, ``<out>.truth.json``."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    with open(out, "w", encoding="utf-8") as fh:
        for ev in world.events:
            fh.write(event_to_json(ev))
            fh.write("\n")
    if not truth:
        return None
    side = Path(f"{out}.truth.json")
    side.write_text(json.dumps(world.truth()), encoding="utf-8")
    return side


def summary(world: World) -> str:
    """A short human-readable account of a world (for stderr)."""
    y = world.scores
    spec = world.spec
    return (
        f"{len(world.events)} matches among {spec.entities} entities "
        f"(team size {spec.team_size}, {spec.styles} cyclic styles, seed {spec.seed}); "
        f"first side won {np.mean(y == 1.0):.3f}, drew {np.mean(y == 0.5):.3f}\n"
        f"log-loss floor (mean binary entropy of the true expected score): {world.floor:.4f} nats\n"
        f"log loss of the true probabilities on the drawn outcomes: "
        f"{world.realised_log_loss:.4f} nats"
    )
