"""The quality monitor's state as arrays and JSON, for the checkpoint.

A restart (or a recovery after a loop error) rolls the model back to its
checkpoint; the rolling windows, the drift windows and the change detectors
must roll back with it, or the events re-applied since would count twice and an
alert that had gathered an hour of evidence would start over. This module turns
a :class:`~streamrate.watch.quality.QualityMonitor` into a
:class:`~streamrate.checkpoint.PartState` and back.

Layout, per model ``i`` (in the order models were first scored):

* ``m<i>.p``, ``m<i>.y`` -- the forecasts and outcomes of every window, oldest
  first, group after group (recent then reference), with ``m<i>.sizes`` (groups x 2)
  giving each window's length;
* ``m<i>.x``, ``m<i>.code``, ``m<i>.fsizes`` -- the drift windows, feature after
  feature: a number in ``x`` when ``code`` is -1, else the category
  ``categories[code]`` (from the JSON);
* in the JSON: the model's name, event count, group names, categories, and each
  change detector's running sums.

Read back, the state is untrusted: every length, index, count and value is
checked against the monitor's own settings (:class:`~streamrate.errors.StateError`
when one is off). When the settings themselves differ (another window size, other
drift fields) the saved state does not apply and :func:`monitor_from_state`
returns ``None``: the caller starts empty.

>>> from streamrate.watch.quality import MonitorSettings, QualityMonitor
>>> mon = QualityMonitor(MonitorSettings(recent_n=3, reference_n=5))
>>> for i in range(7):
...     _ = mon.add("elo", 0.6, float(i % 2), {})
>>> back = monitor_from_state(mon.settings, monitor_state(mon))
>>> back.models_["elo"].windows_["all"].reference.values()[1].tolist()
[0.0, 1.0, 0.0, 1.0]
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from typing import Any

import numpy as np

from streamrate.checkpoint import PartState
from streamrate.errors import StateError
from streamrate.watch.drift import ChangeAlarm, FeatureDrift, PageHinkley
from streamrate.watch.quality import (
    ALL_GROUP,
    CHANGE_DIRECTIONS,
    MAX_TRACKED_VALUES,
    OTHER_GROUP,
    GroupLabels,
    ModelQuality,
    MonitorSettings,
    QualityMonitor,
    RollingQuality,
    WindowPair,
)

STATE_VERSION = 1
MAX_MODELS = 64
MAX_NAME_CHARS = 256
MAX_ALARMS = 100


def _settings_json(s: MonitorSettings) -> dict[str, Any]:
    out = dataclasses.asdict(s)
    out["drift_fields"] = list(s.drift_fields)
    return out


def monitor_state(mon: QualityMonitor) -> PartState:
    """Everything the monitor has learned, as number arrays and JSON."""
    arrays: dict[str, np.ndarray] = {}
    models: list[dict[str, Any]] = []
    for i, (name, mq) in enumerate(mon.models_.items()):
        ps: list[np.ndarray] = []
        ys: list[np.ndarray] = []
        sizes: list[tuple[int, int]] = []
        for pair in mq.windows_.values():
            lengths = []
            for rq in (pair.recent, pair.reference):
                p, y = rq.values()
                ps.append(p)
                ys.append(y)
                lengths.append(p.size)
            sizes.append((lengths[0], lengths[1]))
        categories: dict[str, int] = {}
        xs: list[float] = []
        codes: list[int] = []
        fsizes: list[tuple[int, int]] = []
        for feature in mq.drift_.recent_:
            lengths = []
            for win in (mq.drift_.recent_[feature], mq.drift_.reference_[feature]):
                for v in win.values:
                    if isinstance(v, str):
                        xs.append(0.0)
                        codes.append(categories.setdefault(v, len(categories)))
                    else:
                        xs.append(float(v))
                        codes.append(-1)
                lengths.append(len(win.values))
            fsizes.append((lengths[0], lengths[1]))
        arrays[f"m{i}.p"] = np.concatenate(ps) if ps else np.zeros(0)
        arrays[f"m{i}.y"] = np.concatenate(ys) if ys else np.zeros(0)
        arrays[f"m{i}.sizes"] = np.array(sizes, dtype=np.int64).reshape(-1, 2)
        arrays[f"m{i}.x"] = np.array(xs, dtype=np.float64)
        arrays[f"m{i}.code"] = np.array(codes, dtype=np.int64)
        arrays[f"m{i}.fsizes"] = np.array(fsizes, dtype=np.int64).reshape(-1, 2)
        models.append(
            {
                "name": name,
                "events": mq.events_,
                "groups": list(mq.windows_),
                "categories": list(categories),
                "change": {d: _ph_json(ph) for d, ph in mq.change_.items()},
            }
        )
    g = mon.groups_
    meta = {
        "version": STATE_VERSION,
        "settings": _settings_json(mon.settings),
        "groups": {
            "seen": g.seen_,
            "counts": [[k, v] for k, v in g.counts_.items()],
            "chosen": None if g.chosen_ is None else sorted(g.chosen_),
        },
        "models": models,
    }
    return PartState(arrays, meta)


def _ph_json(ph: PageHinkley) -> dict[str, Any]:
    return {
        "n": ph.n_,
        "mean": ph.mean_,
        "cum": ph.cum_,
        "min_cum": ph.min_cum_,
        "total": ph.total_events_,
        "alarms": [[a.at_event, a.statistic] for a in ph.alarms_],
    }


# -- reading back (untrusted) -------------------------------------------------------------


def monitor_from_state(settings: MonitorSettings, part: PartState) -> QualityMonitor | None:
    """A monitor with the saved state; ``None`` when it was saved under other settings.

    :class:`StateError` when the state is malformed.
    """
    meta = part.meta
    if meta.get("version") != STATE_VERSION:
        raise StateError(f"quality state version {str(meta.get('version'))[:20]!r} is not read")
    if meta.get("settings") != _settings_json(settings):
        return None
    mon = QualityMonitor(settings)
    _load_groups(mon.groups_, meta.get("groups"), settings)
    models = meta.get("models")
    if not isinstance(models, list) or len(models) > MAX_MODELS:
        raise StateError(f"models are not a list of at most {MAX_MODELS}")
    allowed = {ALL_GROUP, OTHER_GROUP, *mon.groups_.labels}
    for i, m in enumerate(models):
        if not isinstance(m, dict):
            raise StateError(f"model {i} is not a map")
        name = _text(m.get("name"), f"model {i} name")
        if name in mon.models_:
            raise StateError(f"model {name!r} appears twice")
        mon.models_[name] = _load_model(settings, m, part.arrays, i, allowed)
    return mon


def _text(value: Any, what: str) -> str:
    if not isinstance(value, str) or len(value) > MAX_NAME_CHARS:
        raise StateError(f"{what} is not a name of at most {MAX_NAME_CHARS} characters")
    return value


def _count(value: Any, what: str, top: int = 1 << 62) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not 0 <= value <= top:
        raise StateError(f"{what} is not a count in 0..{top}")
    return value


def _real(value: Any, what: str) -> float:
    if not isinstance(value, int | float) or isinstance(value, bool) or not math.isfinite(value):
        raise StateError(f"{what} is not a finite number")
    return float(value)


def _array(arrays: dict[str, np.ndarray], key: str, kind: str, ndim: int) -> np.ndarray:
    arr = arrays.get(key)
    if arr is None or arr.dtype.kind not in kind or arr.ndim != ndim:
        raise StateError(f"array {key!r} is missing or of the wrong type or shape")
    return arr


def _load_groups(g: GroupLabels, raw: Any, settings: MonitorSettings) -> None:
    if not isinstance(raw, dict):
        raise StateError("group labels are not a map")
    g.seen_ = _count(raw.get("seen"), "groups seen")
    counts = raw.get("counts")
    if not isinstance(counts, list) or len(counts) > MAX_TRACKED_VALUES:
        raise StateError(f"group counts are not a list of at most {MAX_TRACKED_VALUES}")
    g.counts_ = {}
    for row in counts:
        if not isinstance(row, list) or len(row) != 2:
            raise StateError("a group count is not a [value, count] pair")
        g.counts_[_text(row[0], "group value")] = _count(row[1], "group count")
    chosen = raw.get("chosen")
    if chosen is None:
        g.chosen_ = None
        return
    if not isinstance(chosen, list) or len(chosen) > settings.group_top_k:
        raise StateError(f"chosen groups are not a list of at most {settings.group_top_k}")
    g.chosen_ = frozenset(_text(c, "group label") for c in chosen)


def _load_model(
    s: MonitorSettings,
    m: dict[str, Any],
    arrays: dict[str, np.ndarray],
    i: int,
    allowed: set[str],
) -> ModelQuality:
    mq = ModelQuality(s)
    mq.events_ = _count(m.get("events"), "events")
    groups = m.get("groups")
    if not isinstance(groups, list) or not set(map(str, groups)) <= allowed:
        raise StateError(f"model {i}: groups are not among {sorted(allowed)[:12]}")
    p = _array(arrays, f"m{i}.p", "f", 1)
    y = _array(arrays, f"m{i}.y", "f", 1)
    sizes = _array(arrays, f"m{i}.sizes", "iu", 2)
    if sizes.shape != (len(groups), 2) or p.size != y.size or int(sizes.sum()) != p.size:
        raise StateError(f"model {i}: window sizes do not match the arrays")
    if ((p < 0) | (p > 1) | (y < 0) | (y > 1)).any():
        raise StateError(f"model {i}: forecasts and outcomes must lie in [0, 1]")
    at = 0
    for group, (n_recent, n_ref) in zip(groups, sizes.tolist(), strict=True):
        pair = mq.windows_[str(group)] = WindowPair(s.recent_n, s.reference_n, s.n_bins)
        for rq, n in ((pair.recent, n_recent), (pair.reference, n_ref)):
            if not 0 <= n <= rq.window_n:
                raise StateError(f"model {i}: a window of {rq.window_n} holds {n} events")
            _fill(rq, p[at : at + n], y[at : at + n])
            at += n
    _load_drift(mq.drift_, m, arrays, i)
    change = m.get("change")
    if not isinstance(change, dict) or set(change) != set(CHANGE_DIRECTIONS):
        raise StateError(f"model {i}: change detectors are not {list(CHANGE_DIRECTIONS)}")
    for d, ph in mq.change_.items():
        _load_ph(ph, change[d], f"model {i} change {d}")
    return mq


def _fill(rq: RollingQuality, p: np.ndarray, y: np.ndarray) -> None:
    n = int(p.size)
    pad = [0.0] * (rq.window_n - n)
    rq.p_ = p.astype(np.float64).tolist() + pad
    rq.y_ = y.astype(np.float64).tolist() + pad
    rq.size_ = n
    rq.head_ = n % rq.window_n


def _load_drift(fd: FeatureDrift, m: dict[str, Any], arrays: dict[str, np.ndarray], i: int) -> None:
    categories = m.get("categories")
    cap = len(fd.recent_) * (fd.recent_n + fd.reference_n)
    if not isinstance(categories, list) or len(categories) > cap:
        raise StateError(f"model {i}: drift categories are not a list of at most {cap}")
    cats = [_text(c, "drift category") for c in categories]
    x = _array(arrays, f"m{i}.x", "f", 1)
    code = _array(arrays, f"m{i}.code", "iu", 1)
    fsizes = _array(arrays, f"m{i}.fsizes", "iu", 2)
    if fsizes.shape != (len(fd.recent_), 2) or x.size != code.size or int(fsizes.sum()) != x.size:
        raise StateError(f"model {i}: drift window sizes do not match the arrays")
    if ((code < -1) | (code >= len(cats))).any():
        raise StateError(f"model {i}: a drift category index is out of range")
    at = 0
    for feature, (n_recent, n_ref) in zip(list(fd.recent_), fsizes.tolist(), strict=True):
        for win, n in ((fd.recent_[feature], n_recent), (fd.reference_[feature], n_ref)):
            if not 0 <= n <= (win.values.maxlen or 0):
                raise StateError(f"model {i}: a drift window of {win.values.maxlen} holds {n}")
            vals: list[float | str] = [
                float(v) if c < 0 else cats[c]
                for v, c in zip(x[at : at + n].tolist(), code[at : at + n].tolist(), strict=True)
            ]
            win.values = deque(vals, maxlen=win.values.maxlen)
            win.n_text = sum(isinstance(v, str) for v in vals)
            at += n


def _load_ph(ph: PageHinkley, raw: Any, what: str) -> None:
    if not isinstance(raw, dict):
        raise StateError(f"{what} is not a map")
    ph.n_ = _count(raw.get("n"), f"{what} n")
    ph.total_events_ = _count(raw.get("total"), f"{what} total")
    ph.mean_ = _real(raw.get("mean"), f"{what} mean")
    ph.cum_ = _real(raw.get("cum"), f"{what} cum")
    ph.min_cum_ = _real(raw.get("min_cum"), f"{what} min_cum")
    if ph.n_ > ph.total_events_ or ph.min_cum_ > 0 or ph.min_cum_ > ph.cum_:
        raise StateError(f"{what}: the running sums do not fit together")
    alarms = raw.get("alarms")
    if not isinstance(alarms, list) or len(alarms) > MAX_ALARMS:
        raise StateError(f"{what}: alarms are not a list of at most {MAX_ALARMS}")
    ph.alarms_ = []
    for a in alarms:
        if not isinstance(a, list) or len(a) != 2:
            raise StateError(f"{what}: an alarm is not an [event, statistic] pair")
        ph.alarms_.append(ChangeAlarm(_count(a[0], "alarm event"), _real(a[1], "alarm statistic")))
