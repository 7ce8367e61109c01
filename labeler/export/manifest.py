"""The training-set manifest: one JSON object per line, one line per exported tile.

Each line holds:

``image``, ``mask``, ``source_mask``
    Paths of the image, of its class-index PNG and (only when proposals were exported)
    of its source layer (see below), relative to the manifest's folder (forward
    slashes); ``source_mask`` is null otherwise.
``image_size``
    ``[height, width]`` of the image in pixels.
``tile``, ``state``, ``source``
    The tile's id in the project, its state and where its mask came from:
    ``"annotation"`` (a saved mask somebody made or checked) or ``"proposal"`` (model
    output nobody reviewed, only with ``--proposals``).
``tile_window``, ``window``
    ``[row, col, height, width]`` of the tile, and of the part of it to use: the
    same on the train side, cut back on the val side where it overlaps training tiles
    (:mod:`labeler.export.split`). Crop the image and the masks to ``window``.
``block``, ``split``
    The spatial block ``[row, col]`` and its side, ``"train"`` or ``"val"``, by the rule
    of :mod:`labeler.export.split`: overlapping neighbours are on the same side, and
    no pixel is on both.
``classes``
    The project's whole class list, ``{name: index}``, the same on every line (255,
    unlabelled, is not a class).
``present``
    Names of the classes present in ``window``.
``unlabelled_share``
    Share of ``window`` left unlabelled (255): weak labels and tiles nobody saved;
    training should ignore those pixels.
``proposal_share``
    Share of ``window`` whose labels are model proposals (0 unless ``--proposals``).
    Per pixel, the source layer ``<image>_source.png`` says the same: 0 no label,
    1 a saved mask, 2 a model proposal. To train on reviewed pixels only, set the mask
    to 255 where the source layer is 2.
``image_sha256``
    SHA-256 of the image file.

Reading it for training (PyTorch)::

    import json, pathlib
    import numpy as np, torch
    from PIL import Image

    class ManifestDataset(torch.utils.data.Dataset):
        def __init__(self, manifest, split="train"):
            self.root = pathlib.Path(manifest).parent
            rows = pathlib.Path(manifest).read_text(encoding="utf-8").splitlines()
            self.rows = [r for r in map(json.loads, rows) if r["split"] == split]
        def __len__(self):
            return len(self.rows)
        def __getitem__(self, i):
            r = self.rows[i]
            row, col, h, w = r["window"]
            crop = np.s_[row : row + h, col : col + w]
            image = np.array(Image.open(self.root / r["image"]).convert("RGB"))[crop]
            mask = np.array(Image.open(self.root / r["mask"]))[crop]
            if r["source_mask"]:  # keep reviewed pixels only
                source = np.array(Image.open(self.root / r["source_mask"]))[crop]
                mask[source == 2] = 255
            return torch.from_numpy(image).permute(2, 0, 1), torch.from_numpy(mask).long()

Many rows share an image: open each image once and keep it while its tiles are read.
Train with a loss that ignores unlabelled pixels, e.g.
``torch.nn.CrossEntropyLoss(ignore_index=255)``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.export.geojson import TileInfo
from labeler.export.split import SPLITS, check_sha, split_for, split_tiles
from labeler.fileio import atomic_write_bytes
from labeler.imagery.tiling import Window

__all__ = [
    "MANIFEST_NAME",
    "SPLITS",
    "SOURCE_NONE",
    "SOURCE_SAVED",
    "SOURCE_PROPOSAL",
    "split_for",
    "tile_rows",
    "write_manifest",
    "read_manifest",
]

#: Default manifest file name inside an export folder.
MANIFEST_NAME = "manifest.jsonl"
#: Values of the source layer: no label, a saved mask, a model proposal.
SOURCE_NONE, SOURCE_SAVED, SOURCE_PROPOSAL = 0, 1, 2


def _relative(path: str | os.PathLike[str], root: Path) -> str:
    p = Path(path)
    try:
        return Path(os.path.relpath(p.resolve(), root.resolve())).as_posix()
    except ValueError:  # another drive on Windows: no relative path exists
        return p.resolve().as_posix()


def _window(mask, w: Window) -> np.ndarray:
    return np.asarray(mask[w.row : w.row + w.height, w.col : w.col + w.width])


def tile_rows(
    *,
    image_path: str | os.PathLike[str],
    mask_path: str | os.PathLike[str],
    manifest_dir: str | os.PathLike[str],
    mask,
    windows: Sequence[Window],
    tiles: Sequence[TileInfo],
    image_sha256: str,
    source=None,
    source_path: str | os.PathLike[str] | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    block_px: int = 1024,
    seed: int = 0,
    val_share: float = 0.2,
) -> list[dict]:
    """The manifest lines of one image's exported tiles (keys: the module docstring).

    Parameters
    ----------
    image_path, mask_path : path
        Where the image and its exported PNG mask are.
    manifest_dir : path
        Folder of the manifest file; paths are written relative to it.
    mask : ndarray, shape (H, W), uint8, or a raster read by windows
        The exported image mask; an object whose ``mask[r0:r1, c0:c1]`` returns a window
        (a :class:`labeler.imagery.tiling.StitchedMask`) is read tile by tile.
    windows : sequence of Window
        The exported tiles, in the order of ``tiles``.
    tiles : sequence of TileInfo
        Id, state and source of each exported tile.
    image_sha256 : str
        SHA-256 of the image file (:func:`labeler.fileio.sha256_file`).
    source : ndarray (H, W) uint8, a raster read by windows, or None
        The source layer (:data:`SOURCE_NONE`, :data:`SOURCE_SAVED`,
        :data:`SOURCE_PROPOSAL` per pixel); None when no proposal was exported.
    source_path : path or None
        Where the source layer was written.
    schema : ClassSchema
    block_px, seed, val_share
        The split (:func:`labeler.export.split.split_tiles`).

    Returns
    -------
    list of dict
        One per tile left after the split (a val tile wholly shared with training tiles
        is left out), in the order of ``tiles``.
    """
    shape = tuple(getattr(mask, "shape", ()))
    if len(shape) != 2:
        raise ValueError(f"mask: expected a 2-D class-index raster (H, W), got shape {shape}")
    if len(windows) != len(tiles):
        raise ValueError(
            f"tiles: expected one TileInfo per window ({len(windows)}), got {len(tiles)}"
        )
    if (source is None) != (source_path is None):
        raise ValueError("source/source_path: pass both (the source layer and its file) or neither")
    sha = check_sha(image_sha256)
    root = Path(manifest_dir)
    image_rel, mask_rel = _relative(image_path, root), _relative(mask_path, root)
    source_rel = None if source_path is None else _relative(source_path, root)
    classes = {c.name: int(c.index) for c in schema.classes}
    sides = split_tiles(
        windows, image_sha256=sha, block_px=block_px, seed=seed, val_share=val_share
    )
    rows = []
    for tile_window, info, side in zip(windows, tiles, sides, strict=True):
        w = side.window
        if w is None:
            continue
        part = _window(mask, w)
        schema.check_mask(part, name=f"mask window {w.as_tuple()}")
        counts = np.bincount(part.ravel(), minlength=256)
        proposal = 0
        if source is not None:
            proposal = int(np.count_nonzero(_window(source, w) == SOURCE_PROPOSAL))
        size = part.size
        rows.append(
            {
                "image": image_rel,
                "mask": mask_rel,
                "source_mask": source_rel,
                "image_size": [int(shape[0]), int(shape[1])],
                "tile": info.tile_id,
                "state": info.state,
                "source": info.source,
                "tile_window": list(tile_window.as_tuple()),
                "window": list(w.as_tuple()),
                "block": list(side.block),
                "split": side.split,
                "classes": classes,
                "present": [c.name for c in schema.classes if counts[c.index] > 0],
                "unlabelled_share": round(float(counts[UNLABELLED]) / size, 6),
                "proposal_share": round(proposal / size, 6),
                "image_sha256": sha,
            }
        )
    return rows


def write_manifest(path: str | os.PathLike[str], rows: Sequence[Mapping]) -> Path:
    """Write the rows as JSON lines (UTF-8), atomically.

    Raises
    ------
    ValueError
        When two rows name the same tile of an image, or a row lacks a key of the format.
    """
    needed = ("image", "mask", "tile", "window", "classes", "split")
    seen: set = set()
    lines = []
    for k, row in enumerate(rows):
        missing = [key for key in needed if key not in row]
        if missing:
            raise ValueError(
                f"rows[{k}]: missing {', '.join(missing)}; build rows with tile_rows"
            )
        if row["split"] not in SPLITS:
            raise ValueError(f"rows[{k}]: split must be 'train' or 'val', got {row['split']!r}")
        key = (row["image"], row["tile"])
        if key in seen:
            raise ValueError(
                f"rows[{k}]: tile {row['tile']!r} of image {row['image']!r} is listed twice"
            )
        seen.add(key)
        lines.append(json.dumps(row, ensure_ascii=False, allow_nan=False, sort_keys=False))
    text = "".join(line + "\n" for line in lines)
    return atomic_write_bytes(path, text.encode("utf-8"))


def read_manifest(path: str | os.PathLike[str]) -> list[dict]:
    """Read a manifest back (blank lines are skipped).

    Raises
    ------
    ValueError
        Naming the file and line of a line that is not a JSON object.
    """
    p = Path(path)
    rows = []
    for n, line in enumerate(p.read_text(encoding="utf-8").splitlines(), start=1):
        if not line.strip():
            continue
        try:
            row = json.loads(line)
        except ValueError as err:
            raise ValueError(f"{p}, line {n}: not JSON ({err})") from None
        if not isinstance(row, dict):
            raise ValueError(f"{p}, line {n}: expected a JSON object, got {type(row).__name__}")
        rows.append(row)
    return rows
