"""Command line of the label-efficiency benchmark: datasets, options, report files.

Prints ONE JSON line: ``datasets`` (per dataset ``dataset``, ``full_miou``,
``strategies`` and the round shares), the top-level ``dataset``, ``full_miou`` and
``strategies`` of the first dataset run, ``targets`` (the picker's targets and whether
this run met them), ``reasons`` (datasets skipped and why) and ``seconds``. Unless
``--no-docs`` (or ``--quick`` without ``--docs``), also writes
``docs/label_efficiency_<dataset>.png``, ``docs/label_efficiency.md`` and
``docs/label_efficiency.json`` (atomically).

Speed: one torch thread by default (``--threads``): on a shared two-core machine two
threads were several times slower than one. Every curve point and ``full_miou`` train
for at most ``--epochs`` epochs (default 6, the project's early stopping inside that
budget) so that a retrain takes seconds; ``full_miou_reference`` trains once (first
seed) on every pool tile with the project's own defaults (at most 40 epochs), to show
what the shorter budget costs. Proposals use ``--mc-samples`` dropout passes (default:
the project's 8). Features are cached in a temporary folder unless ``--cache`` keeps
them.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

from benchmarks.label_efficiency.curves import targets_met
from benchmarks.label_efficiency.loading import load_demo, load_peanut
from benchmarks.label_efficiency.report import markdown_table, plot_curves
from benchmarks.label_efficiency.simulate import run_curves
from labeler.settings import STRATEGIES, ModelSettings

__all__ = ["main", "DESCRIPTION"]

REPO = Path(__file__).resolve().parents[2]
DOCS = REPO / "docs"
DESCRIPTION = "Label efficiency of the active-learning picker: learning curves per strategy."


def log(msg: str) -> None:
    """One time-stamped progress line on stderr."""
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def main(argv: list[str] | None = None) -> int:
    """Run the simulation on the chosen datasets and print the JSON report as one line.

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments (default ``sys.argv[1:]``); ``--help`` lists them.

    Returns
    -------
    int
        0 (argument errors exit through argparse with status 2).
    """
    ap = argparse.ArgumentParser(
        prog="python -m benchmarks.label_efficiency", description=DESCRIPTION
    )
    ap.add_argument("--datasets", default="demo,peanut", help="comma-separated: demo, peanut")
    ap.add_argument("--seeds", type=int, default=3, help="seeds 0..N-1 (default 3)")
    ap.add_argument("--rounds", type=int, help="picking rounds after round 0 (default per dataset)")
    ap.add_argument("--k", type=int, help="tiles per round (default per dataset)")
    ap.add_argument("--strategies", default=",".join(STRATEGIES))
    ap.add_argument(
        "--initial-share",
        type=float,
        default=0.03,
        help="round-0 random share of the pool (at least min_labelled_tiles tiles)",
    )
    ap.add_argument(
        "--quick",
        action="store_true",
        help="smoke run: 1 seed, random and mixed, 2 rounds, small peanut subset",
    )
    ap.add_argument("--cache", type=Path, help="keep features here (default: a temporary folder)")
    ap.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    ap.add_argument("--epochs", type=int, default=6, help="upper bound of training epochs")
    ap.add_argument(
        "--mc-samples",
        type=int,
        default=ModelSettings().mc_samples,
        help="MC-dropout passes (default: the project's model.mc_samples)",
    )
    ap.add_argument("--split-seed", type=int, default=0, help="seed of the held-out choice")
    ap.add_argument("--peanut-pool-images", type=int, default=16)
    ap.add_argument("--peanut-heldout-images", type=int, default=6)
    ap.add_argument("--docs", type=Path, help="folder of the plots, table and JSON (default docs/)")
    ap.add_argument("--no-docs", action="store_true", help="print the JSON line only")
    args = ap.parse_args(argv)

    strategies = [s.strip() for s in args.strategies.split(",") if s.strip()]
    seeds = list(range(args.seeds))
    rounds_default = {"demo": 5, "peanut": 5}
    k_default = {"demo": 8, "peanut": 16}
    if args.quick:
        strategies = [s for s in ("random", "mixed") if s in strategies] or strategies[:2]
        seeds = seeds[:1]
        rounds_default = {"demo": 2, "peanut": 2}
        if args.peanut_pool_images == 16:
            args.peanut_pool_images = 6
        if args.peanut_heldout_images == 6:
            args.peanut_heldout_images = 2
    datasets = [d.strip() for d in args.datasets.split(",") if d.strip()]
    bad = [d for d in datasets if d not in ("demo", "peanut")]
    if bad or not datasets:
        ap.error(f"--datasets: expected demo and/or peanut, got {args.datasets!r}")
    write_docs = not args.no_docs and (args.docs is not None or not args.quick)
    docs = args.docs if args.docs is not None else DOCS

    from tqdm import tqdm

    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.runtime import configure_threads

    threads = configure_threads(args.threads)
    settings = ModelSettings(epochs=args.epochs)
    load_start = round(os.getloadavg()[0], 2)
    t_start = time.perf_counter()
    encoder = load_encoder()
    results: dict[str, dict] = {}
    reasons: dict[str, str] = {}
    with tempfile.TemporaryDirectory(prefix="labeler-efficiency-") as tmp:
        folder = args.cache if args.cache is not None else Path(tmp)
        cache = FeatureCache(folder, encoder_version=encoder.version)
        for name in datasets:
            t0 = time.perf_counter()
            try:
                if name == "demo":
                    pool, heldout, info = load_demo(
                        encoder=encoder, cache=cache, split_seed=args.split_seed
                    )
                    classes = (0, 1, 2, 3)
                else:
                    pool, heldout, info = load_peanut(
                        encoder=encoder,
                        cache=cache,
                        pool_images=args.peanut_pool_images,
                        heldout_images=args.peanut_heldout_images,
                        split_seed=args.split_seed,
                    )
                    classes = (0, 1, 2)
            except FileNotFoundError as exc:
                reasons[name] = str(exc)
                log(f"{name}: skipped ({exc})")
                continue
            log(
                f"{name}: {len(pool)} pool / {len(heldout)} held-out tiles encoded in "
                f"{time.perf_counter() - t0:.0f} s"
            )
            n_initial = max(settings.min_labelled_tiles, round(args.initial_share * len(pool)))
            k = args.k or k_default[name]
            rounds = args.rounds if args.rounds is not None else rounds_default[name]
            bar = tqdm(total=1, desc=name, unit="retrain", file=sys.stderr)

            def progress(done: int, total: int, what: str, bar=bar) -> None:
                bar.total = total
                bar.set_postfix_str(what, refresh=False)
                bar.update(done - bar.n)

            reference = None if args.quick else ModelSettings()
            res = run_curves(
                pool,
                heldout,
                class_indices=classes,
                strategies=strategies,
                seeds=seeds,
                rounds=rounds,
                k=k,
                n_initial=n_initial,
                settings=settings,
                mc_samples=args.mc_samples,
                encoder=encoder,
                reference_settings=reference,
                progress=progress,
            )
            bar.close()
            res["dataset"] = info
            res["k"] = k
            res["rounds"] = len(res["labelled_tiles_by_round"]) - 1
            res["seconds"] = round(time.perf_counter() - t0, 1)
            results[name] = res
            log(
                f"{name}: done in {res['seconds']:.0f} s; full mIoU {res['full_miou']}; "
                + ", ".join(f"{s} {e['share_to_95pct']}" for s, e in res["strategies"].items())
            )
            del pool, heldout
    first = next(iter(results.values()), None)
    report: dict[str, object] = {
        "dataset": None if first is None else first["dataset"]["name"],
        "full_miou": None if first is None else first["full_miou"],
        "strategies": None if first is None else first["strategies"],
        "datasets": results,
        "targets": targets_met(results),
        "reasons": reasons,
        "context": {
            "seeds": seeds,
            "epochs": args.epochs,
            "val_share": settings.val_share,
            "patience": ModelSettings().patience,
            "mc_samples": args.mc_samples,
            "initial_share": args.initial_share,
            "threads": threads,
            "quick": args.quick,
            "load_avg_start": load_start,
            "load_avg_end": round(os.getloadavg()[0], 2),
            "machine": "shared CPU machine, other jobs running",
        },
        "seconds": round(time.perf_counter() - t_start, 1),
    }
    report["context"]["seconds"] = report["seconds"]  # type: ignore[index]
    line = json.dumps(report)
    if write_docs and results:
        from labeler.imagery.write import atomic_write_bytes

        for name, res in results.items():
            title = f"{name}: learning curves ({len(seeds)} seed(s), band = min..max over seeds)"
            atomic_write_bytes(docs / f"label_efficiency_{name}.png", plot_curves(res, title=title))
        atomic_write_bytes(docs / "label_efficiency.md", markdown_table(report).encode())
        atomic_write_bytes(docs / "label_efficiency.json", (line + "\n").encode())
    print(line)
    return 0
