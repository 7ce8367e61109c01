"""The report of a run: learning-curve plots and the markdown page.

:func:`plot_curves` draws one dataset's curves (matplotlib, Agg backend) with the band of
the seeds and the 95 % line; :func:`markdown_table` writes ``docs/label_efficiency.md``
from a run's JSON report. Strategy colours: Okabe & Ito (2008), "Color universal design".
"""

from __future__ import annotations

import io
import math

import numpy as np

from benchmarks.label_efficiency.curves import (
    TARGET_MAX_SHARE,
    TARGET_MIN_SAVINGS_PCT,
    TARGET_SHARE,
    share_to_target,
)

__all__ = ["COLOURS", "plot_curves", "markdown_table"]

#: Okabe & Ito (2008) colours per strategy in the plots.
COLOURS = {
    "random": "#000000",
    "entropy": "#56B4E9",
    "margin": "#009E73",
    "bald": "#D55E00",
    "coreset": "#CC79A7",
    "mixed": "#0072B2",
}


def plot_curves(result: dict, *, title: str) -> bytes:
    """PNG bytes of mIoU against labelled share, one line per strategy, seed band, 95 % line.

    Parameters
    ----------
    result : dict
        One dataset's :func:`~benchmarks.label_efficiency.simulate.run_curves` result.
    title : str
        Title above the plot.

    Returns
    -------
    bytes
        A PNG image.
    """
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    fig, ax = plt.subplots(figsize=(7.0, 4.6), dpi=110)
    for name, entry in result["strategies"].items():
        x = 100.0 * np.asarray(entry["labelled_share_by_round"], float)
        y = np.asarray(entry["miou_by_round"], float)
        lo = np.asarray(entry["miou_by_round_min"], float)
        hi = np.asarray(entry["miou_by_round_max"], float)
        colour = COLOURS.get(name, "#999999")
        ax.fill_between(x, lo, hi, color=colour, alpha=0.15, linewidth=0)
        ax.plot(
            x,
            y,
            color=colour,
            marker="o",
            markersize=3,
            linewidth=2.4 if name == "mixed" else 1.4,
            label=name,
        )
    full = result["full_miou"]
    ax.axhline(
        0.95 * full,
        color="#555555",
        linestyle="--",
        linewidth=1.0,
        label=f"95 % of full labels ({0.95 * full:.3f})",
    )
    ax.axhline(
        full, color="#555555", linestyle=":", linewidth=1.0, label=f"full labels ({full:.3f})"
    )
    ax.set_xlabel("labelled share of the pool tiles (%)")
    ax.set_ylabel("held-out mIoU")
    ax.set_title(title, fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return buf.getvalue()


def _pct(share: float | None) -> str:
    return "not reached" if share is None else f"{100.0 * share:.1f} %"


def _reference_text(ref: dict | None) -> str:
    if not ref:
        return ""
    return (
        f"; with the project's own training budget (at most {ref['epochs_max']} epochs, "
        f"early stopping after {ref['epochs_run']}, seed {ref['seed']}) full labels give "
        f"{ref['miou']:.3f}"
    )


def markdown_table(report: dict) -> str:
    """The markdown page of ``docs/label_efficiency.md`` for one run's JSON report.

    Parameters
    ----------
    report : dict
        The JSON report of :func:`benchmarks.label_efficiency.cli.main`: ``datasets`` (per
        dataset a :func:`~benchmarks.label_efficiency.simulate.run_curves` result with
        ``dataset`` info), optional ``targets`` and ``context``.

    Returns
    -------
    str
        Markdown, ending with the usual caution about spraying and fungicide decisions.
    """
    lines = [
        "# Label efficiency of the picker",
        "",
        "Made by `python -m benchmarks.label_efficiency` (do not edit by hand; run it again). The "
        "truth of each dataset plays the annotators: each round the picker chooses `k` pool "
        "tiles, their truth is revealed, the head is retrained from cached features and "
        "measured on a fixed held-out set. 'Share to 95 %' is the share of the pool tiles at "
        "which the curve of the mean over seeds first reaches 95 % of the mIoU of a head "
        "trained on every pool tile (linear interpolation between rounds); the per-seed "
        "column measures each seed's curve against that seed's own full-label mIoU. Savings "
        "are against `random`, in % of its share. The last column measures the mean curve "
        "against 95 % of the reference head (every pool tile, the project's own training "
        "budget, first seed): it shows how much the short training budget of the curves "
        "flatters them.",
        "",
        f"Targets: `mixed` reaches 95 % with at most {100 * TARGET_MAX_SHARE:.0f} % of the "
        f"tiles and at least {TARGET_MIN_SAVINGS_PCT:.0f} % fewer tiles than `random` "
        "(published segmentation work: 95 % of full-label mIoU with 7-24 % of the labels, "
        "Siddiqui et al., CVPR 2020).",
        "",
    ]
    ctx = report.get("context", {})
    for name, res in report["datasets"].items():
        info = res["dataset"]
        lines += [
            f"## {name}",
            "",
            f"Source: {info['source']}.",
            "",
            f"Pool {info['pool_tiles']} tiles, held-out {info['heldout_tiles']} tiles"
            + (f" ({info['subset']})" if "subset" in info else "")
            + f"; {len(res['full_miou_per_seed'])} seed(s); labelled tiles per round "
            f"{res['labelled_tiles_by_round']}. Full-label mIoU {res['full_miou']:.3f} "
            f"(per seed {res['full_miou_per_seed']})"
            + _reference_text(res.get("full_miou_reference"))
            + ".",
            "",
            "| strategy | share to 95 % | per seed | savings vs random | final mIoU "
            "| share to 95 % of the reference |",
            "|---|---|---|---|---|---|",
        ]
        ref = res.get("full_miou_reference")
        for strategy, e in res["strategies"].items():
            to_ref = "n/a"
            if ref:
                to_ref = _pct(
                    share_to_target(
                        e["labelled_share_by_round"],
                        [math.nan if v is None else v for v in e["miou_by_round"]],
                        TARGET_SHARE * ref["miou"],
                    )
                )
            sav = e.get("savings_vs_random_pct")
            if sav is not None:
                sav_text = f"{sav:.1f} %"
            elif e.get("savings_vs_random_pct_at_least") is not None:
                sav_text = f"at least {e['savings_vs_random_pct_at_least']:.1f} %"
            else:
                sav_text = "n/a"
            per = ", ".join(_pct(s) for s in e["share_to_95pct_per_seed"])
            lines.append(
                f"| {strategy} | {_pct(e['share_to_95pct'])} | {per} | {sav_text} | "
                f"{e['miou_by_round'][-1]:.3f} | {to_ref} |"
            )
        lines += ["", f"![learning curves, {name}](label_efficiency_{name}.png)", ""]
    t = report.get("targets", {})
    if t:
        lines += ["## Targets in this run", ""]
        for name, v in t.items():
            sav = v["mixed_savings_pct"]
            if sav is not None:
                sav_text = f"{sav:.1f} %"
            elif v["mixed_savings_pct_at_least"] is not None:
                sav_text = f"at least {v['mixed_savings_pct_at_least']:.1f} %"
            else:
                sav_text = "n/a"
            lines.append(
                f"- {name}: `mixed` share {_pct(v['mixed_share_to_95pct'])} "
                f"(target at most {100 * TARGET_MAX_SHARE:.0f} %: "
                f"{'met' if v['share_met'] else 'not met'}); savings vs random {sav_text} "
                f"(target at least {TARGET_MIN_SAVINGS_PCT:.0f} %: "
                f"{'met' if v['savings_met'] else 'not met'})"
            )
        lines.append("")
    lines += [
        "## Run",
        "",
        f'Training: `train_head(mode="features")`, at most {ctx.get("epochs")} epochs with '
        f"the project's early stopping (patience {ctx.get('patience')}, validation share "
        f"{ctx.get('val_share')}); proposals with {ctx.get('mc_samples')} MC-dropout passes; "
        f"{ctx.get('threads')} torch thread(s). With a budget this short the early "
        "stopping seldom fires; the epoch of lowest validation loss is kept. "
        f"{ctx.get('seconds')} s in all, on a shared "
        f"machine (1-minute load average {ctx.get('load_avg_start')} at the start, "
        f"{ctx.get('load_avg_end')} at the end), so the seconds are not a speed figure.",
        "",
        "Masks are decision support only. Where they drive spot spraying or fungicide timing, "
        "local regulations and licensed agronomic advice come first.",
        "",
    ]
    return "\n".join(lines)
