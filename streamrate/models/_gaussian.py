"""The scaffolding the Gaussian-strength models share.

:mod:`~streamrate.models.bayes_strength` (a diagonal filter),
:mod:`~streamrate.models.margin_strength` (the same filter also reading margins)
and :mod:`~streamrate.models.kalman_strength` (a full covariance over the active
entities) keep the same per-entity rows (mean, variance, last day, matches while
new), the same settings for the prior, time noise, season pulls and the newcomer
offset, and the same way of cutting a run of events at each change of period.
That part lives here; each model's file keeps its own update (the compiled loops
stay there, each written out in full) and its own shared-parameter arrays.
"""

from __future__ import annotations

import math
from abc import abstractmethod
from collections.abc import Callable, Sequence
from itertools import groupby
from operator import methodcaller
from typing import Any, ClassVar

import numpy as np

from streamrate.columns import contexts_of
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import Model, Prediction

PROBIT = math.pi / 8.0
"""The probit approximation's factor: ``sigmoid(m / sqrt(1 + PROBIT V))``."""
DAY_S = 86_400.0

ROW_NAMES = ("mu", "var", "last_day", "age")
"""The per-entity rows every Gaussian strength keeps, in their saved order."""


def check_settings(
    kind: str,
    nums: Sequence[float],
    prior_var: float,
    nonnegative: Sequence[float],
    period_pull: float,
) -> None:
    """The checks every Gaussian strength makes: finite numbers, a positive prior
    variance, noise and variances (``nonnegative``) at least 0, a pull in ``[0, 1]``."""
    if not all(math.isfinite(x) for x in nums):
        raise ConfigError(f"{kind}: settings must be finite numbers")
    if prior_var <= 0 or min(nonnegative) < 0:
        raise ConfigError(f"{kind}: prior_var > 0; noise and variances >= 0")
    if not 0.0 <= period_pull <= 1.0:
        raise ConfigError(f"{kind}: period_pull must lie in [0, 1]")


class GaussianRows(Model):
    """Rows of Gaussian strengths and the period they are in.

    A subclass names its settings in ``PARAMS`` (the order of ``get_params``) and its
    per-entity rows with their fill in ``ROW_FILLS``; it implements ``new_period``."""

    PARAMS: ClassVar[tuple[str, ...]]
    ROW_FILLS: ClassVar[tuple[tuple[str, float], ...]] = (
        ("mu_", 0.0),
        ("var_", math.nan),  # nan stands for the prior variance
        ("last_day_", math.nan),
        ("age_", 0.0),
    )

    prior_var: float
    noise_per_day: float
    advantage_var: float
    period_field: str | None
    period_pull: float
    period_var: float
    newcomer_matches: int
    newcomer_var: float
    shared_noise_per_day: float
    compiled: bool
    period_: str | None
    entities_: EntityTable
    mu_: np.ndarray
    var_: np.ndarray
    last_day_: np.ndarray
    age_: np.ndarray

    @abstractmethod
    def new_period(self) -> None:
        """Every strength pulled part way to the prior, every variance widened."""

    def _store_settings(
        self,
        prior_var: float,
        noise_per_day: float,
        advantage_var: float,
        period_field: str | None,
        period_pull: float,
        period_var: float,
        newcomer_matches: int,
        newcomer_var: float,
        shared_noise_per_day: float,
        compiled: bool,
    ) -> None:
        """The settings every Gaussian strength has (checked by the caller)."""
        self.prior_var = float(prior_var)
        self.noise_per_day = float(noise_per_day)
        self.advantage_var = float(advantage_var)
        self.period_field = period_field
        self.period_pull = float(period_pull)
        self.period_var = float(period_var)
        self.newcomer_matches = int(newcomer_matches)
        self.newcomer_var = float(newcomer_var)
        self.shared_noise_per_day = float(shared_noise_per_day)
        self.compiled = bool(compiled)
        self.entities_ = EntityTable()
        self.period_ = None

    def get_params(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in self.PARAMS}

    def learn(self, event: MatchEvent) -> Prediction:
        return self.learn_many([event]).one(0)

    # -- rows -------------------------------------------------------------------
    def _fill(self, name: str, fill: float) -> float:
        return self.prior_var if name == "var_" else fill

    def _init_rows(self, dtypes: dict[str, type] | None = None) -> None:
        """The rows of a fresh model: room for 16 entities."""
        for name, fill in self.ROW_FILLS:
            dtype = (dtypes or {}).get(name, np.float64)
            setattr(self, name, np.full(16, self._fill(name, fill), dtype=dtype))

    def _fit_capacity(self) -> None:
        n = len(self.entities_)
        first: np.ndarray = getattr(self, self.ROW_FILLS[0][0])
        if n > len(first):
            size = max(n, 2 * len(first))
            for name, fill in self.ROW_FILLS:
                old = getattr(self, name)
                grown = np.full(size, self._fill(name, fill), dtype=old.dtype)
                grown[: len(old)] = old
                setattr(self, name, grown)

    def _load_rows(self, table: EntityTable, values: Sequence[np.ndarray]) -> None:
        """The rows from a saved state: ``values`` in ``ROW_FILLS``'s order."""
        self.entities_ = table
        n = len(table)
        size = max(16, 2 * n)
        for (name, fill), value in zip(self.ROW_FILLS, values, strict=True):
            rows = np.full(size, self._fill(name, fill), dtype=getattr(self, name).dtype)
            rows[:n] = value
            setattr(self, name, rows)

    # -- periods ----------------------------------------------------------------
    def _period_of(self, event: Matchup) -> str | None:
        if self.period_field is None or self.period_field not in event.context:
            return None
        return str(event.context[self.period_field])

    def _enter_period(self, period: str | None) -> None:
        if period is None:
            return
        if self.period_ is not None and period != self.period_:
            self.new_period()
        self.period_ = period

    def _by_period(
        self, events: Sequence[MatchEvent], run: Callable[[slice], np.ndarray]
    ) -> np.ndarray:
        """Runs of one period go through ``run`` together; a change of period
        between two runs pulls and widens first. The forecasts, in order."""
        out = np.empty(len(events))
        periods: list[str | None]
        if self.period_field is None:
            periods = [None] * len(events)
        else:  # C-level passes; a value is never None, so None means the field is missing
            raw = list(map(methodcaller("get", self.period_field), contexts_of(events)))
            if None not in raw:
                periods = list(map(str, raw))
            elif raw.count(None) == len(raw):  # no event names a period
                periods = raw
            else:
                periods = list(map(self._period_of, events))
        start = 0
        for period, same in groupby(periods):
            stop = start + len(list(same))
            self._enter_period(period)
            out[start:stop] = run(slice(start, stop))
            start = stop
        return out

    def _period_arrays(self) -> dict[str, np.ndarray]:
        # The current period as its UTF-8 bytes (empty: none yet).
        return {
            "period": np.frombuffer((self.period_ or "").encode(), dtype=np.uint8).copy(),
            "has_period": np.array([self.period_ is not None]),
        }

    def _load_period(self, arrays: dict[str, np.ndarray]) -> None:
        has = bool(np.asarray(arrays["has_period"]).reshape(-1)[0])
        text = np.asarray(arrays["period"], dtype=np.uint8).tobytes().decode()
        self.period_ = text if has else None


class DiagonalRows(GaussianRows, CopyOnWriteRows):
    """The diagonal filter's rows (``bayes_strength``, ``margin_strength``): one
    mean and variance per entity, written under copy-on-write snapshots."""

    def new_period(self) -> None:
        """Pull every strength part way to the prior and widen every variance."""
        n = len(self.entities_)
        self.before_write(None)
        self.mu_[:n] *= 1.0 - self.period_pull
        self.var_[:n] = np.minimum(self.var_[:n] + self.period_var, self.prior_var)

    def _forecast(self, matchup: Matchup, shared: tuple[float, float, float, float]) -> float:
        """The probit forecast: ``shared`` holds the advantage's mean and variance,
        then the newcomer offset's; an unknown entity is new, at 0 with ``prior_var``."""
        m, big_v = shared[0], shared[1]
        xb = 0.0
        nm = self.newcomer_matches
        for side, sign in ((matchup.first, 1.0), (matchup.second, -1.0)):
            x = sign / len(side)
            for e in side:
                r = self.entities_.get(e)
                m += x * (0.0 if r < 0 else float(self.mu_[r]))
                big_v += x * x * (self.prior_var if r < 0 else float(self.var_[r]))
                if nm and (r < 0 or self.age_[r] < nm):
                    xb += x  # an unknown entity would be new
        m += xb * shared[2]
        big_v += xb * xb * shared[3]
        return 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))
