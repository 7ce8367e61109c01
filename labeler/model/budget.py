"""How much training a label set gets: the optimiser-step budget and the validation sample.

Passing over every labelled tile a fixed number of times makes training time grow in
proportion to the label set, although the head (a few tens of thousands of weights)
gains little from the thousandth tile that it did not already get from the hundredth.
The step budget therefore grows sub-linearly: with ``n`` training tiles,

    steps(n) = round(STEP_BASE * n ** STEP_POWER)

(clipped to at least :data:`MIN_STEPS`), and training stops at the budget even when the
passes (``model.epochs``) and early stopping would let it run on. The form is common
practice, no source; the values are a first choice, not yet settled by measurement: on
the demo plots with 12 labelled tiles (253 steps) the proposals' mIoU was 0.652-0.657
against 0.729 with the earlier epoch-based training, and 2.5 times the budget gave 0.699
(``benchmarks/proposal_quality.py``, ``benchmarks/retrain_speed.py``; README).

Validation after every epoch scores a fixed, seeded sample of at most
:data:`VALIDATION_TILES` held-out tiles, so that a large label set does not spend its
time validating.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "STEP_BASE",
    "STEP_POWER",
    "MIN_STEPS",
    "VALIDATION_TILES",
    "step_budget",
    "validation_sample",
]

#: Steps for one training tile; the budget grows as ``n ** STEP_POWER`` from there.
STEP_BASE = 80.0
#: Growth of the budget with the number of training tiles (0.5: four times the tiles,
#: twice the steps).
STEP_POWER = 0.5
#: Fewest steps of a budget.
MIN_STEPS = 16
#: Most validation tiles scored after each epoch.
VALIDATION_TILES = 32


def step_budget(n_train: int, *, base: float = STEP_BASE, power: float = STEP_POWER) -> int:
    """Optimiser steps for ``n_train`` training tiles (see the module docstring).

    Parameters
    ----------
    n_train : int
        Training tiles (at least 1).
    base, power : float
        The constants of the rule; ``base > 0``, ``0 <= power <= 1``.

    Returns
    -------
    int
        At least :data:`MIN_STEPS`.

    Raises
    ------
    ValueError
        For ``n_train < 1`` or constants outside their ranges.
    """
    if n_train < 1:
        raise ValueError(f"n_train: expected at least 1 training tile, got {n_train}")
    if not (base > 0 and 0.0 <= power <= 1.0):
        raise ValueError(
            f"base, power: expected base > 0 and 0 <= power <= 1, got {base} and {power}"
        )
    return max(MIN_STEPS, round(base * n_train**power))


def validation_sample(
    val_ids: Sequence[int], rng: np.random.Generator, *, limit: int = VALIDATION_TILES
) -> list[int]:
    """The validation tiles scored after each epoch: all of them, or a seeded sample.

    Parameters
    ----------
    val_ids : sequence of int
        Held-out tile numbers.
    rng : numpy.random.Generator
        Draws the sample when there are more than ``limit`` tiles.
    limit : int
        Most tiles kept (at least 1).

    Returns
    -------
    list of int
        Ascending tile numbers.
    """
    if limit < 1:
        raise ValueError(f"limit: expected at least 1 validation tile, got {limit}")
    ids = sorted(int(i) for i in val_ids)
    if len(ids) <= limit:
        return ids
    return sorted(int(i) for i in rng.choice(ids, size=limit, replace=False))
