"""PSI against hand-worked examples; Page-Hinkley delay and false alarms; a patched world."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from streamrate.calibration import pointwise_log_loss
from streamrate.drift import (
    PSI_FLOOR_SHARE,
    PSI_MAJOR,
    PSI_MODERATE,
    FeatureDrift,
    PageHinkley,
    psi,
    psi_categorical,
    psi_numeric,
)
from streamrate.models.elo import Elo
from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.simulate import simulate, world_spec


def test_psi_hand_worked_shares() -> None:
    # By hand: reference shares (0.25, 0.25, 0.5), current (0.5, 0.25, 0.25):
    #   (0.5 - 0.25) ln(0.5 / 0.25) + 0 + (0.25 - 0.5) ln(0.25 / 0.5)
    #   = 0.25 ln 2 + 0.25 ln 2 = 0.5 ln 2 = 0.346574
    assert psi([1, 1, 2], [2, 1, 1]) == pytest.approx(0.346574, abs=1e-6)
    assert psi([3, 3, 6], [30, 15, 15]) == pytest.approx(0.5 * math.log(2), rel=1e-12)
    assert psi([5, 5], [5, 5]) == 0.0


def test_psi_numeric_hand_worked_on_reference_median() -> None:
    # By hand, 2 bins: reference 1..10 has median 5.5, so cells (-inf, 5.5] and
    # (5.5, inf) hold 5 and 5 (shares 0.5, 0.5). Current [1, 2, 6, 7, 8, 9, 10, 11]
    # puts 2 and 6 there (0.25, 0.75):
    #   (0.25 - 0.5) ln(0.25 / 0.5) + (0.75 - 0.5) ln(0.75 / 0.5)
    #   = 0.25 ln 2 + 0.25 ln 1.5 = 0.25 * (0.693147 + 0.405465) = 0.274653
    ref = np.arange(1, 11)
    cur = np.array([1, 2, 6, 7, 8, 9, 10, 11])
    assert psi_numeric(ref, cur, n_bins=2) == pytest.approx(0.274653, abs=1e-6)


def test_psi_categorical_with_a_new_category_uses_the_floor_share() -> None:
    # By hand: reference {saltflats: 1.0}; current {saltflats: 0.5, glasswood: 0.5}.
    # The empty reference cell gets share f = PSI_FLOOR_SHARE:
    #   (0.5 - 1) ln(0.5 / 1) + (0.5 - f) ln(0.5 / f)
    f = PSI_FLOOR_SHARE
    want = (0.5 - 1.0) * math.log(0.5) + (0.5 - f) * math.log(0.5 / f)
    got = psi_categorical(["saltflats"] * 4, ["saltflats", "glasswood"] * 2)
    assert got == pytest.approx(want, rel=1e-12)
    assert got > PSI_MAJOR


def test_psi_of_same_distribution_is_small_and_of_shifted_is_large() -> None:
    # Thresholds 0.1 / 0.25 are common practice (credit-scoring usage).
    rng = np.random.default_rng(0)
    ref = rng.normal(0, 1, 20000)
    assert psi_numeric(ref, rng.normal(0, 1, 5000)) < PSI_MODERATE / 5
    assert psi_numeric(ref, rng.normal(1.0, 1, 5000)) > PSI_MAJOR


def test_psi_is_nan_for_an_empty_side() -> None:
    assert math.isnan(psi_numeric([], [1.0]))
    assert math.isnan(psi_categorical(["a"], []))


def test_feature_drift_treats_numbers_and_categories() -> None:
    fd = FeatureDrift(["patch", "map"], recent_n=100, reference_n=200)
    rng = np.random.default_rng(1)
    for i in range(300):
        fd.add(0.5, {"patch": 1.4 if i < 200 else 1.5, "map": str(rng.choice(["a", "b"]))})
    got = fd.psi()
    assert got["patch"] > PSI_MAJOR
    assert got["map"] < PSI_MODERATE
    assert set(got) == {"p_win", "patch", "map"}


def _loss_stream(
    rng: np.random.Generator, n: int, shift_at: int | None = None, flip: float = 0.3
) -> np.ndarray:
    """Per-event log loss of forecasts p ~ U(0.2, 0.8); from ``shift_at`` on, the true
    probability moves a fraction ``flip`` of the way towards 1 - p."""
    p = rng.uniform(0.2, 0.8, n)
    truth = p.copy()
    if shift_at is not None:
        truth[shift_at:] = (1 - flip) * p[shift_at:] + flip * (1 - p[shift_at:])
    y = (rng.random(n) < truth).astype(np.float64)
    return pointwise_log_loss(p, y)


def test_page_hinkley_stays_quiet_on_stationary_loss() -> None:
    # Measured over 20 seeds x 20,000 events with the defaults (delta 0.02, threshold 40):
    # 0 false alarms (so the rate is below about 1 in 130,000 events at 95 %).
    alarms = 0
    for seed in range(20):
        ph = PageHinkley()
        alarms += sum(ph.update(x) for x in _loss_stream(np.random.default_rng(seed), 20000))
    assert alarms == 0


def test_page_hinkley_finds_a_rise_in_mean_loss_within_bounded_delay() -> None:
    # A flip of 0.3 raises the expected loss by about 0.07 nats; measured delays over
    # 20 seeds: median about 650 events, maximum about 1,100. The bound asserted is 2,000.
    delays = []
    for seed in range(20):
        x = _loss_stream(np.random.default_rng(1000 + seed), 8000, shift_at=4000)
        ph = PageHinkley()
        fired = [i for i, v in enumerate(x) if ph.update(v)]
        assert all(i >= 4000 for i in fired), f"false alarm before the shift: {fired}"
        assert fired, "no alarm after the shift"
        delays.append(fired[0] - 4000)
    assert max(delays) < 2000
    assert 200 < float(np.median(delays)) < 1200


def test_page_hinkley_resets_after_firing_and_down_direction_sees_a_fall() -> None:
    ph = PageHinkley(delta=0.0, threshold=3.0, min_events=5, direction="down")
    assert not any(ph.update(1.0) for _ in range(20))
    assert any(ph.update(0.0) for _ in range(20))
    assert ph.n_alarms == 1
    assert ph.statistic < 3.0 and ph.n_ < 20  # started over after the alarm


def _scored_world(
    patch_at: float | None, seed: int
) -> tuple[list[tuple[int, str]], dict[int, dict[str, float]]]:
    """Elo forecasts of a simulated world fed to a monitor: (alarms, PSI every 500 events)."""
    spec = replace(
        world_spec("patch", matches=16000, seed=seed, patch_shift=3.0), patch_at=patch_at
    )
    world = simulate(spec)
    preds = Elo().learn_many(world.events)
    mon = QualityMonitor(
        MonitorSettings(recent_n=1000, reference_n=4000, drift_fields=("map", "patch"))
    )
    alarms: list[tuple[int, str]] = []
    psis: dict[int, dict[str, float]] = {}
    for i, (ev, p) in enumerate(zip(world.events, preds.expected_score, strict=True)):
        alarms += [(i, d) for d in mon.add("elo", p, ev.score, ev.context)]
        if (i + 1) % 500 == 0:
            psis[i + 1] = mon.models_["elo"].drift_.psi()
    return alarms, psis


@pytest.mark.slow
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_patched_world_fires_drift_and_change_and_unpatched_stays_quiet(seed: int) -> None:
    # The simulated Quillrock world with a balance patch at match 8,000 (of 16,000):
    # the patch shifts two play styles by 3 logits, which makes matches more lopsided,
    # so the Elo forecasts' loss *falls* and their spread widens. Measured over seeds
    # 0-5: the "down" detector first fired 450-930 matches after the patch and never
    # in the same worlds without the patch (0 alarms in 6 x 16,000 matches); PSI of the
    # forecasts peaked at 0.15-0.24 after the patch and stayed under 0.08 without it
    # from match 6,000 on (before that the ratings are still spreading out).
    patch_index = 8000
    alarms, psis = _scored_world(0.5, seed)
    assert alarms, "no change detected after the patch"
    assert patch_index <= alarms[0][0] < patch_index + 2000
    after = [v for k, v in psis.items() if k > patch_index]
    assert max(v["p_win"] for v in after) > PSI_MODERATE
    assert psis[patch_index + 1000]["patch"] > PSI_MAJOR  # recent window all new patch
    full = [v for k, v in psis.items() if k >= 5000]  # both windows full
    assert max(v["map"] for v in full) < PSI_MODERATE  # maps are uniform throughout

    quiet_alarms, quiet_psis = _scored_world(None, seed)
    assert quiet_alarms == [], "change detected in a world without a patch"
    settled = [v for k, v in quiet_psis.items() if k >= 6000]
    assert max(v["p_win"] for v in settled) < PSI_MODERATE
    assert "patch" not in quiet_psis[16000] or quiet_psis[16000]["patch"] < PSI_MODERATE
