"""Label efficiency of the active-learning picker: learning curves per strategy.

Run it from the repository root with ``python -m benchmarks.label_efficiency`` (``--help``
lists the options; ``--quick`` is a smoke run). A simulation of the labelling loop with
the truth standing in for the annotators: for every strategy (random, entropy, margin,
bald, coreset, mixed) and every seed, round 0 labels a seeded random share of the pool
(``--initial-share``, at least ``model.min_labelled_tiles``); then, round after round, the
head is retrained from cached encoder features, measured on a fixed held-out set, proposes
on the unlabelled pool, and the strategy picks the next ``k`` tiles, whose truth is
revealed. ``share_to_95pct`` is the share of pool tiles at which a curve first reaches
95 % of the full-label mIoU, interpolated linearly between rounds (null when the rounds
run never reach it); it is given for the curve of the mean over seeds (against the mean
full mIoU) and per seed (against that seed's full mIoU).

Modules, one concept each:

:mod:`~benchmarks.label_efficiency.tiles`
    :class:`TileSet`, the tiles of the pool or the held-out set.
:mod:`~benchmarks.label_efficiency.curves`
    Pure arithmetic: round sizes, share to a target, savings, per-seed summaries, targets.
:mod:`~benchmarks.label_efficiency.simulate`
    The loop: train, evaluate, score the pool, pick (:func:`run_curves`).
:mod:`~benchmarks.label_efficiency.loading`
    The demo plots and the peanut photos as tile sets (features cached).
:mod:`~benchmarks.label_efficiency.report`
    Plots and the markdown page.
:mod:`~benchmarks.label_efficiency.cli`
    Options, the JSON line and the report files.

Masks are decision support only: spraying and fungicide decisions follow local
regulations and licensed agronomic advice.
"""

from benchmarks.label_efficiency.curves import (
    TARGET_MAX_SHARE,
    TARGET_MIN_SAVINGS_PCT,
    round_sizes,
    savings_pct,
    share_to_target,
    summarise_curves,
    targets_met,
)
from benchmarks.label_efficiency.loading import load_demo, load_peanut
from benchmarks.label_efficiency.report import markdown_table, plot_curves
from benchmarks.label_efficiency.simulate import NEEDS_PROPOSALS, run_curves
from benchmarks.label_efficiency.tiles import TileSet

__all__ = [
    "TileSet",
    "NEEDS_PROPOSALS",
    "TARGET_MAX_SHARE",
    "TARGET_MIN_SAVINGS_PCT",
    "share_to_target",
    "savings_pct",
    "round_sizes",
    "summarise_curves",
    "targets_met",
    "run_curves",
    "load_demo",
    "load_peanut",
    "plot_curves",
    "markdown_table",
    "main",
]


def main(argv: list[str] | None = None) -> int:
    """The command line (:func:`benchmarks.label_efficiency.cli.main`)."""
    from benchmarks.label_efficiency.cli import main as cli_main

    return cli_main(argv)
