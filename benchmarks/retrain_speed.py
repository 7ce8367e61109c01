"""Speed of the whole ``labeler retrain`` command on projects with a warm feature cache.

Prints ONE JSON line with

- ``retrain_s_12``: wall clock of ``labeler retrain`` (a new process: start, imports,
  reading the store and the tiles, encoding what the cache lacks, training, saving) on
  a project of the committed demo plots (120 tiles) whose 12 tiles of the quality
  benchmark's 10 % split (``benchmarks/proposal_quality.py``, seed 0) hold their truth as
  saved masks;
- ``retrain_s_200`` and ``retrain_s_1000``: the same on projects of the peanut crop/weed
  photos (Tran & Phan 2023, CC BY-SA 4.0; 20 tiles of 256 px per photo, read in place)
  with the truth of 200 and of 1 000 tiles saved;
- ``miou_12``: mIoU (soil, crop, weed, symptom; pixels pooled) of the proposals that
  ``labeler propose`` then makes with the new head on the 108 other demo tiles. The same
  12 tiles train as in the quality benchmark, but the project orders them by tile, so
  its validation tiles (2 of the 12) and hence this figure may differ a little from
  ``demo_miou_10pct``;
- ``reproposal_tiles_per_s``: tiles per second of the renewal that ``labeler retrain``
  runs after training on the demo project (the new head on the cached features of the
  108 tiles without a saved mask, with the refinement, the MC-dropout uncertainty and
  the writes to the store, then the re-pick), as the command reports it;
- ``propose_command_tiles_per_s``: the whole ``labeler propose`` command (a new
  process) on 20 new peanut photos (400 tiles, cold cache: reading, encoding, head,
  uncertainty, writing) added to the 200-tile project after its retrain, counting every
  tile it proposed (the 200 saved tiles too, whose features are cached: the renewal after
  a retrain leaves saved tiles alone; ``context.propose_command_tiles`` has both counts);
  null with a reason when the peanut photos are absent or the 200-tile project is not
  built.

``labeler retrain`` renews the proposals of the tiles without a saved mask after
training (``labeler.workflow.renewing``); its wall clock includes that renewal.

"Warm cache" means what ``labeler propose`` leaves: the features of every tile. The
first retrain also encodes the flips and turns of the labelled tiles it keeps
(``labeler.model.turned``); its time is the key above. ``*_again`` keys time a second
retrain of the same project, when those are cached too (what every later retrain finds
for the tiles labelled before). ``peak_mb_*`` is the peak resident memory of the retrain
process. Each figure is one run; the load average before and after each run is in
``context.load``: on a shared machine compare figures measured in one run.

The open dataset is read from the open-dataset folder (``benchmarks.datasets``); when
it is absent the peanut keys are null with a reason.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from benchmarks.datasets import PEANUT, absent_reason, peanut_truth  # noqa: E402
from labeler.imagery.read import read_image  # noqa: E402
from labeler.imagery.tiling import tile_grid  # noqa: E402
from labeler.imagery.write import png_decode  # noqa: E402
from labeler.metrics import confusion_matrix, iou_per_class  # noqa: E402
from labeler.project import init_project, open_project  # noqa: E402
from labeler.workflow import add_images, propose, save_tile_mask  # noqa: E402

DEMO = REPO / "demo_fields"
#: Settings of the benchmark projects (the defaults, stated so they do not drift).
SETTINGS = "[tiles]\nsize = 256\noverlap = 32\n"


def log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def _load() -> float:
    return round(os.getloadavg()[0], 2)


def _new_project(root: Path, images: list[Path]):
    init_project(root).close()
    (root / "labeler.toml").write_text(SETTINGS)
    project = open_project(root)
    add_images(project, images, copy=False)
    return project


def _save_truth(project, labelled: dict[int, np.ndarray]) -> None:
    for tile_id, mask in labelled.items():
        save_tile_mask(project, tile_id, "benchmark", mask, parent_version=None, source="import")


def _tiles_by_place(project) -> dict[tuple[str, int, int], object]:
    names = {im.id: Path(im.name).stem for im in project.store.images()}
    return {(names[t.image_id], t.row, t.col): t for t in project.store.tiles()}


def build_demo(root: Path, seed: int) -> tuple[Path, dict[int, np.ndarray]]:
    """The demo project with the quality benchmark's 12 training tiles labelled.

    Returns the project folder and the truth of every tile (for ``miou_12``).
    """
    plots = sorted(p for p in DEMO.glob("*.tif") if not p.name.startswith("."))
    project = _new_project(root, plots)
    with project:
        by_place = _tiles_by_place(project)
        items, truth_of = [], {}
        for p in plots:  # the quality benchmark's item order: plots sorted, tiles row-major
            truth = png_decode(p.with_name(f"{p.stem}_truth.png").read_bytes())
            for w in tile_grid(*truth.shape, size=256, overlap=32):
                tile = by_place[(p.stem, w.row, w.col)]
                items.append(tile.id)
                truth_of[tile.id] = np.array(truth[w.slices])
        order = np.random.default_rng(seed).permutation(len(items))
        n_train = round(0.1 * len(items))
        _save_truth(project, {items[k]: truth_of[items[k]] for k in order[:n_train]})
        propose(project)  # warms the feature cache: every tile's features
    return root, truth_of


def distinct_photos() -> list[Path]:
    """The peanut photos, each content once (the data set holds a few byte-identical
    copies under two names, e.g. 0203 and 0205; a project keeps one image per content)."""
    seen: set[str] = set()
    out = []
    for photo in sorted((PEANUT / "images").glob("*.jpg")):
        digest = hashlib.sha256(photo.read_bytes()).hexdigest()
        if digest not in seen:
            seen.add(digest)
            out.append(photo)
    return out


def build_peanut(root: Path, n_tiles: int, seed: int) -> Path:
    """A project of peanut photos with the truth of ``n_tiles`` tiles saved."""
    photos = distinct_photos()
    order = np.random.default_rng(seed).permutation(len(photos))
    per_photo = len(tile_grid(720, 960, size=256, overlap=32))
    chosen = [photos[i] for i in order[: -(-n_tiles // per_photo)]]
    project = _new_project(root, chosen)
    with project:
        by_place = _tiles_by_place(project)
        labelled: dict[int, np.ndarray] = {}
        for photo in chosen:
            truth = peanut_truth(read_image(PEANUT / "labels" / f"{photo.stem}.png"), photo.name)
            for w in tile_grid(*truth.shape, size=256, overlap=32):
                if len(labelled) < n_tiles:
                    labelled[by_place[(photo.stem, w.row, w.col)].id] = np.array(truth[w.slices])
        _save_truth(project, labelled)
        propose(project)
    return root


def timed_retrain(root: Path) -> tuple[float, float, str]:
    """Wall clock and peak memory (MB) of ``labeler retrain ROOT`` in a new process."""
    code = "import sys; from labeler.cli import main; sys.exit(main(sys.argv[1:]))"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    t0 = time.perf_counter()
    run = subprocess.run(
        [sys.executable, "-c", code, "retrain", str(root)],
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )
    seconds = time.perf_counter() - t0
    if run.returncode != 0:
        raise RuntimeError(f"labeler retrain {root.name} failed:\n{run.stderr[-2000:]}")
    peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # Linux: kilobytes
    return seconds, peak_kb / 1024, run.stdout.strip()


def miou_of_proposals(root: Path, truth_of: dict[int, np.ndarray]) -> float:
    """mIoU of the newest proposals of the tiles without a saved mask (pixels pooled)."""
    with open_project(root) as project:
        propose(project)
        store = project.store
        saved = {a.tile_id for a in store.annotations(kind=None)}
        latest = store.latest_proposals()
        cm = np.zeros((4, 4), np.int64)
        for tile_id, truth in truth_of.items():
            if tile_id not in saved:
                cm += confusion_matrix(truth, latest[tile_id].mask(), n_classes=4)
    return float(np.nanmean(iou_per_class(cm)))


def reproposal_rate(said: str) -> float | None:
    """Tiles/s of the renewal from the retrain's line ``renewed the proposals of N tiles
    with NAME in S s``; None when nothing was renewed."""
    m = re.search(r"renewed the proposals of (\d+) tiles with \S+ in ([\d.]+) s", said)
    if m is None or int(m.group(1)) == 0:
        return None
    return int(m.group(1)) / max(float(m.group(2)), 1e-9)


def timed_propose_on_new_photos(
    root: Path, seed: int, n_photos: int = 20
) -> tuple[float, int, int]:
    """``labeler propose`` (a new process) after adding ``n_photos`` peanut photos the
    project does not hold; returns the wall clock, the tiles the command proposed (as it
    reports them: the new tiles, and any other tile whose newest proposal is older than
    the head, such as the saved tiles the renewal after the retrain leaves alone) and the
    new tiles."""
    photos = distinct_photos()
    with open_project(root) as project:
        held = {im.name for im in project.store.images()}
        new = [p for p in photos if p.name not in held]
        chosen = [new[i] for i in np.random.default_rng(seed + 1).permutation(len(new))[:n_photos]]
        before = len(project.store.tiles())
        add_images(project, chosen, copy=False)
        n_tiles = len(project.store.tiles()) - before
    code = "import sys; from labeler.cli import main; sys.exit(main(sys.argv[1:]))"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    t0 = time.perf_counter()
    run = subprocess.run(
        [sys.executable, "-c", code, "propose", str(root)],
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )
    seconds = time.perf_counter() - t0
    if run.returncode != 0:
        raise RuntimeError(f"labeler propose {root.name} failed:\n{run.stderr[-2000:]}")
    said = re.search(r"proposed (\d+) tiles", run.stdout)
    proposed = n_tiles if said is None else int(said.group(1))
    return seconds, proposed, n_tiles


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--sizes", type=int, nargs="*", default=[200, 1000], help="peanut label sets")
    ap.add_argument("--keep", type=Path, help="build the projects here and keep them")
    ap.add_argument(
        "--once", action="store_true", help="skip the second retrain of each project (_again keys)"
    )
    args = ap.parse_args(argv)
    result: dict[str, object] = {
        "retrain_s_12": None,
        "retrain_s_200": None,
        "retrain_s_1000": None,
    }
    reasons: dict[str, str] = {}
    context: dict[str, object] = {"load": {}}
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="labeler-retrain-") as tmp:
        base = args.keep or Path(tmp)
        base.mkdir(parents=True, exist_ok=True)
        log("building the demo project (12 labelled tiles) and warming its cache")
        root, truth_of = build_demo(base / "demo-12", args.seed)
        runs = [("12", root)]
        if (PEANUT / "images").is_dir():
            for n in args.sizes:
                log(f"building a peanut project ({n} labelled tiles) and warming its cache")
                runs.append((str(n), build_peanut(base / f"peanut-{n}", n, args.seed)))
        else:
            reason = absent_reason(PEANUT, expected="images/*.jpg")
            for n in args.sizes:
                reasons[f"retrain_s_{n}"] = reason
        for key, root in runs:
            for suffix in ("",) if args.once else ("", "_again"):
                before = _load()
                seconds, peak, said = timed_retrain(root)
                context["load"][f"retrain_s_{key}{suffix}"] = [before, _load()]
                result[f"retrain_s_{key}{suffix}"] = round(seconds, 1)
                if not suffix:
                    result[f"peak_mb_{key}"] = round(peak)
                log(
                    f"retrain {key}{suffix}: {seconds:.1f} s (load {before}); "
                    + said.replace("\n", " | ")
                )
                if key == "12" and not suffix:
                    rate = reproposal_rate(said)
                    result["reproposal_tiles_per_s"] = None if rate is None else round(rate, 1)
            if key == "12":
                result["miou_12"] = round(miou_of_proposals(root, truth_of), 4)
                log(f"demo, 12 labelled tiles: proposals mIoU {result['miou_12']}")
            if key == "200":
                before = _load()
                seconds, proposed, n_tiles = timed_propose_on_new_photos(root, args.seed)
                context["load"]["propose_command_tiles_per_s"] = [before, _load()]
                # every tile the command proposed counts (the new ones from a cold cache)
                result["propose_command_tiles_per_s"] = round(proposed / seconds, 1)
                context["propose_command_tiles"] = {"proposed": proposed, "new": n_tiles}
                log(f"propose: {proposed} tiles ({n_tiles} new) in {seconds:.1f} s (load {before})")
    if result.get("reproposal_tiles_per_s") is None:
        result["reproposal_tiles_per_s"] = None
        reasons["reproposal_tiles_per_s"] = "the demo retrain renewed no tile"
    if result.get("propose_command_tiles_per_s") is None:
        result["propose_command_tiles_per_s"] = None
        reasons["propose_command_tiles_per_s"] = (
            "needs the 200-tile peanut project (--sizes 200) and the peanut photos"
        )
    result["reasons"] = reasons
    context["seconds"] = round(time.perf_counter() - started, 1)
    context["cores"] = os.cpu_count()
    result["context"] = context
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
