"""The step budget grows sub-linearly; validation scores a fixed sample."""

import numpy as np
import pytest

from labeler.model.budget import (
    MIN_STEPS,
    STEP_BASE,
    STEP_POWER,
    VALIDATION_TILES,
    step_budget,
    validation_sample,
)


def test_budget_on_worked_values():
    # worked by hand: round(base * n ** power)
    assert step_budget(100, base=80.0, power=0.5) == 800
    assert step_budget(10, base=80.0, power=0.5) == 253  # 80 * 3.1623 = 252.98
    assert step_budget(1, base=10.0, power=0.5) == MIN_STEPS  # 10 < 16: the floor
    assert step_budget(1000, base=80.0, power=0.0) == 80  # power 0: a fixed budget


def test_budget_grows_sub_linearly():
    steps = [step_budget(n) for n in (12, 200, 1000, 4000)]
    assert steps == sorted(steps)
    # four times the tiles: 4 ** STEP_POWER times the steps, fewer steps per tile
    ratio = step_budget(4000) / step_budget(1000)
    assert ratio == pytest.approx(4**STEP_POWER, rel=1e-3) and ratio < 4
    assert step_budget(12) == round(STEP_BASE * 12**STEP_POWER)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"n_train": 0}, r"n_train: expected at least 1 training tile, got 0"),
        ({"n_train": 5, "base": 0.0}, r"base, power: expected base > 0 and 0 <= power <= 1"),
        ({"n_train": 5, "power": 1.5}, r"base, power: expected base > 0 and 0 <= power <= 1"),
    ],
)
def test_bad_budget_arguments_are_refused(kwargs, match):
    with pytest.raises(ValueError, match=match):
        step_budget(**kwargs)


def test_validation_sample_keeps_small_sets_and_samples_large_ones():
    rng = np.random.default_rng(0)
    assert validation_sample([5, 2, 9], rng) == [2, 5, 9]
    ids = list(range(100, 300))
    got = validation_sample(ids, np.random.default_rng(1))
    assert len(got) == VALIDATION_TILES == 32 and got == sorted(set(got))
    assert set(got) <= set(ids)
    assert got == validation_sample(ids, np.random.default_rng(1))  # seeded
    with pytest.raises(ValueError, match=r"limit: expected at least 1 validation tile, got 0"):
        validation_sample(ids, rng, limit=0)
