"""Tiles/s of ``labeler propose`` here and on a local Dask cluster of 1 and 2 workers.

Prints ONE JSON line:

- ``local_tiles_per_s``: the whole ``propose`` call without a cluster (encoder loaded,
  every tile read, encoded through an empty feature cache, proposed by a refining head
  with ``mc_samples`` MC-dropout passes, stored);
- ``cluster_1_tiles_per_s``, ``cluster_2_tiles_per_s``: the whole ``propose --cluster``
  call on the same tiles (a fresh project and fresh worker caches each time), with a
  ``LocalCluster`` of 1 and 2 worker processes (one task thread each) on 127.0.0.1. The
  cluster is started and its workers warmed up (encoder loaded) before the clock
  starts, as a cluster a team keeps running would be; local and 1-worker rounds are
  interleaved and each figure is the best of ``--rounds`` (the least disturbed round
  on a shared machine);
- ``overhead_ratio``: ``local_tiles_per_s / cluster_1_tiles_per_s`` (what the cluster
  path costs per tile over the local one, on the same cores; target at most 1.25);
- context: ``tiles``, ``chunks``, ``cores``, ``mc_samples``, ``rounds``, ``load_avg_1min``.

Torch threads: the local run uses every core; a worker uses the cores divided by the
number of workers (``cluster.worker_threads``), so neither run oversubscribes the
machine. Images are seeded random RGB (speed does not depend on content); the head is
untrained (same cost as a trained one). Run it on a quiet machine for figures to
quote.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from affine import Affine  # noqa: E402

from labeler.imagery.write import write_geotiff  # noqa: E402
from labeler.project import init_project, open_project  # noqa: E402
from labeler.workflow import add_images, propose  # noqa: E402


def _images(folder: Path, *, n: int, size: int) -> list[Path]:
    rng = np.random.default_rng(19)
    paths = []
    for i in range(n):
        path = folder / f"plot-{i}.tif"
        write_geotiff(
            path,
            rng.integers(0, 256, (size, size, 3), dtype=np.uint8),
            transform=Affine(0.005, 0, 431000 + 20 * i, 0, -0.005, 5712000),
            crs="EPSG:32631",
        )
        paths.append(path)
    return paths


def _project(root: Path, images: list[Path], *, worker_threads: int, mc_samples: int):
    """A project of ``images`` whose newest model is an untrained refining head."""
    import torch

    from labeler.model.checkpoint import save_checkpoint
    from labeler.model.encoder import load_encoder
    from labeler.model.head import REFINE_CHANNELS, HeadConfig, ProposalHead

    init_project(root).close()
    (root / "labeler.toml").write_text(
        f"[model]\nmc_samples = {mc_samples}\n"
        f"[cluster]\nworker_threads = {worker_threads}\n"
        f'worker_cache = "{(root / "worker-cache").as_posix()}"\n'
    )
    project = open_project(root)
    add_images(project, images)
    torch.manual_seed(0)
    head = ProposalHead(HeadConfig(refine_channels=REFINE_CHANNELS)).eval()
    version = load_encoder().version
    save_checkpoint(root / "models" / "h.pt", head, encoder_version=version, val_iou=[0.5] * 4)
    project.store.add_model_version(
        kind="head", name="bench", encoder_version=version, checkpoint="models/h.pt"
    )
    return project


def _timed_propose(root: Path, images, *, cluster: str | None, worker_threads: int, mc: int):
    project = _project(root, images, worker_threads=worker_threads, mc_samples=mc)
    try:
        t0 = time.perf_counter()
        result = propose(project, cluster=cluster)
        seconds = time.perf_counter() - t0
    finally:
        project.close()
    shutil.rmtree(root)
    return result.proposed, seconds


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=4, help="images (one chunk each)")
    ap.add_argument("--size", type=int, default=928, help="image edge in pixels")
    ap.add_argument("--mc-samples", type=int, default=8)
    ap.add_argument("--rounds", type=int, default=2, help="best of this many rounds")
    args = ap.parse_args(argv)

    import distributed

    from labeler.model.runtime import available_cores

    cores = available_cores()
    best: dict[str, float] = {}

    def record(name: str, done: int, seconds: float) -> None:
        best[name] = max(best.get(name, 0.0), done / seconds)

    with tempfile.TemporaryDirectory(prefix="cluster-bench-") as tmp:
        work = Path(tmp)
        images = _images(work, n=args.images, size=args.size)
        tiles = 0
        for n in (1, 2):
            threads = max(1, cores // n)
            with distributed.LocalCluster(
                n_workers=n,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
            ) as cluster:
                address = cluster.scheduler_address
                _timed_propose(  # warm-up: every worker loads the encoder once
                    work / f"warm-{n}",
                    images[:n],
                    cluster=address,
                    worker_threads=threads,
                    mc=args.mc_samples,
                )
                for r in range(args.rounds):  # local and cluster rounds interleaved
                    if n == 1:
                        tiles, seconds = _timed_propose(
                            work / f"local-{r}",
                            images,
                            cluster=None,
                            worker_threads=0,
                            mc=args.mc_samples,
                        )
                        record("local", tiles, seconds)
                    done, seconds = _timed_propose(
                        work / f"cluster-{n}-{r}",
                        images,
                        cluster=address,
                        worker_threads=threads,
                        mc=args.mc_samples,
                    )
                    assert done == tiles, (done, tiles)
                    record(f"cluster_{n}", done, seconds)
    rates = {1: best["cluster_1"], 2: best["cluster_2"]}
    local = best["local"]
    print(
        json.dumps(
            {
                "local_tiles_per_s": round(local, 2),
                "cluster_1_tiles_per_s": round(rates[1], 2),
                "cluster_2_tiles_per_s": round(rates[2], 2),
                "overhead_ratio": round(local / rates[1], 3),
                "tiles": tiles,
                "chunks": args.images,
                "cores": cores,
                "mc_samples": args.mc_samples,
                "rounds": args.rounds,
                "load_avg_1min": round(os.getloadavg()[0], 2),
            }
        )
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
