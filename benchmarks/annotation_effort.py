"""Annotation effort: actions to a mask of IoU 0.90, from each starting point the product offers.

Run from the repository root: ``python -m benchmarks.annotation_effort`` (``--help`` for the
options, ``--quick`` for a smoke run). One JSON line per dataset on standard output; with
``--out docs`` also ``docs/annotation_effort.json``, the plot
``docs/annotation_effort.png`` and the README's table ``docs/annotation_effort.md``.

Reduced runs (a loaded machine, or a first look): ``--datasets demo``, ``--tiles N``
(held-out tiles measured), ``--epochs N`` and ``--augment features`` (training on the
cached features, no image augmentation). The JSON line records them under ``training``
and the machine's load under ``run``; figures of a reduced run are not the product's.

What is measured
    The simulated annotator of :mod:`labeler.demo.protocol` (the interactive protocol of
    Xu et al. 2016, "Deep Interactive Object Selection", CVPR: each action at the interior
    point of the largest error region; of fill, box (GrabCut), scribble + refine and brush,
    the one that raises the IoU most per action, foreseen on copies of the editor's layers,
    then used through the editor's own operations) corrects held-out tiles until their IoU with the
    truth reaches 0.90 or 20 actions (:mod:`labeler.demo.effort`; tile IoU: the per-class
    IoU averaged over the classes in the tile's truth). NoC@90 is the mean number of
    actions per tile (a tile that never reaches 0.90 counts 20); ``capped`` counts those
    tiles; ``noc85_mean`` / ``noc85_capped`` are the same to IoU 0.85 (the literature's
    other usual threshold); ``iou_start`` and ``iou_at_cap`` are the mean tile IoU before
    the first and after the last action; ``iou_20_regions_fixed`` is what setting the
    start's 20 largest error regions right would reach
    (:func:`labeler.demo.effort.region_fix_bound`): when it stays below 0.90, region-by-
    region correction cannot reach NoC@90 within the cap however good the tools, and only
    actions that fix many regions at once (refine, the on-tile re-fit) or better proposals
    can; ``iou_start_per_class`` (cold start and proposals) is the mean IoU of each class
    in the starting masks over the tiles that hold it (:func:`start_class_ious`), which
    shows the classes that keep the tile IoU down. The annotator has no noise habits here:
    the truth is the target.

Starting points
    ``empty`` (all soil), ``cold`` (the vegetation-index cold start of
    :mod:`labeler.masks.coldstart`, crop rows found on the tile itself), and the proposals
    of heads retrained with 5 %, 10 % and 20 % of the pool tiles labelled in picker order,
    as the product's loop labels them: the first share picked by ``coreset`` on the
    encoder embeddings (cold-start proposals carry no uncertainty, so ``labeler pick``
    falls back to it), every later share by the ``mixed`` strategy on the newest head's
    MC-dropout uncertainty. Training is ``train_head`` with the project's defaults
    (``model.augment = "auto"``, at most 40 epochs, early stopping), as ``labeler
    retrain`` runs it, on the training code of this checkout.

With and without learning on the tile
    ``noc90_after`` starts from the proposal with the annotator's tools alone;
    ``noc90_after_guided`` adds the on-tile re-fit (:mod:`labeler.model.ontile`) in the
    mode ``--guided-mode`` names (``key``: the relearn key after each kept correction;
    ``scribble``: every finished scribble re-fits). Both modes are measured and reported
    under ``guided_modes``; the editor's default follows the better of the two.
    ``refit_seconds_*`` time the re-fit alone; ``relearn_key_seconds_*`` one whole press
    of the editor's relearn key (what the annotator waits for), once per tile and share.

Datasets
    ``demo``: the committed invented plots of ``demo_fields/`` (4 pool plots, 2 held-out
    plots, :func:`benchmarks.label_efficiency.load_demo`); ``peanut``: the peanut crop/weed
    photos read in place from the open-dataset folder (Tran & Phan 2023, CC BY-SA 4.0;
    :func:`benchmarks.label_efficiency.load_peanut`), skipped with a reason when absent.
    The protocol runs on ``--tiles`` held-out tiles per dataset, a seeded sample.

Masks are decision support only: where they drive spraying or fungicide decisions, local
regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from benchmarks.label_efficiency.simulate import _pick, _pool_scores
from benchmarks.label_efficiency.tiles import TileSet

__all__ = ["SHARES", "GUIDED_MODES", "summarise_runs", "start_class_ious", "picked_counts",
           "measure", "plot", "markdown_table", "main"]

#: Shares of the pool labelled before each retraining.
SHARES = (0.05, 0.10, 0.20)
#: The ways the simulated annotator uses the on-tile re-fit.
GUIDED_MODES = ("key", "scribble")
_CAP = 20


def summarise_runs(runs: Sequence, *, bounds: Sequence[float] | None = None) -> dict:
    """NoC@90 figures of protocol runs (:class:`labeler.demo.protocol.ProtocolRun`).

    Parameters
    ----------
    runs : sequence of ProtocolRun
    bounds : sequence of float, optional
        Per run, :func:`labeler.demo.effort.region_fix_bound` of its starting mask.

    Returns
    -------
    dict
        ``mean`` actions (capped tiles count 20), ``capped`` (tiles at 20), ``tiles``,
        ``accepted`` (tiles good enough before any action), ``iou_start`` and
        ``iou_at_cap`` (mean tile IoU before the first and after the last action),
        ``noc85_mean`` and ``noc85_capped`` (the same to IoU 0.85, the literature's other
        usual threshold), and with ``bounds`` ``iou_20_regions_fixed`` (their mean).
    """
    from labeler.demo.effort import summarise_noc

    s = summarise_noc([r.ious for r in runs], cap=_CAP)
    s85 = summarise_noc([r.ious for r in runs], threshold=0.85, cap=_CAP)
    out = {
        "mean": round(s.mean, 2),
        "capped": s.n_capped,
        "tiles": s.n_tiles,
        "accepted": s.n_unchanged,
        "iou_start": round(float(np.mean([r.ious[0] for r in runs])), 3),
        "iou_at_cap": round(float(np.mean([r.ious[-1] for r in runs])), 3),
        "noc85_mean": round(s85.mean, 2),
        "noc85_capped": s85.n_capped,
    }
    if bounds is not None:
        out["iou_20_regions_fixed"] = round(float(np.mean(bounds)), 3)
    return out


def start_class_ious(truths: Sequence[np.ndarray], starts: Sequence[np.ndarray | None], *,
                     n_classes: int) -> dict[str, float]:
    """Mean IoU of each class in the starting masks, over the tiles whose truth holds it.

    Parameters
    ----------
    truths : sequence of ndarray, shape (H, W), uint8
    starts : sequence of ndarray, shape (H, W), uint8, or None (an empty mask: all soil)
    n_classes : int

    Returns
    -------
    dict
        Class index (as a string) -> mean per-tile IoU (:func:`labeler.metrics.iou_per_class`),
        rounded to 3 places; classes no truth holds are left out.
    """
    from labeler.metrics import confusion_matrix, iou_per_class

    per_class: dict[int, list[float]] = {}
    for truth, start in zip(truths, starts, strict=True):
        mask = np.zeros_like(truth) if start is None else start
        iou = iou_per_class(confusion_matrix(truth, mask, n_classes=n_classes))
        for c in np.unique(truth[truth != 255]).tolist():
            per_class.setdefault(int(c), []).append(float(iou[c]))
    return {str(c): round(float(np.mean(v)), 3) for c, v in sorted(per_class.items())}


def picked_counts(n_pool: int, shares: Sequence[float], *, least: int) -> list[int]:
    """Labelled tiles at each share: ``round(share * n_pool)``, at least ``least``, rising.

    Parameters
    ----------
    n_pool : int
        Tiles in the pool.
    shares : sequence of float
        Increasing shares in (0, 1].
    least : int
        Fewest labelled tiles training accepts (``model.min_labelled_tiles``).
    """
    if list(shares) != sorted(shares) or not all(0 < s <= 1 for s in shares):
        raise ValueError(f"shares: expected increasing shares in (0, 1], got {list(shares)}")
    out: list[int] = []
    for s in shares:
        n = max(int(round(s * n_pool)), least, out[-1] + 1 if out else 0)
        if n > n_pool:
            raise ValueError(
                f"shares: {s} of {n_pool} pool tiles needs {n} tiles; use a larger pool"
            )
        out.append(n)
    return out


def _heads_in_picker_order(pool: TileSet, counts, *, class_indices, encoder, mc_samples, log,
                           settings=None):
    """Train a head at each count of labelled pool tiles, picked as the product picks."""
    from labeler.model.train import train_head
    from labeler.settings import ModelSettings

    settings = settings or ModelSettings()
    labelled = np.zeros(len(pool), bool)
    embeddings = np.stack([np.asarray(f[3], np.float32).mean(axis=(1, 2)) for f in pool.features])
    from labeler.metrics import class_fractions

    fractions = np.stack([class_fractions(m, class_indices) for m in pool.masks])
    heads = []
    scores = None
    for step, n in enumerate(counts):
        strategy = "coreset" if scores is None else "mixed"
        rows = _pick(strategy, labelled=labelled, k=n - int(labelled.sum()), seed=step,
                     embeddings=embeddings, truth_fractions=fractions, scores=scores)
        labelled[rows] = True
        t0 = time.monotonic()
        rows = np.flatnonzero(labelled)
        res = train_head([pool.masks[r] for r in rows], class_indices=class_indices,
                         features=[pool.features[r] for r in rows],
                         images=[pool.images[r] for r in rows], encoder=encoder,
                         settings=settings, mode=settings.augment)
        log(f"trained on {len(rows)} tiles ({strategy}) in {time.monotonic() - t0:.0f} s, "
            f"mode {res.mode}, best epoch {res.best_epoch}")
        heads.append(res.head)
        if step + 1 < len(counts):
            scores = _pool_scores(res.head, pool, labelled, k_classes=len(class_indices),
                                  mc_samples=mc_samples, seed=0)
    return heads


def _time_relearn_key(heldout: TileSet, rows, starts, learners) -> list[float]:
    """Seconds of one press of the editor's relearn key per tile, as the annotator waits
    for it: :meth:`labeler.editor.state.EditorState.relearn` (marks, the re-fit, the new
    layers, the history entry) after the protocol's first correction of the proposal."""
    from labeler.demo.clicks import next_click
    from labeler.editor.state import EditorState

    out = []
    for r, start, learner in zip(rows, starts, learners, strict=True):
        state = EditorState(heldout.images[r], start)
        state.learner = learner
        click = next_click(heldout.masks[r], start)
        if click is None:
            continue
        state.active_class = click.cls
        state.radius = max(click.depth_px - 0.5, 0.5)
        state.paint([click.point])
        t0 = time.perf_counter()
        state.relearn()
        out.append(time.perf_counter() - t0)
    return out or [float("nan")]


def measure(name: str, pool: TileSet, heldout: TileSet, *, class_indices, encoder,
            n_tiles: int, shares=SHARES, guided_mode: str = "key", mc_samples: int = 8,
            seed: int = 0, log: Callable[[str], None] = print, settings=None) -> dict:
    """The JSON line of one dataset (see the module notes); ``settings`` are the
    :class:`labeler.settings.ModelSettings` of training (the project's defaults if None)."""
    from labeler.demo.effort import region_fix_bound
    from labeler.demo.protocol import ProtocolOptions, run_protocol
    from labeler.masks.coldstart import cold_start_proposal
    from labeler.model.ontile import TileLearner
    from labeler.model.predict import propose_tiles

    rows = np.sort(np.random.default_rng(seed).choice(
        len(heldout), size=min(n_tiles, len(heldout)), replace=False)).tolist()
    counts = picked_counts(len(pool), shares, least=3)
    heads = _heads_in_picker_order(pool, counts, class_indices=class_indices,
                                   encoder=encoder, mc_samples=mc_samples, log=log,
                                   settings=settings)

    def runs(starts, relearn="off", learners=None):
        out = []
        for i, r in enumerate(rows):
            out.append(run_protocol(
                heldout.images[r], heldout.masks[r], start=starts[i],
                options=ProtocolOptions(relearn=relearn),
                learner=None if learners is None else learners[i]))
        return out

    def bounds(starts):
        k = max(class_indices) + 1
        return [region_fix_bound(heldout.masks[r], np.zeros_like(heldout.masks[r])
                                 if s is None else s, n_classes=k, n_regions=_CAP)
                for r, s in zip(rows, starts, strict=True)]

    def class_ious(starts):
        return start_class_ious([heldout.masks[r] for r in rows], starts,
                                n_classes=max(class_indices) + 1)

    line: dict = {"dataset": name}
    empty = [None] * len(rows)
    line["noc90_empty"] = summarise_runs(runs(empty), bounds=bounds(empty))
    cold = [cold_start_proposal(heldout.images[r]) for r in rows]
    line["noc90_cold"] = summarise_runs(runs(cold), bounds=bounds(cold))
    line["noc90_cold"]["iou_start_per_class"] = class_ious(cold)
    after, guided, accepted = {}, {}, {}
    modes: dict[str, dict] = {m: {} for m in GUIDED_MODES}
    fit_seconds: list[float] = []
    setup_seconds: list[float] = []
    key_seconds: list[float] = []
    for share, n, head in zip(shares, counts, heads, strict=True):
        key = f"{share:.2f}"
        props = propose_tiles(head, [heldout.features[r] for r in rows],
                              images=[heldout.images[r] for r in rows],
                              mc_samples=mc_samples, seed=0)
        starts = [p.mask for p in props]
        plain = summarise_runs(runs(starts), bounds=bounds(starts))
        plain["iou_start_per_class"] = class_ious(starts)
        after[key] = plain
        accepted[key] = round(plain["accepted"] / plain["tiles"], 3)
        learners = []
        for r in rows:
            t0 = time.perf_counter()
            tl = TileLearner(head, heldout.features[r], image=heldout.images[r])
            setup_seconds.append(time.perf_counter() - t0)

            def fit(marks, tl=tl):
                t0 = time.perf_counter()
                out = tl.fit(marks)
                fit_seconds.append(time.perf_counter() - t0)
                return out

            learners.append(fit)
        key_seconds.extend(_time_relearn_key(heldout, rows, starts, learners))
        for mode in GUIDED_MODES:
            modes[mode][key] = summarise_runs(runs(starts, mode, learners))
        guided[key] = modes[guided_mode][key]
        log(f"{name} {key} ({n} tiles): NoC@90 {plain['mean']} -> guided {guided[key]['mean']}")
    line.update({
        "noc90_after": after,
        "noc90_after_guided": guided,
        "accepted_share_after": accepted,
        "guided_mode": guided_mode,
        "guided_modes": modes,
        "labelled_tiles": {f"{s:.2f}": n for s, n in zip(shares, counts, strict=True)},
        "pool_tiles": len(pool),
        "tiles_measured": len(rows),
        "refit_seconds_median": round(float(np.median(fit_seconds)), 3) if fit_seconds else None,
        "refit_seconds_max": round(float(np.max(fit_seconds)), 3) if fit_seconds else None,
        "refit_setup_seconds_median": round(float(np.median(setup_seconds)), 3),
        "relearn_key_seconds_median": round(float(np.median(key_seconds)), 3),
        "relearn_key_seconds_max": round(float(np.max(key_seconds)), 3),
    })
    return line


def plot(lines: Sequence[dict], path: Path) -> None:
    """NoC@90 per starting point (top) and the tile IoU it starts from, ends at after the
    session and would reach with its 20 largest error regions set right (bottom); one
    column of panels per dataset, written to ``path``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(2, len(lines), figsize=(6 * len(lines), 7.5), squeeze=False)
    for col, line in enumerate(lines):
        ax, low = axes[0][col], axes[1][col]
        shares = list(line["noc90_after"])
        labels = ["empty", "cold start"] + [f"{float(s):.0%}" for s in shares]
        starts = [line["noc90_empty"], line["noc90_cold"]]
        starts += [line["noc90_after"][s] for s in shares]
        plain = [s["mean"] for s in starts]
        guided = [np.nan, np.nan] + [line["noc90_after_guided"][s]["mean"] for s in shares]
        x = np.arange(len(labels))
        ax.bar(x - 0.2, plain, 0.4, label="tools alone", color="#0072B2")
        ax.bar(x + 0.2, guided, 0.4, label=f"with on-tile learning ({line['guided_mode']})",
               color="#E69F00")
        ax.axhline(_CAP, color="grey", lw=0.8, ls="--")
        ax.set_xticks(x, labels)
        ax.set_ylim(0, _CAP + 1)
        ax.set_ylabel("NoC@90: actions per tile (cap 20)")
        ax.set_title(f"{line['dataset']} ({line['tiles_measured']} held-out tiles)")
        ax.legend(loc="lower left", fontsize=8)
        for key, name, style in (("iou_start", "before the first action", "o:"),
                                 ("iou_at_cap", "after the session (tools alone)", "s-"),
                                 ("iou_20_regions_fixed", "20 largest error regions set right",
                                  "^--")):
            low.plot(x, [s.get(key, np.nan) for s in starts], style, label=name)
        low.axhline(0.90, color="grey", lw=0.8, ls="--")
        low.set_xticks(x, labels)
        low.set_ylim(0, 1)
        low.set_xlabel("starting mask (share of pool tiles labelled before retraining)")
        low.set_ylabel("mean tile IoU")
        low.legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def markdown_table(lines: Sequence[dict]) -> str:
    """The README's table of the JSON lines: NoC@90 per starting point and dataset.

    One row per starting point (empty, cold start, then each share with and without
    on-tile learning, and the share of tiles accepted unchanged); one column per dataset.
    A cell reads ``mean (capped/tiles at 20; IoU x)``: mean actions to IoU 0.90 (cap 20),
    how many tiles hit the cap, and the mean tile IoU at the end of the sessions.
    """
    def cell(s: dict) -> str:
        return f"{s['mean']:g} ({s['capped']}/{s['tiles']} at 20; IoU {s['iou_at_cap']:.2f})"

    head = "| starting mask | " + " | ".join(str(x["dataset"]) for x in lines) + " |"
    out = [head, "|---|" + "---|" * len(lines)]
    out.append("| empty | " + " | ".join(cell(x["noc90_empty"]) for x in lines) + " |")
    out.append("| cold start | " + " | ".join(cell(x["noc90_cold"]) for x in lines) + " |")
    for share in lines[0]["noc90_after"]:
        pct = f"{float(share):.0%}"
        out.append(f"| after retraining on {pct} | "
                   + " | ".join(cell(x["noc90_after"][share]) for x in lines) + " |")
        out.append(f"| after {pct}, with on-tile learning | "
                   + " | ".join(cell(x["noc90_after_guided"][share]) for x in lines) + " |")
        out.append(f"| after {pct}: accepted unchanged | "
                   + " | ".join(f"{x['accepted_share_after'][share]:.0%}" for x in lines) + " |")
    return "\n".join(out) + "\n"


def _load(name: str, *, encoder, cache):
    from benchmarks.label_efficiency import load_demo, load_peanut

    if name == "demo":
        return load_demo(encoder=encoder, cache=cache)[:2], (0, 1, 2, 3)
    return load_peanut(encoder=encoder, cache=cache)[:2], (0, 1, 2)


def main(argv: list[str] | None = None) -> int:
    """Command line: measure the datasets, print one JSON line each, write the report."""
    ap = argparse.ArgumentParser(prog="python -m benchmarks.annotation_effort",
                                 description=__doc__.split("\n")[0])
    ap.add_argument("--datasets", default="demo,peanut", help="comma-separated: demo, peanut")
    ap.add_argument("--tiles", type=int, default=12, help="held-out tiles measured per dataset")
    ap.add_argument("--guided-mode", choices=GUIDED_MODES, default="key")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0: all cores)")
    ap.add_argument("--cache", type=Path, help="keep encoder features here")
    ap.add_argument("--out", type=Path, help="write annotation_effort.json and .png here")
    ap.add_argument("--quick", action="store_true", help="smoke run: demo, 3 tiles")
    ap.add_argument("--epochs", type=int, default=None,
                    help="training epochs (a reduced run; default: the project's 40)")
    ap.add_argument("--augment", choices=("auto", "images", "features"), default=None,
                    help="model.augment of training (a reduced run: features; default auto)")
    args = ap.parse_args(argv)
    import dataclasses

    from labeler.settings import ModelSettings

    settings = ModelSettings()
    reduced = {}
    if args.epochs is not None:
        reduced["epochs"] = args.epochs
    if args.augment is not None:
        reduced["augment"] = args.augment
    settings = dataclasses.replace(settings, **reduced)
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.runtime import configure_threads

    threads = configure_threads(args.threads)
    names = ["demo"] if args.quick else [d.strip() for d in args.datasets.split(",") if d.strip()]
    n_tiles = 3 if args.quick else args.tiles
    encoder = load_encoder()
    t0, load0 = time.monotonic(), os.getloadavg()[0]

    def log(msg: str) -> None:
        print(f"[{time.monotonic() - t0:7.0f} s] {msg}", file=sys.stderr, flush=True)

    lines = []
    with tempfile.TemporaryDirectory() as tmp:
        cache = FeatureCache(args.cache or Path(tmp), encoder_version=encoder.version)
        for name in names:
            try:
                (pool, heldout), classes = _load(name, encoder=encoder, cache=cache)
            except FileNotFoundError as exc:
                print(json.dumps({"dataset": name, "skipped": str(exc)}), flush=True)
                continue
            started = time.monotonic()
            line = measure(name, pool, heldout, class_indices=classes, encoder=encoder,
                           n_tiles=n_tiles, guided_mode=args.guided_mode, log=log,
                           settings=settings)
            line["training"] = {"epochs": settings.epochs, "augment": settings.augment,
                                "reduced": bool(reduced)}
            line["seconds"] = round(time.monotonic() - started, 1)
            line["run"] = {"threads": threads, "load_1min_start": round(load0, 2),
                           "load_1min_end": round(os.getloadavg()[0], 2)}
            print(json.dumps(line), flush=True)
            lines.append(line)
    if args.out is not None and lines:
        args.out.mkdir(parents=True, exist_ok=True)
        (args.out / "annotation_effort.json").write_text(
            "".join(json.dumps(x) + "\n" for x in lines), encoding="utf-8")
        plot(lines, args.out / "annotation_effort.png")
        (args.out / "annotation_effort.md").write_text(markdown_table(lines), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
