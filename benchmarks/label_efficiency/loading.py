"""The two datasets of the simulation, cut into tiles and encoded (features cached).

``demo``
    The committed invented scenario ``demo_fields/`` (six plots of Brackenlow Farm, 20
    tiles of 256 px with overlap 32 each). Two whole plots (fixed, chosen with
    ``split_seed``) are the held-out set; the other four plots (80 tiles) are the pool.
``peanut``
    Peanut crop/weed field photos (public GitHub repository ``ptdkhoa/Peanut-dataset``;
    Tran & Phan, "Dense Multi-Scale Convolutional Network for Plant Segmentation", IEEE
    Access 11, 82640-82651, 2023; CC BY-SA 4.0), read in place from the open-dataset
    folder (:data:`benchmarks.datasets.PEANUT`) and never copied. A fixed seeded subset of
    the 400 photos keeps the run short: ``heldout_images`` photos are the held-out set and
    ``pool_images`` others the pool, every photo cut into 256 px tiles without overlap (12
    per 960 x 720 photo; the last row and column of tiles are moved back to end at the
    edge).

Both loaders raise ``FileNotFoundError`` when their data is absent (the command line
skips the dataset with the message as its reason).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from benchmarks.datasets import PEANUT, absent_reason, peanut_truth
from benchmarks.label_efficiency.tiles import TileSet

__all__ = ["TILE", "DEMO", "load_demo", "load_peanut"]

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "demo_fields"
#: Tile side in pixels.
TILE = 256


def _tiles_of(
    dataset: str, ident: str, image: np.ndarray, truth: np.ndarray, *, overlap: int
) -> tuple[list[str], list[np.ndarray], list[np.ndarray]]:
    from labeler.imagery.tiling import tile_grid

    if truth.shape != image.shape[:2]:
        raise ValueError(
            f"{dataset}/{ident}: truth shape {truth.shape} differs from the image's "
            f"{image.shape[:2]}; pass the label of the same image"
        )
    windows = tile_grid(*image.shape[:2], size=TILE, overlap=overlap)
    keys = [f"{dataset}/{ident}/{w.row},{w.col},{w.height},{w.width}" for w in windows]
    return (
        keys,
        [np.array(image[w.slices]) for w in windows],
        [np.array(truth[w.slices]) for w in windows],
    )


def _encode(keys, images, *, encoder, cache) -> list[tuple[np.ndarray, ...]]:
    by_key = dict(zip(keys, images, strict=True))
    return cache.get_or_compute(
        keys,
        lambda ks: [by_key[k_] for k_ in ks],
        encoder,
        tile_shapes=[tuple(im.shape[:2]) for im in images],
        batch_size=4,
    )


def _tile_set(items, *, encoder, cache) -> TileSet:
    keys, ims, masks = [], [], []
    for k_, im, m in items:
        keys += k_
        ims += im
        masks += m
    return TileSet(keys, _encode(keys, ims, encoder=encoder, cache=cache), masks, ims)


def load_demo(
    *, encoder, cache, heldout_plots: int = 2, split_seed: int = 0, folder: Path = DEMO
) -> tuple[TileSet, TileSet, dict]:
    """Pool and held-out tiles of the committed demo plots (whole plots held out).

    Parameters
    ----------
    encoder : Lite0Encoder
        Encodes the tiles the cache does not hold yet.
    cache : FeatureCache
        Feature cache of this encoder version.
    heldout_plots : int
        Plots held out.
    split_seed : int
        Seed of the held-out choice.
    folder : Path
        The demo plots (``<plot>.tif`` and ``<plot>_truth.png``).

    Returns
    -------
    pool, heldout : TileSet
    info : dict
        What the report says about the dataset (source, plots, tile counts).
    """
    from labeler.imagery.read import read_image
    from labeler.imagery.write import png_decode

    plots = sorted(p for p in folder.glob("*.tif") if not p.name.startswith("."))
    if len(plots) <= heldout_plots:
        raise FileNotFoundError(
            f"{folder.name}/: expected more than {heldout_plots} demo plots, got {len(plots)}; "
            "run '.venv/bin/python -m labeler.demo.fields demo_fields'"
        )
    order = np.random.default_rng(split_seed).permutation(len(plots))
    held = {plots[i].stem for i in order[:heldout_plots]}
    pool_items, held_items = [], []
    for p in plots:
        truth = png_decode(p.with_name(f"{p.stem}_truth.png").read_bytes())
        item = _tiles_of("demo", p.stem, read_image(p), truth, overlap=32)
        (held_items if p.stem in held else pool_items).append(item)
    pool = _tile_set(pool_items, encoder=encoder, cache=cache)
    heldout = _tile_set(held_items, encoder=encoder, cache=cache)
    info = {
        "name": "demo",
        "source": "demo_fields/ (invented Brackenlow Farm scenario, made by labeler.demo)",
        "classes": ["soil", "crop", "weed", "symptom"],
        "pool_plots": sorted({k_.split("/")[1] for k_ in pool.keys}),
        "heldout_plots": sorted(held),
        "pool_tiles": len(pool),
        "heldout_tiles": len(heldout),
        "tile": TILE,
        "overlap": 32,
    }
    return pool, heldout, info


def load_peanut(
    *,
    encoder,
    cache,
    pool_images: int = 16,
    heldout_images: int = 6,
    split_seed: int = 0,
    folder: Path = PEANUT,
) -> tuple[TileSet, TileSet, dict]:
    """Pool and held-out tiles of a fixed seeded subset of the peanut photos (read in place).

    Parameters
    ----------
    encoder, cache
        As for :func:`load_demo`.
    pool_images, heldout_images : int
        Photos in the pool and in the held-out set.
    split_seed : int
        Seed of the permutation that picks the photos.
    folder : Path
        The dataset (``images/*.jpg``, ``labels/*.png``).

    Returns
    -------
    pool, heldout : TileSet
    info : dict
        What the report says about the dataset (source, photos, tile counts).

    Raises
    ------
    FileNotFoundError
        No photos in ``folder``.
    ValueError
        More photos asked for than the dataset holds.
    """
    from labeler.imagery.read import read_image

    images = sorted((folder / "images").glob("*.jpg"))
    if not images:
        raise FileNotFoundError(absent_reason(folder, expected="images/*.jpg"))
    if pool_images + heldout_images > len(images):
        raise ValueError(
            f"--peanut-pool-images + --peanut-heldout-images: expected at most {len(images)} "
            f"photos, got {pool_images} + {heldout_images}"
        )
    order = np.random.default_rng(split_seed).permutation(len(images))
    held = [images[i] for i in sorted(order[:heldout_images])]
    pooled = [images[i] for i in sorted(order[heldout_images : heldout_images + pool_images])]

    def items(paths):
        out = []
        for p in paths:
            label = folder / "labels" / f"{p.stem}.png"
            truth = peanut_truth(read_image(label), label.name)
            out.append(_tiles_of("peanut", p.stem, read_image(p), truth, overlap=0))
        return out

    pool = _tile_set(items(pooled), encoder=encoder, cache=cache)
    heldout = _tile_set(items(held), encoder=encoder, cache=cache)
    info = {
        "name": "peanut",
        "source": (
            "peanut-weed photos, read in place from the open-dataset folder (GitHub "
            "ptdkhoa/Peanut-dataset): Tran & Phan, 'Dense Multi-Scale Convolutional Network "
            "for Plant Segmentation', IEEE Access 11, 82640-82651, 2023; CC BY-SA 4.0"
        ),
        "classes": ["soil", "crop", "weed"],
        "subset": (
            f"{pool_images} pool + {heldout_images} held-out photos of 400, "
            f"numpy default_rng({split_seed}).permutation"
        ),
        "pool_images": [p.stem for p in pooled],
        "heldout_images": [p.stem for p in held],
        "pool_tiles": len(pool),
        "heldout_tiles": len(heldout),
        "tile": TILE,
        "overlap": 0,
    }
    return pool, heldout, info
