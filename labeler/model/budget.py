"""How much training a label set gets: the optimiser-step budget and the validation sample.

Passing over every labelled tile a fixed number of times makes training time grow in
proportion to the label set, although the head (a few tens of thousands of weights)
gains little from the thousandth tile that it did not already get from the hundredth.
The step budget therefore grows sub-linearly: with ``n`` training tiles,

    steps(n) = round(STEP_BASE * n ** STEP_POWER)

(clipped to at least :data:`MIN_STEPS`), and training stops at the budget even when the
passes (``model.epochs``) would let it run on. The form is common practice, no source.

The constants were chosen by measurement on the demo plots: the split of
``benchmarks/proposal_quality.py`` (12 labelled tiles, 10 training and 2 validation; mIoU
of soil, crop, weed and symptom over the 108 other tiles, refined masks), training seed
0 unless marked, cached turns, 128-pixel training windows. Seconds are training only
(warm feature cache) on the two shared cores of the development machine, under a load
average of 4 to 16 from other jobs: compare them within a row's load, not with the
targets. "last" keeps the state at the end of the budget, "best" the one early stopping
chose on the two validation tiles.

=====  ======  =====  ======  =====  =====  ======  =======  ====
steps  batch   width  lr      keep   seed   mIoU    seconds  load
=====  ======  =====  ======  =====  =====  ======  =======  ====
253    8       32     3e-3    best   0      0.657   31       4
253    8       32     3e-3    best   1      0.634   115      14
253    8       32     1e-2    best   0      0.679   108      14
450    8       32     1e-2    best   0      0.710   302      15
450    8       32     1e-2    best   1      0.690   295      16
450    8       32     1e-2    last   0      0.711   187      12
450    8       32     1e-2    last   1      0.701   185      12
600    8       32     1e-2    last   0      0.725   223      13
640    8       32     3e-3    best   0      0.689   147      10
450    8       48     6e-3    last   1      0.719   231      13
600    8       48     6e-3    last   0      0.732   149      8
400    4       48     6e-3    last   0      0.709   65       9
600    4       32     1e-2    last   0      0.716   69       9
600    4       48     6e-3    last   0      0.734   104      10
600    4       48     6e-3    last   1      0.721   97       9
720    4       48     6e-3    last   0      0.733   220      8
=====  ======  =====  ======  =====  =====  ======  =======  ====

More steps kept helping up to about 600; batches of 4 tiles (``model.batch_size``) make
a step about half as dear as batches of 8 at no loss; a head of width 48
(:data:`labeler.model.train.TRAIN_WIDTH`) at a peak rate of 6e-3
(:data:`labeler.model.train.TRAIN_LR`) beat width 32. The earlier training through the
encoder (colour-jittered tiles encoded every epoch, 640 steps over whole tiles, early
stopping) gave 0.676 on this split in 249 s, and training without the validation slice
(all 12 tiles) 0.670 at 277 steps and 0.696 at 500: neither photometric augmentation of
the encoder's input nor the held-out tiles explain the loss of quality, the number of
steps and the rate do. Training the last two encoder stages too (``finetune_stages=2``,
600 steps, batch 4, width 48) gave 0.740 in 296 s at load 8: +0.006 for about three times
the time, so it stays off by default.

The defaults give 603 steps for 10 training tiles (12 labelled), 1 828 for 160 (1 600: the 40 passes of ``model.epochs`` end first) and
3 479 for 800 (the growth of 0.4 keeps the large label sets near the steps, in batches of
8 tiles, that the earlier constants gave them: ``80 * n ** 0.5`` made 1 012 and 2 263
steps); the large sets' quality and time with the new constants were not measured.

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
STEP_BASE = 240.0
#: Growth of the budget with the number of training tiles (0.4: four times the tiles,
#: 1.74 times the steps).
STEP_POWER = 0.4
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
