"""Agreement of a project through the store: stitched masks, pooled pairs, report, CLI."""

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score

from labeler.cli import main
from labeler.imagery.tiling import stitch
from labeler.workflow import compared_images, contested_tiles, save_tile_mask, write_agreement


def _annotate_all(project, seed):
    """Two annotators: a shared truth with independent seeded flips (simulated, test only)."""
    rng = np.random.default_rng(seed)
    tiles = project.store.tiles()
    truth = {
        t.id: (np.add.outer(np.arange(t.height), np.arange(t.width)) // 90 % 4).astype(np.uint8)
        for t in tiles
    }
    saved = {}
    for who, flip in (("ines", 0.05), ("tomas", 0.15)):
        for t in tiles:
            m = truth[t.id].copy()
            noise = rng.random(m.shape) < flip
            m[noise] = rng.integers(0, 4, int(noise.sum()))
            save_tile_mask(project, t.id, who, m, parent_version=None)
            saved[(who, t.id)] = m
    return tiles, saved


def test_pair_kappa_pooled_over_stitched_image(overlap_project):
    project = overlap_project
    tiles, saved = _annotate_all(project, seed=1)
    items = compared_images(project)
    assert len(items) == 1 and sorted(items[0].masks) == ["ines", "tomas"]
    image = project.store.images()[0]
    windows = [t.window for t in tiles]
    a = stitch([saved[("ines", t.id)] for t in tiles], windows, shape=image.shape)
    b = stitch([saved[("tomas", t.id)] for t in tiles], windows, shape=image.shape)
    np.testing.assert_array_equal(items[0].masks["ines"][:], a)  # stitched when read
    summary, files = write_agreement(project, project.root / "rep")
    pair = summary.pairs[0]
    # oracle: scikit-learn cohen_kappa_score on the image pixels, each counted once
    assert pair.kappa == pytest.approx(cohen_kappa_score(a.ravel(), b.ravel()), abs=1e-9)
    assert pair.pixels_compared == image.width * image.height
    assert files.html.exists() and files.csv.exists()
    html = files.html.read_text()
    assert "ines" in html and "tomas" in html and "crop" in html


def test_cli_agreement_prints_table_and_writes_report(overlap_project, capsys):
    project = overlap_project
    _annotate_all(project, seed=2)
    out = project.root / "report-out"
    assert main(["agreement", str(project.root), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "ines" in text and "tomas" in text and "kappa" in text.lower()
    assert (out / "agreement.csv").exists() or any(out.glob("*.csv"))
    assert any(out.glob("*.html"))


def test_cli_since_bad_date(overlap_project, capsys):
    assert main(["agreement", str(overlap_project.root), "--since", "last tuesday"]) == 1
    assert "--since: expected a date" in capsys.readouterr().err


def test_contested_list(overlap_project):
    project = overlap_project
    t = project.store.tiles()[0]
    a = np.zeros(t.shape, np.uint8)
    a[:, :100] = 1
    b = np.zeros(t.shape, np.uint8)
    b[:100, :] = 2
    save_tile_mask(project, t.id, "ines", a, parent_version=None)
    save_tile_mask(project, t.id, "tomas", b, parent_version=None)
    rows = contested_tiles(project)
    assert [r.tile_id for r in rows] == [t.id]
