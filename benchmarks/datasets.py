"""Where the benchmarks find the open datasets, and their label decoders.

The open datasets are not part of the repository and are never copied into it: the
benchmarks read them in place from :data:`DATASETS`, the folder named by the environment
variable ``LABELER_DATASETS`` or, when it is unset, the folder ``shared/datasets`` next to
the repository checkout. Each dataset keeps its original layout in a subfolder:

``peanut-weed``
    Peanut crop/weed field photos with pixel labels, public GitHub repository
    ``ptdkhoa/Peanut-dataset`` (``images/NNNN.jpg``, ``labels/NNNN.png``; 400 pairs of
    960 x 720). Tran & Phan, "Dense Multi-Scale Convolutional Network for Plant
    Segmentation", IEEE Access 11, 82640-82651, 2023; CC BY-SA 4.0.
``soybean-rust``
    Asian soybean rust leaves with three-expert vote masks, public GitHub repository
    ``Prograf-UFF/asrdnet_dataset`` (``original_images/``, ``binary_mask/``,
    ``probabilistic_mask/``); paper "ASRDNet: A new image-segmentation neural network model
    for detecting Asian rust on soybean leaves"; MIT licence badge.

A benchmark whose dataset is absent reports a reason and skips it.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

__all__ = ["DATASETS", "PEANUT", "SOYBEAN", "absent_reason", "peanut_truth"]

REPO = Path(__file__).resolve().parents[1]
#: Folder of the open datasets (see the module docstring).
DATASETS = Path(os.environ.get("LABELER_DATASETS") or REPO.parent / "shared" / "datasets")
PEANUT = DATASETS / "peanut-weed"
SOYBEAN = DATASETS / "soybean-rust"


def absent_reason(folder: Path, *, expected: str) -> str:
    """Why a dataset was skipped: which subfolder and files were expected where.

    Parameters
    ----------
    folder : Path
        The dataset's folder inside :data:`DATASETS`.
    expected : str
        What was looked for, e.g. ``"images/*.jpg"``.

    Returns
    -------
    reason : str
        Names the dataset folder, the files and the way to point at another location; no
        machine path, so the text may go into committed reports.
    """
    return (
        f"{folder.name} dataset absent (no {expected} in the open-dataset folder); "
        "set LABELER_DATASETS to the folder holding it"
    )


def peanut_truth(rgb: np.ndarray, name: str) -> np.ndarray:
    """Class mask (H, W) uint8 of a peanut-weed label image (H, W, 3).

    Label colours of the dataset (Tran & Phan 2023; the three exact colours were checked
    on all 400 labels): black soil (0), (0, 255, 0) crop (1), (255, 0, 0) weed (2).

    Raises
    ------
    ValueError
        When the label holds any other colour; ``name`` names the file.
    """
    r, g, b = (rgb[..., i].astype(np.int32) for i in range(3))
    mask = np.full(rgb.shape[:2], 255, np.uint8)
    mask[(r == 0) & (g == 0) & (b == 0)] = 0
    mask[(r == 0) & (g == 255) & (b == 0)] = 1
    mask[(r == 255) & (g == 0) & (b == 0)] = 2
    if (mask == 255).any():
        raise ValueError(f"{name}: label holds colours other than black, green and red")
    return mask
