"""The shared pieces of the rule-based learners: the Spread that keeps weighted majority's m*."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from learners.rules import Spread


def extremes(values: np.ndarray) -> tuple[int, int]:
    """min(0, min) and max(0, max) from the definition (common practice: a full scan)."""
    return min(0, int(values.min(initial=0))), max(0, int(values.max(initial=0)))


def check(spread: Spread, values: np.ndarray, t: int) -> None:
    lo, hi = extremes(values)
    assert (spread.lo, spread.hi) == (lo, hi), t
    assert lo == 0 or spread.n_lo == int(np.count_nonzero(values == lo)), t
    assert hi == 0 or spread.n_hi == int(np.count_nonzero(values == hi)), t


@settings(max_examples=80, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    members=st.integers(1, 12),
    window=st.sampled_from([8, 16, 64, None]),
    drift=st.sampled_from([0.5, 0.8, 0.95]),
    live=st.sampled_from(["none", "scan", "histogram", "switch"]),
    rebuild_at=st.integers(0, 400),
)
def test_extremes_follow_a_full_scan_after_every_move(
    seed: int, members: int, window: int | None, drift: float, live: str, rebuild_at: int
) -> None:
    # Members drift one way (drift = chance of a step up), so with a narrow window the spread
    # outgrows it and the dict, refits and the split moves all take part. live: without the
    # owner's values ("none"), with them counted by scanning ("scan"), by the histogram
    # ("histogram"), or scanned first and then a histogram built from them ("switch").
    # Rebuilding from the values (as a restore does) must continue exactly.
    rng = np.random.default_rng(seed)
    values = np.zeros(members, dtype=np.int64)
    limit = {"none": 0, "scan": 100, "histogram": 0, "switch": 100}[live]

    def fresh(values: np.ndarray) -> Spread:
        if live == "none":
            return Spread(values, window=window)
        return Spread(values, live=True, window=window, scan_limit=limit)

    spread = fresh(values)
    for t in range(400):
        chosen = rng.choice(members, size=int(rng.integers(0, members + 1)), replace=False)
        step = 1 if rng.random() < drift else -1
        old = values[chosen]
        values[chosen] += step  # a live owner updates its values before the move
        spread.move(old, step)
        check(spread, values, t)
        if rng.random() < 0.05:  # reading the histogram applies the pending moves; mostly not
            for v in {int(x) for x in values} - {0}:
                assert spread.count(v) == int(np.count_nonzero(values == v))
        if t == rebuild_at:
            spread = fresh(values)
            check(spread, values, t)
        if live == "switch" and t == 200:
            spread.scan_limit = 0  # as when the owner's array grows past the limit


@pytest.mark.parametrize("window", [8, None])
def test_one_member_far_out_with_the_rest_near_zero(window: int | None) -> None:
    # The common shape on real flags: one flag (always on) walks far from 0 while the rare flags
    # wander near it; then it walks back through 0 to the other side.
    values = np.zeros(40, dtype=np.int64)
    spread = Spread(window=window)
    rng = np.random.default_rng(4)
    peak = 0
    for t in range(1200):
        out = 1 if t < 600 else -1  # the far member's direction
        if t % 2:
            chosen = np.concatenate([[0], 1 + rng.choice(39, size=5, replace=False)])
            step = out
        else:
            chosen = 1 + rng.choice(39, size=5, replace=False)
            step = -out
        spread.move(values[chosen], step)
        values[chosen] += step
        check(spread, values, t)
        peak = max(peak, int(values[0]))
        if t in (500, 900):
            spread = Spread(values, window=window)
    assert peak == 300  # far past a window of 8 values


def test_memory_follows_the_members_not_how_far_they_move() -> None:
    # STYLE.md: memory grows with what is seen. One member walks 5,000 steps out; the histogram
    # of 50 live members stays within max(1024, 2 * 50) values, the rest counted one by one.
    values = np.zeros(50, dtype=np.int64)
    spread = Spread(values, live=True, scan_limit=0)  # keep the histogram at any size
    rng = np.random.default_rng(2)
    for t in range(5000):
        chosen = np.concatenate([[0], 1 + rng.choice(49, size=3, replace=False)])
        old = values[chosen]
        values[chosen] += 1
        spread.move(old, 1)
        chosen = 1 + rng.choice(49, size=3, replace=False)
        old = values[chosen]
        values[chosen] -= 1
        spread.move(old, -1)
        if t % 500 == 0:
            check(spread, values, t)
    check(spread, values, 5000)
    assert values[0] == 5000
    assert len(spread.hist) <= 1024
    assert len(spread.far) <= 50
    assert spread.count(5000) == 1
