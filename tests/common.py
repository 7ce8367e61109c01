"""Shared test helpers: the mask zoo and paths to the open datasets.

The zoo holds tiny hand-made masks whose properties are known exactly (areas, number of
regions, holes). Every function returns a fresh array, so tests may modify it.
Append new zoo members at the end of the file; do not change existing ones.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

__all__ = [
    "REPO",
    "DATASETS",
    "PEANUT",
    "SOYBEAN",
    "require_dataset",
    "start_together",
    "zoo_empty",
    "zoo_full",
    "zoo_square",
    "zoo_ring",
    "zoo_two_touching",
    "zoo_checker",
    "zoo_diagonal",
    "zoo_unlabelled",
    "zoo_four_classes",
    "ZOO",
    "random_masks",
]

REPO = Path(__file__).resolve().parents[1]
#: The folder of open datasets, read in place and never copied into the repository: the
#: ``LABELER_DATASETS`` environment variable, else ``shared/datasets`` beside the
#: repository (README, "Data and licences", names each dataset and its source).
DATASETS = Path(os.environ.get("LABELER_DATASETS") or REPO.parent / "shared" / "datasets")
PEANUT = DATASETS / "peanut-weed"
SOYBEAN = DATASETS / "soybean-rust"


def require_dataset(folder: Path) -> Path:
    """Skip the calling test with a clear reason when ``folder`` is absent."""
    if not folder.is_dir():
        pytest.skip(
            f"open dataset folder {folder} is absent; set LABELER_DATASETS to the folder of "
            "the open datasets (README, 'Data and licences')"
        )
    return folder


def start_together(procs, *, timeout: float) -> list[tuple[str, str]]:
    """Line child processes up by pipes, then let them go at once (no sleeps).

    Each child prints ``ready`` when it is set up and waits for ``go`` on its stdin;
    returns each one's ``(stdout, stderr)`` after it ends (``timeout`` seconds each).
    """
    for p in procs:
        line = p.stdout.readline()
        assert line == "ready\n", (line, p.stderr.read())
    for p in procs:
        p.stdin.write("go\n")
        p.stdin.flush()
    return [p.communicate(timeout=timeout) for p in procs]


def zoo_empty(shape: tuple[int, int] = (8, 8)) -> np.ndarray:
    """All background (0)."""
    return np.zeros(shape, np.uint8)


def zoo_full(shape: tuple[int, int] = (8, 8), value: int = 1) -> np.ndarray:
    """Every pixel ``value``."""
    return np.full(shape, value, np.uint8)


def zoo_square() -> np.ndarray:
    """8 x 8, a 4 x 4 square of class 1 at rows 2..5, cols 2..5 (16 pixels)."""
    m = np.zeros((8, 8), np.uint8)
    m[2:6, 2:6] = 1
    return m


def zoo_ring() -> np.ndarray:
    """10 x 10, a 6 x 6 square of class 2 at rows/cols 2..7 with a 2 x 2 hole at 4..5.

    32 pixels of class 2, one region with one hole of 4 pixels.
    """
    m = np.zeros((10, 10), np.uint8)
    m[2:8, 2:8] = 2
    m[4:6, 4:6] = 0
    return m


def zoo_two_touching() -> np.ndarray:
    """8 x 8: class 1 in cols 1..3 and class 2 in cols 4..6, rows 1..6; they share an edge.

    18 pixels each.
    """
    m = np.zeros((8, 8), np.uint8)
    m[1:7, 1:4] = 1
    m[1:7, 4:7] = 2
    return m


def zoo_checker(shape: tuple[int, int] = (4, 4)) -> np.ndarray:
    """Checkerboard of classes 0 and 1 (no two 4-neighbours equal)."""
    r, c = np.indices(shape)
    return ((r + c) % 2).astype(np.uint8)


def zoo_diagonal() -> np.ndarray:
    """6 x 6 identity diagonal of class 1: 6 regions by 4-connectivity, 1 by 8-connectivity."""
    return np.eye(6, dtype=np.uint8)


def zoo_unlabelled(shape: tuple[int, int] = (8, 8)) -> np.ndarray:
    """All 255 (no label at all)."""
    return np.full(shape, 255, np.uint8)


def zoo_four_classes() -> np.ndarray:
    """8 x 8 split in quadrants: 0 top-left, 1 top-right, 2 bottom-left, 3 bottom-right."""
    m = np.zeros((8, 8), np.uint8)
    m[:4, 4:] = 1
    m[4:, :4] = 2
    m[4:, 4:] = 3
    return m


ZOO = {
    "empty": zoo_empty,
    "full": zoo_full,
    "square": zoo_square,
    "ring": zoo_ring,
    "two_touching": zoo_two_touching,
    "checker": zoo_checker,
    "diagonal": zoo_diagonal,
    "unlabelled": zoo_unlabelled,
    "four_classes": zoo_four_classes,
}


def random_masks(seed: int, shape: tuple[int, ...], k: int, unlabelled: float = 0.1):
    """Two seeded random masks of classes 0..k-1 with about ``unlabelled`` share of 255 each.

    The second mask copies the first on about 60 % of the pixels, so the two agree better
    than chance; used by the metric and agreement tests against their oracles.
    """
    rng = np.random.default_rng(seed)
    a = rng.integers(0, k, shape).astype(np.uint8)
    b = np.where(rng.random(shape) < 0.6, a, rng.integers(0, k, shape)).astype(np.uint8)
    a[rng.random(shape) < unlabelled] = 255
    b[rng.random(shape) < unlabelled] = 255
    return a, b
