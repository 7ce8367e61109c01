"""Tests of labeler.export.manifest: JSON lines, seeded split, the PyTorch snippet."""

from __future__ import annotations

import hashlib
import inspect
import json
import textwrap

import numpy as np
import pytest
from scipy.stats import binomtest

import labeler.export.manifest as manifest_module
from labeler.export.manifest import (
    manifest_row,
    read_manifest,
    split_for,
    write_manifest,
)
from labeler.export.pngmasks import write_image_masks
from labeler.fileio import sha256_file
from labeler.imagery.write import write_png
from tests.common import zoo_four_classes


def fake_sha(k: int) -> str:
    return hashlib.sha256(f"image {k}".encode()).hexdigest()


def test_split_share_is_binomial_and_stable_when_images_are_added():
    n = 2000
    first = [split_for(fake_sha(k), seed=3, val_share=0.2) for k in range(n)]
    # oracle: scipy.stats.binomtest; a hash-uniform rule gives Binomial(n, 0.2) val images
    assert binomtest(first.count("val"), n, 0.2).pvalue > 1e-3
    more = [split_for(fake_sha(k), seed=3, val_share=0.2) for k in range(n + 500)]
    assert more[:n] == first  # adding images moves no earlier image
    other_seed = [split_for(fake_sha(k), seed=4, val_share=0.2) for k in range(n)]
    assert other_seed != first
    assert {split_for(fake_sha(k), val_share=0.0) for k in range(50)} == {"train"}
    assert {split_for(fake_sha(k), val_share=1.0) for k in range(50)} == {"val"}
    assert split_for(fake_sha(1).upper()) == split_for(fake_sha(1))


def test_manifest_row_contents(tmp_path):
    m = zoo_four_classes()
    m[0, 0] = 255
    m[4:, :4] = 0  # no weed
    out = tmp_path / "export"
    row = manifest_row(
        image_path=tmp_path / "images" / "north-07.tif",
        mask_path=out / "masks" / "north-07.png",
        manifest_dir=out,
        mask=m,
        image_sha256=fake_sha(7),
        tile_states=["accepted", "amended", "accepted", "proposed"],
        filled_from_proposals=1,
        seed=0,
        val_share=0.2,
    )
    assert row == {
        "image": "../images/north-07.tif",
        "mask": "masks/north-07.png",
        "width": 8,
        "height": 8,
        "classes": ["soil", "crop", "symptom"],
        "unlabelled_px": 1,
        "split": split_for(fake_sha(7)),
        "image_sha256": fake_sha(7),
        "tile_states": {"proposed": 1, "accepted": 2, "amended": 1},
        "filled_from_proposals": 1,
    }


def test_write_and_read_back(tmp_path):
    rows = [
        manifest_row(image_path=tmp_path / f"i{k}.png", mask_path=tmp_path / f"m{k}.png",
                     manifest_dir=tmp_path, mask=zoo_four_classes(), image_sha256=fake_sha(k))
        for k in range(3)
    ]
    path = write_manifest(tmp_path / "manifest.jsonl", rows)
    assert read_manifest(path) == rows
    lines = path.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 3 and all(json.loads(line)["mask"].startswith("m") for line in lines)
    with pytest.raises(ValueError, match=r"rows\[1\]: image 'i0.png' is listed twice"):
        write_manifest(path, [rows[0], rows[0]])
    with pytest.raises(ValueError, match=r"rows\[0\]: missing width, height"):
        write_manifest(path, [{"image": "a", "mask": "b", "classes": [], "split": "val"}])
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
    common = dict(image_path=tmp_path / "i.png", mask_path=tmp_path / "m.png",
                  manifest_dir=tmp_path, mask=zoo_four_classes())
    with pytest.raises(ValueError, match="image_sha256: expected 64 hexadecimal digits"):
        manifest_row(**common, image_sha256="abc")
    with pytest.raises(ValueError, match="tile_states: expected states of"):
        manifest_row(**common, image_sha256=fake_sha(0), tile_states=["done"])
    with pytest.raises(ValueError, match="filled_from_proposals: expected a tile count"):
        manifest_row(**common, image_sha256=fake_sha(0), tile_states=["proposed"],
                     filled_from_proposals=2)
    with pytest.raises(ValueError, match=r"val_share: expected a share in \[0, 1\]"):
        split_for(fake_sha(0), val_share=1.5)
    with pytest.raises(ValueError, match="seed: expected an integer"):
        split_for(fake_sha(0), seed="a")


def test_the_documented_pytorch_dataset_reads_the_manifest(tmp_path):
    torch = pytest.importorskip("torch")
    doc = inspect.getdoc(manifest_module)
    block = doc.split("Reading it for training (PyTorch)::", 1)[1].split("\nTrain with", 1)[0]
    code = textwrap.dedent(block).strip("\n")
    assert code.count("\n") <= 16  # a short snippet
    rng = np.random.default_rng(0)
    out = tmp_path / "export"
    rows = []
    masks = {}
    for k, split_share in enumerate((0.0, 1.0)):  # one train image, one val image
        image = rng.integers(0, 256, size=(8, 8, 3), dtype=np.uint8)
        image_path = write_png(tmp_path / "images" / f"plot-{k}.png", image)
        mask = zoo_four_classes()
        mask[k, k] = 255
        files = write_image_masks(out / "masks", f"plot-{k}", mask)
        masks[f"plot-{k}"] = (image, mask)
        rows.append(manifest_row(image_path=image_path, mask_path=files.mask, manifest_dir=out,
                                 mask=mask, image_sha256=sha256_file(image_path),
                                 val_share=split_share))
    write_manifest(out / "manifest.jsonl", rows)
    namespace: dict = {}
    exec(code, namespace)  # the docstring's own code
    train = namespace["ManifestDataset"](out / "manifest.jsonl", split="train")
    val = namespace["ManifestDataset"](out / "manifest.jsonl", split="val")
    assert len(train) == 1 and len(val) == 1
    for dataset, stem in ((train, "plot-0"), (val, "plot-1")):
        image_t, mask_t = dataset[0]
        image, mask = masks[stem]
        assert image_t.shape == (3, 8, 8) and image_t.dtype == torch.uint8
        assert mask_t.shape == (8, 8) and mask_t.dtype == torch.int64
        np.testing.assert_array_equal(image_t.permute(1, 2, 0).numpy(), image)
        np.testing.assert_array_equal(mask_t.numpy(), mask)
