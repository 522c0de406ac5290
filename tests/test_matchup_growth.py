"""Entity arrays of the matchup models grow in chunks, with the same values however
the entities arrived."""

from __future__ import annotations

import numpy as np

from streamrate.models.base import GROW_ROWS, with_room
from streamrate.models.matchup import BladeChest, hashed_uniform


def test_rows_are_initialised_in_chunks_and_reserved_ahead() -> None:
    m = BladeChest(dims=4, context="none", forget_per_day=0.1, feature_width=8)
    m.entities_.rows(f"quill-{i}" for i in range(3 * GROW_ROWS + 5))
    m._grow(10)
    assert 10 <= m._rows_ready < 64
    reserve = m.own_.shape[0]
    m._grow(GROW_ROWS + 100)
    # Memory is taken at most one chunk past what is asked for ...
    assert GROW_ROWS + 100 <= m._rows_ready <= 2 * GROW_ROWS + 100
    # ... while the reserve (pages not yet written) at least doubles.
    assert m.own_.shape[0] >= max(2 * reserve, m._rows_ready)
    n = len(m.entities_)
    m._grow(n)
    ready = m._rows_ready
    # Initialised rows hold the seeded start, AdaGrad sums, "never seen" times and
    # "no features"; the rows past them are untouched zeros.
    want = 0.1 * hashed_uniform(m.seed, 0, ready, 8)
    np.testing.assert_allclose(m.own_[:ready, 1:], want.astype(np.float32), rtol=0, atol=0)
    assert np.all(m.own_[:ready, 0] == 0.0)
    assert np.all(m.acc_[:ready, 1:] == np.float32(m.accum_init))
    assert np.all(m.acc_[:ready, 0] == np.float32(m.prior_var))  # the strength's variance
    assert np.all(np.isnan(m.last_s_[:ready]))
    assert np.all(m.feat_idx_[:ready] == -1)
    assert not m.own_[ready:].any() and not m.acc_[ready:].any()


def test_growth_in_small_steps_equals_growth_at_once() -> None:
    a, b = BladeChest(dims=3), BladeChest(dims=3)
    for m in (a, b):
        m.entities_.rows(f"quill-{i}" for i in range(GROW_ROWS + 777))
    a._grow(GROW_ROWS + 777)
    for need in range(1, GROW_ROWS + 778, 9_000):
        b._grow(need)
    b._grow(GROW_ROWS + 777)
    n = GROW_ROWS + 777
    assert np.array_equal(a.own_[:n], b.own_[:n])
    assert np.array_equal(a.acc_[:n], b.acc_[:n])


def test_with_room_keeps_the_rows_in_use() -> None:
    x = np.arange(12, dtype=np.float32).reshape(6, 2)
    same = with_room(x, 6, 6)
    assert same is x
    grown = with_room(x, 4, 7)
    assert grown.shape == (12, 2) and grown.dtype == np.float32
    assert np.array_equal(grown[:4], x[:4]) and not grown[4:].any()
