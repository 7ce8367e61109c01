"""The training-set manifest: one JSON object per line, one line per exported image.

Each line holds:

``image``, ``mask``
    Paths of the image and of its class-index PNG, relative to the manifest's folder
    (forward slashes).
``width``, ``height``
    Image size in pixels.
``classes``
    Names of the classes present in the mask (255, unlabelled, is not a class).
``unlabelled_px``
    Pixels left unlabelled (255): weak labels have some; training should ignore them.
``split``
    ``"train"`` or ``"val"``. The rule is seeded and looks only at the image's own
    content: ``u = first 8 bytes of sha256("labeler-split:<seed>:<image sha256>") / 2**64``
    and the image is in ``val`` when ``u < val_share``. Adding images to the project
    never moves an image to the other side, and a renamed copy keeps its side.
``image_sha256``
    SHA-256 of the image file.
``tile_states``
    How many of the image's tiles are in each state (:data:`labeler.states.STATES`).
``filled_from_proposals``
    How many tiles had no saved annotation and were filled from a model proposal.

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
            image = np.array(Image.open(self.root / r["image"]).convert("RGB"))
            mask = np.array(Image.open(self.root / r["mask"]))
            return torch.from_numpy(image).permute(2, 0, 1), torch.from_numpy(mask).long()

Train with a loss that ignores unlabelled pixels, e.g.
``torch.nn.CrossEntropyLoss(ignore_index=255)``.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

import numpy as np

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.fileio import atomic_write_bytes
from labeler.imagery.tiling import row_strips
from labeler.states import STATES

__all__ = [
    "MANIFEST_NAME",
    "SPLITS",
    "split_for",
    "manifest_row",
    "write_manifest",
    "read_manifest",
]

#: Default manifest file name inside an export folder.
MANIFEST_NAME = "manifest.jsonl"
SPLITS = ("train", "val")
_HEX = frozenset("0123456789abcdef")


def _check_sha(sha: str, name: str = "image_sha256") -> str:
    text = sha.lower() if isinstance(sha, str) else ""
    if len(text) != 64 or not set(text) <= _HEX:
        raise ValueError(
            f"{name}: expected 64 hexadecimal digits (a SHA-256), got {sha!r}; "
            "compute it with labeler.fileio.sha256_file(path)"
        )
    return text


def split_for(image_sha256: str, *, seed: int = 0, val_share: float = 0.2) -> str:
    """``"train"`` or ``"val"`` for an image, by the seeded rule of the module docstring.

    Parameters
    ----------
    image_sha256 : str
        SHA-256 hex digest of the image file.
    seed : int
        Changes the draw for every image at once.
    val_share : float
        Expected share of validation images, 0..1.
    """
    sha = _check_sha(image_sha256)
    if not 0.0 <= val_share <= 1.0:
        raise ValueError(f"val_share: expected a share in [0, 1], got {val_share}")
    if not isinstance(seed, int | np.integer):
        raise ValueError(f"seed: expected an integer, got {seed!r}")
    digest = hashlib.sha256(f"labeler-split:{int(seed)}:{sha}".encode("ascii")).digest()
    u = int.from_bytes(digest[:8], "big") / 2.0**64
    return "val" if u < val_share else "train"


def _relative(path: str | os.PathLike[str], root: Path) -> str:
    p = Path(path)
    try:
        return Path(os.path.relpath(p.resolve(), root.resolve())).as_posix()
    except ValueError:  # another drive on Windows: no relative path exists
        return p.resolve().as_posix()


def manifest_row(
    *,
    image_path: str | os.PathLike[str],
    mask_path: str | os.PathLike[str],
    manifest_dir: str | os.PathLike[str],
    mask,
    image_sha256: str,
    schema: ClassSchema = DEFAULT_SCHEMA,
    tile_states: Iterable[str] = (),
    filled_from_proposals: int = 0,
    seed: int = 0,
    val_share: float = 0.2,
) -> dict:
    """The manifest line of one image (see the module docstring for the keys).

    Parameters
    ----------
    image_path, mask_path : path
        Where the image and its exported PNG mask are.
    manifest_dir : path
        Folder of the manifest file; paths are written relative to it.
    mask : ndarray, shape (H, W), uint8, or a raster read by rows
        The exported mask (gives the size and the classes present); an object whose
        ``mask[r0:r1]`` returns rows (a :class:`labeler.imagery.tiling.StitchedMask`) is
        counted strip by strip.
    image_sha256 : str
        SHA-256 of the image file (:func:`labeler.fileio.sha256_file`).
    schema : ClassSchema
    tile_states : iterable of str
        State of each of the image's tiles.
    filled_from_proposals : int
        Tiles whose exported mask came from a model proposal.
    seed, val_share
        The split rule (:func:`split_for`).
    """
    shape = tuple(getattr(mask, "shape", ()))
    if len(shape) != 2:
        mask = np.asarray(mask)
        schema.check_mask(mask, name="mask")  # names what is wrong with it
    height, width = (int(v) for v in mask.shape)
    states = list(tile_states)
    for s in states:
        if s not in STATES:
            raise ValueError(f"tile_states: expected states of {STATES}, got {s!r}")
    if (
        not isinstance(filled_from_proposals, int | np.integer)
        or not 0 <= filled_from_proposals
        or (states and filled_from_proposals > len(states))
    ):
        raise ValueError(
            "filled_from_proposals: expected a tile count between 0 and the number of tiles "
            f"({len(states)}), got {filled_from_proposals!r}"
        )
    counts = np.zeros(256, np.int64)
    for w in row_strips(height, width):
        part = np.asarray(mask[w.row : w.row + w.height])
        schema.check_mask(part, name="mask" if w.height == height else f"mask rows {w.row}..")
        counts += np.bincount(part.ravel(), minlength=256)
    root = Path(manifest_dir)
    counted = Counter(states)
    return {
        "image": _relative(image_path, root),
        "mask": _relative(mask_path, root),
        "width": width,
        "height": height,
        "classes": [c.name for c in schema.classes if counts[c.index] > 0],
        "unlabelled_px": int(counts[UNLABELLED]),
        "split": split_for(image_sha256, seed=seed, val_share=val_share),
        "image_sha256": _check_sha(image_sha256),
        "tile_states": {s: counted[s] for s in STATES if counted[s]},
        "filled_from_proposals": int(filled_from_proposals),
    }


def write_manifest(path: str | os.PathLike[str], rows: Sequence[Mapping]) -> Path:
    """Write the rows as JSON lines (UTF-8), atomically.

    Raises
    ------
    ValueError
        When two rows name the same image, or a row lacks a key of the format.
    """
    needed = ("image", "mask", "width", "height", "classes", "split")
    seen: set[str] = set()
    lines = []
    for k, row in enumerate(rows):
        missing = [key for key in needed if key not in row]
        if missing:
            raise ValueError(
                f"rows[{k}]: missing {', '.join(missing)}; build rows with manifest_row"
            )
        if row["split"] not in SPLITS:
            raise ValueError(f"rows[{k}]: split must be 'train' or 'val', got {row['split']!r}")
        if row["image"] in seen:
            raise ValueError(f"rows[{k}]: image {row['image']!r} is listed twice")
        seen.add(row["image"])
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
