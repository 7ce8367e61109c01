"""Tests of labeler.export.manifest: one row per tile, fixed classes, source layer, snippet."""

from __future__ import annotations

import hashlib
import inspect
import json
import textwrap

import numpy as np
import pytest

import labeler.export.manifest as manifest_module
from labeler.export.geojson import TileInfo
from labeler.export.manifest import read_manifest, tile_rows, write_manifest
from labeler.export.pngmasks import write_image_masks, write_source_layer
from labeler.export.split import split_for
from labeler.fileio import sha256_file
from labeler.imagery.tiling import Window
from labeler.imagery.write import write_png
from tests.common import zoo_four_classes


def fake_sha(k: int) -> str:
    return hashlib.sha256(f"image {k}".encode()).hexdigest()


HALVES = [Window(0, 0, 8, 4), Window(0, 4, 8, 4)]  # the zoo's left and right halves
CLASSES = {"soil": 0, "crop": 1, "weed": 2, "symptom": 3}


def _rows(tmp_path, **options):
    m = zoo_four_classes()
    m[0, 0] = 255
    source = np.ones((8, 8), np.uint8)
    source[:, 4:] = 2  # the right half is a proposal
    out = tmp_path / "export"
    options = {
        "image_path": tmp_path / "images" / "north-07.tif",
        "mask_path": out / "masks" / "north-07.png",
        "manifest_dir": out,
        "mask": m,
        "windows": HALVES,
        "tiles": [TileInfo(11, "accepted", "ines"), TileInfo(12, "proposed", source="proposal")],
        "image_sha256": fake_sha(7),
        "source": source,
        "source_path": out / "masks" / "north-07_source.png",
        "block_px": 64,
        "val_share": 0.0,
        **options,
    }
    return tile_rows(**options)


def test_rows_per_tile(tmp_path):
    rows = _rows(tmp_path)
    common = {
        "image": "../images/north-07.tif",
        "mask": "masks/north-07.png",
        "source_mask": "masks/north-07_source.png",
        "image_size": [8, 8],
        "block": [0, 0],
        "split": "train",
        "classes": CLASSES,  # the whole list, on every row, whatever the tile holds
        "image_sha256": fake_sha(7),
    }
    # worked by hand on the zoo: left half soil over weed with one unlabelled pixel,
    # right half crop over symptom, all of it from a proposal
    assert rows == [
        {**common, "tile": 11, "state": "accepted", "source": "annotation",
         "tile_window": [0, 0, 8, 4], "window": [0, 0, 8, 4], "present": ["soil", "weed"],
         "unlabelled_share": 0.03125, "proposal_share": 0.0},
        {**common, "tile": 12, "state": "proposed", "source": "proposal",
         "tile_window": [0, 4, 8, 4], "window": [0, 4, 8, 4], "present": ["crop", "symptom"],
         "unlabelled_share": 0.0, "proposal_share": 1.0},
    ]
    keys = list(rows[0])
    assert all(list(r) == keys for r in rows)  # one layout for every row
    plain = _rows(tmp_path, source=None, source_path=None)
    assert [r["source_mask"] for r in plain] == [None, None]
    assert [r["proposal_share"] for r in plain] == [0.0, 0.0]
    val = _rows(tmp_path, val_share=1.0)
    assert {r["split"] for r in val} == {"val"} and split_for(fake_sha(7), val_share=1.0) == "val"


def test_write_and_read_back(tmp_path):
    rows = _rows(tmp_path)
    path = write_manifest(tmp_path / "manifest.jsonl", rows)
    assert read_manifest(path) == rows
    lines = path.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 2 and [json.loads(line)["tile"] for line in lines] == [11, 12]
    with pytest.raises(ValueError, match=r"rows\[1\]: tile 11 of image '../images/north-07.tif' is listed twice"):
        write_manifest(path, [rows[0], rows[0]])
    with pytest.raises(ValueError, match=r"rows\[0\]: missing tile, window"):
        write_manifest(path, [{"image": "a", "mask": "b", "classes": {}, "split": "val"}])
    with pytest.raises(ValueError, match="split must be 'train' or 'val'"):
        write_manifest(path, [dict(rows[0], split="test")])
    assert read_manifest(path) == rows  # failed writes left the file as it was
    path.write_text(lines[0] + "\n\n{oops\n", encoding="utf-8")
    with pytest.raises(ValueError, match="manifest.jsonl, line 3: not JSON"):
        read_manifest(path)
    path.write_text("[1]\n", encoding="utf-8")
    with pytest.raises(ValueError, match="line 1: expected a JSON object"):
        read_manifest(path)


def test_errors(tmp_path):
    with pytest.raises(ValueError, match="image_sha256: expected 64 hexadecimal digits"):
        _rows(tmp_path, image_sha256="abc")
    with pytest.raises(ValueError, match=r"tiles: expected one TileInfo per window \(2\), got 1"):
        _rows(tmp_path, tiles=[TileInfo(1, "accepted")])
    with pytest.raises(ValueError, match="source/source_path: pass both"):
        _rows(tmp_path, source_path=None)
    with pytest.raises(ValueError, match="mask: expected a 2-D"):
        _rows(tmp_path, mask=np.zeros(8, np.uint8))
    bad = zoo_four_classes()
    bad[0, 0] = 9
    with pytest.raises(ValueError, match=r"mask window \(0, 0, 8, 4\)"):
        _rows(tmp_path, mask=bad)
    with pytest.raises(ValueError, match=r"val_share: expected a share in \[0, 1\]"):
        split_for(fake_sha(0), val_share=1.5)
    with pytest.raises(ValueError, match="seed: expected an integer"):
        split_for(fake_sha(0), seed="a")
    with pytest.raises(ValueError, match="source rows 0..8: expected codes 0, 1 or 2, got 3"):
        write_source_layer(tmp_path / "s.png", np.full((8, 8), 3, np.uint8))


def test_the_documented_pytorch_dataset_reads_the_manifest(tmp_path):
    torch = pytest.importorskip("torch")
    doc = inspect.getdoc(manifest_module)
    block = doc.split("Reading it for training (PyTorch)::", 1)[1].split("\nMany rows", 1)[0]
    code = textwrap.dedent(block).strip("\n")
    assert code.count("\n") <= 24  # a short snippet
    rng = np.random.default_rng(0)
    out = tmp_path / "export"
    rows = []
    expected = {}
    for k, split_share in enumerate((0.0, 1.0)):  # one train image, one val image
        image = rng.integers(0, 256, size=(8, 8, 3), dtype=np.uint8)
        image_path = write_png(tmp_path / "images" / f"plot-{k}.png", image)
        mask = zoo_four_classes()
        mask[k, k] = 255
        files = write_image_masks(out / "masks", f"plot-{k}", mask)
        source = np.ones((8, 8), np.uint8)
        source[:, 4:] = 2  # the right tile is a proposal
        source_path = write_source_layer(out / "masks" / f"plot-{k}_source.png", source)
        tiles = [TileInfo(1, "accepted"), TileInfo(2, "proposed", source="proposal")]
        rows += tile_rows(image_path=image_path, mask_path=files.mask, manifest_dir=out,
                          mask=mask, windows=HALVES, tiles=tiles,
                          image_sha256=sha256_file(image_path), source=source,
                          source_path=source_path, block_px=64, val_share=split_share)
        reviewed = mask.copy()
        reviewed[source == 2] = 255
        expected[k] = [(image[w.slices], reviewed[w.slices]) for w in HALVES]
    write_manifest(out / "manifest.jsonl", rows)
    namespace: dict = {}
    exec(code, namespace)  # the docstring's own code
    train = namespace["ManifestDataset"](out / "manifest.jsonl", split="train")
    val = namespace["ManifestDataset"](out / "manifest.jsonl", split="val")
    assert len(train) == 2 and len(val) == 2
    for dataset, k in ((train, 0), (val, 1)):
        for i in range(2):
            image_t, mask_t = dataset[i]
            image, mask = expected[k][i]
            assert image_t.shape == (3, 8, 4) and image_t.dtype == torch.uint8
            assert mask_t.shape == (8, 4) and mask_t.dtype == torch.int64
            np.testing.assert_array_equal(image_t.permute(1, 2, 0).numpy(), image)
            np.testing.assert_array_equal(mask_t.numpy(), mask)  # proposals left out
