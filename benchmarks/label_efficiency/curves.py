"""Learning-curve arithmetic: round sizes, share to a target, savings, per-seed summaries.

Pure functions of numbers: no model, no files. A learning curve is the held-out mIoU after
each round against the labelled share of the pool. ``share_to_target`` interpolates the
share at which a curve first reaches 95 % of the full-label mIoU linearly between rounds
(common practice, no source); :func:`summarise_curves` turns the per-seed curves of every
strategy into the report's figures; :func:`targets_met` compares ``mixed`` with the
picker's targets.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

__all__ = [
    "TARGET_SHARE",
    "TARGET_MAX_SHARE",
    "TARGET_MIN_SAVINGS_PCT",
    "round_sizes",
    "share_to_target",
    "savings_pct",
    "summarise_curves",
    "targets_met",
    "rounded",
    "rounded_one",
]

#: A curve "reaches" this share of the full-label mIoU.
TARGET_SHARE = 0.95
#: The picker's targets (project goals; published segmentation work reaches 95 % of the
#: full-label mIoU with 7-24 % of the labels: Siddiqui et al., CVPR 2020).
TARGET_MAX_SHARE = 0.30
TARGET_MIN_SAVINGS_PCT = 25.0


def round_sizes(n_pool: int, *, n_initial: int, k: int, rounds: int) -> list[int]:
    """Labelled tiles after each round: ``n_initial``, then ``k`` more per round.

    The list stops early when the pool is exhausted (the last round takes the rest).

    Raises
    ------
    ValueError
        ``n_initial`` outside 1..``n_pool``, ``k`` below 1 or ``rounds`` below 0.
    """
    if not 1 <= n_initial <= n_pool:
        raise ValueError(f"n_initial: expected 1..{n_pool} tiles (the pool size), got {n_initial}")
    if k < 1:
        raise ValueError(f"k: expected at least 1 tile per round, got {k}")
    if rounds < 0:
        raise ValueError(f"rounds: expected 0 or more, got {rounds}")
    sizes = [n_initial]
    for _ in range(rounds):
        if sizes[-1] >= n_pool:
            break
        sizes.append(min(n_pool, sizes[-1] + k))
    return sizes


def share_to_target(shares: Sequence[float], mious: Sequence[float], target: float) -> float | None:
    """Share of labelled tiles at which a learning curve first reaches ``target``.

    The curve is the polyline through ``(shares[r], mious[r])``; between the last round
    below the target and the first round at or above it the share is interpolated
    linearly. A curve that starts at or above the target gives ``shares[0]``.

    Parameters
    ----------
    shares : sequence of float, shape (R,)
        Labelled share of the pool per round, increasing.
    mious : sequence of float, shape (R,)
        mIoU per round; NaN rounds never count as reaching the target.
    target : float
        The mIoU to reach (95 % of the full-label mIoU).

    Returns
    -------
    share : float or None
        None when no round reaches the target (or the target is NaN).

    Raises
    ------
    ValueError
        Shares and mIoUs of different lengths, or shares that do not increase.
    """
    s = np.asarray(shares, np.float64)
    m = np.asarray(mious, np.float64)
    if s.shape != m.shape or s.ndim != 1:
        raise ValueError(
            f"mious: expected one value per share (shape {s.shape}), got shape {m.shape}"
        )
    if s.size and np.any(np.diff(s) <= 0):
        raise ValueError(f"shares: expected strictly increasing shares, got {s.tolist()}")
    if not math.isfinite(target):
        return None
    for r in range(s.size):
        if not (math.isfinite(m[r]) and m[r] >= target):
            continue
        if r == 0 or not math.isfinite(m[r - 1]):
            return float(s[r])
        t = (target - m[r - 1]) / (m[r] - m[r - 1])  # m[r - 1] < target <= m[r]
        return float(s[r - 1] + t * (s[r] - s[r - 1]))
    return None


def savings_pct(share: float | None, share_random: float | None) -> float | None:
    """Tiles saved against random, in % of random's share; None unless both are known."""
    if share is None or share_random is None or share_random <= 0:
        return None
    return 100.0 * (share_random - share) / share_random


def rounded(values) -> list[float | None]:
    """Values rounded to 4 digits for the JSON report; None for NaN and infinities."""
    return [None if not math.isfinite(float(v)) else round(float(v), 4) for v in values]


def rounded_one(value: float | None, digits: int = 4) -> float | None:
    """One value rounded to ``digits``; None stays None, NaN and infinities become None."""
    return None if value is None or not math.isfinite(value) else round(float(value), digits)


def summarise_curves(
    curves: Mapping[str, Sequence[Sequence[float]]],
    full_per_seed: Sequence[float],
    shares: Sequence[float],
) -> dict:
    """The report's figures from the per-seed learning curves of every strategy.

    Parameters
    ----------
    curves : mapping of str to array-like, shape (S, R + 1)
        Per strategy, the held-out mIoU of each seed after each round.
    full_per_seed : sequence of float, shape (S,)
        Held-out mIoU of the head trained on every pool tile, per seed.
    shares : sequence of float, shape (R + 1,)
        Labelled share of the pool after each round.

    Returns
    -------
    summary : dict
        ``full_miou`` (mean over seeds), ``full_miou_per_seed``, ``target_95pct``
        (``TARGET_SHARE`` x the mean) and ``strategies``: per strategy ``miou_by_round``
        (mean over seeds), ``miou_by_round_per_seed``, ``miou_by_round_min`` / ``_max``,
        ``labelled_share_by_round``, ``share_to_95pct`` (mean curve against the target),
        ``share_to_95pct_per_seed`` (each seed's curve against ``TARGET_SHARE`` x its own
        full mIoU) and, when ``random`` is among the strategies,
        ``savings_vs_random_pct`` (from the rounded shares, one decimal),
        ``savings_vs_random_pct_per_seed`` and, where random never reaches the target
        but the strategy does, ``savings_vs_random_pct_at_least`` (against the last
        share: random needs more than that). Values are rounded to 4 digits.
    """
    full_arr = np.asarray(full_per_seed, np.float64)
    full_mean = float(full_arr.mean())
    out: dict[str, dict] = {}
    for strategy, per_seed_list in curves.items():
        per_seed = np.asarray(per_seed_list, np.float64)  # (n_seeds, R + 1)
        if per_seed.shape != (full_arr.size, len(shares)):
            raise ValueError(
                f"curves[{strategy!r}]: expected shape ({full_arr.size}, {len(shares)}) "
                f"(seeds, rounds), got {per_seed.shape}"
            )
        mean_curve = per_seed.mean(axis=0)
        out[strategy] = {
            "miou_by_round": rounded(mean_curve),
            "miou_by_round_per_seed": [rounded(c) for c in per_seed],
            "miou_by_round_min": rounded(per_seed.min(axis=0)),
            "miou_by_round_max": rounded(per_seed.max(axis=0)),
            "labelled_share_by_round": rounded(shares),
            "share_to_95pct": rounded_one(
                share_to_target(shares, mean_curve, TARGET_SHARE * full_mean)
            ),
            "share_to_95pct_per_seed": [
                rounded_one(share_to_target(shares, c, TARGET_SHARE * f))
                for c, f in zip(per_seed, full_arr, strict=True)
            ],
        }
    if "random" in out:
        base = out["random"]
        for entry in out.values():
            entry["savings_vs_random_pct"] = rounded_one(
                savings_pct(entry["share_to_95pct"], base["share_to_95pct"]), 1
            )
            entry["savings_vs_random_pct_per_seed"] = [
                rounded_one(savings_pct(a, b), 1)
                for a, b in zip(
                    entry["share_to_95pct_per_seed"], base["share_to_95pct_per_seed"], strict=True
                )
            ]
            if base["share_to_95pct"] is None and entry["share_to_95pct"] is not None:
                # random never got there within the rounds run: a lower bound only
                entry["savings_vs_random_pct_at_least"] = rounded_one(
                    savings_pct(entry["share_to_95pct"], shares[-1]), 1
                )
    return {
        "full_miou": round(full_mean, 4),
        "full_miou_per_seed": rounded(full_arr),
        "target_95pct": round(TARGET_SHARE * full_mean, 4),
        "strategies": out,
    }


def targets_met(results: Mapping[str, dict]) -> dict[str, dict]:
    """Whether ``mixed`` met the picker's targets, per dataset.

    Parameters
    ----------
    results : mapping of str to dict
        Per dataset, a result with ``strategies`` as :func:`summarise_curves` gives it.

    Returns
    -------
    targets : dict
        Per dataset that ran ``mixed``: ``mixed_share_to_95pct``, ``share_met`` (at most
        ``TARGET_MAX_SHARE``), ``mixed_savings_pct``, ``mixed_savings_pct_at_least`` and
        ``savings_met`` (at least ``TARGET_MIN_SAVINGS_PCT``, exact or lower bound).
    """
    out = {}
    for name, res in results.items():
        st = res["strategies"]
        if "mixed" not in st:
            continue
        share = st["mixed"]["share_to_95pct"]
        sav = st["mixed"].get("savings_vs_random_pct")
        at_least = st["mixed"].get("savings_vs_random_pct_at_least")
        out[name] = {
            "mixed_share_to_95pct": share,
            "share_met": share is not None and share <= TARGET_MAX_SHARE,
            "mixed_savings_pct": sav,
            "mixed_savings_pct_at_least": at_least,
            "savings_met": (sav is not None and sav >= TARGET_MIN_SAVINGS_PCT)
            or (at_least is not None and at_least >= TARGET_MIN_SAVINGS_PCT),
        }
    return out
