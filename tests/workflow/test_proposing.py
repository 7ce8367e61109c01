"""propose -> retrain -> propose through the store (plumbing; model quality is benchmarked)."""

import numpy as np
import pytest
from PIL import Image

from labeler.cli import main
from labeler.demo.build import demo_images, truth_path
from labeler.errors import LabelerError
from labeler.project import init_project, open_project
from labeler.workflow import add_images, labelled_tiles, propose, retrain, save_tile_mask


@pytest.fixture
def one_plot(tmp_path):
    plot = demo_images()[0]
    root = tmp_path / "proj"
    init_project(root).close()
    # tiny training for the test: few epochs, 2 dropout passes
    (root / "labeler.toml").write_text(
        "[model]\nepochs = 2\nmc_samples = 2\nmin_labelled_tiles = 3\n"
    )
    p = open_project(root)
    add_images(p, [plot])
    yield p, np.asarray(Image.open(truth_path(plot)))
    p.close()


def test_cold_start_then_head(one_plot, capsys):
    project, truth = one_plot
    store = project.store
    first = propose(project)
    assert (first.mode, first.proposed) == ("cold_start", 20)
    props = store.latest_proposals()
    assert all(store.tile(t).state == "proposed" for t in props)
    for p in props.values():
        assert 3 not in np.unique(p.mask())  # symptom is never proposed at cold start
        assert p.embedding().shape == (320,) and p.mean_entropy is None
    assert propose(project).proposed == 0  # nothing is stale
    with pytest.raises(LabelerError, match="at least 3 labelled tiles"):
        retrain(project)
    tiles = store.tiles()
    for t in tiles[:3]:
        save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
    weak = np.full(tiles[3].shape, 255, np.uint8)
    weak[100:110, 100:140] = 2
    save_tile_mask(project, tiles[3].id, "survey", weak, parent_version=None, kind="scribble")
    assert [it.kind for it in labelled_tiles(project)] == ["full", "full", "full", "scribble"]
    assert main(["retrain", str(project.root)]) == 0
    out = capsys.readouterr().out
    assert "trained head-1 on 3 full masks and 1 weak labels" in out and "validation IoU" in out
    mv = store.latest_model_version(kind="head")
    # model.augment "auto": the cached features of the turned tiles
    assert mv.details["mode"] == "turns"
    assert (project.root / mv.checkpoint).exists() and set(mv.val_iou) == {
        "soil",
        "crop",
        "weed",
        "symptom",
    }
    second = propose(project)
    # the retrain renewed the 17 open tiles; the 3 with saved masks are left to propose
    assert (second.mode, second.proposed, second.model_version.id) == ("head", 3, mv.id)
    p = store.latest_proposal(tiles[5].id)
    assert p.model_version_id == mv.id and p.uncertainty().shape == (3, 64, 64)
    assert p.mean_entropy is not None and p.mean_bald is not None
    assert 0 < p.mean_least_confidence <= 1 - 1 / 4  # stored from the proposal (K = 4 classes)
    assert store.tile(tiles[0].id).state == "amended"  # saved tiles keep their state


def test_missing_checkpoint_is_a_clear_error(one_plot):
    project, _ = one_plot
    project.store.add_model_version(
        kind="head", name="head-x", checkpoint="models/none.pt", encoder_version="x"
    )
    with pytest.raises(LabelerError, match="cannot load the model head-x"):
        propose(project)


def test_head_proposals_are_refined_from_the_tile_pixels(one_plot):
    from labeler.imagery.read import read_image
    from labeler.model.checkpoint import load_checkpoint
    from labeler.model.encoder import encode_tiles, load_encoder, resolve_precision
    from labeler.model.predict import propose_tiles

    project, truth = one_plot
    store = project.store
    tiles = store.tiles()
    for t in tiles[:3]:
        save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
    retrain(project)
    mv = store.latest_model_version(kind="head")
    assert mv.details["refine_channels"] > 0
    head, meta = load_checkpoint(project.root / mv.checkpoint)
    assert meta.config.refine_channels == mv.details["refine_channels"]
    propose(project)
    # the stored mask is the refined one, made from the tile's own pixels
    tile = tiles[7]
    image = read_image(project.image_path(store.images()[0]))[tile.window.slices]
    settings = project.settings.model
    precision = resolve_precision(settings.precision)  # the model.precision setting
    feats = encode_tiles(load_encoder(precision=precision), [image])
    want = propose_tiles(
        head,
        feats,
        mc_samples=settings.mc_samples,
        seed=settings.seed,
        images=[image],
        precision=precision,
    )[0]
    assert want.refined
    stored = store.latest_proposal(tile.id)
    np.testing.assert_array_equal(stored.mask(), want.mask)
    np.testing.assert_allclose(
        stored.uncertainty().astype(np.float32), want.uncertainty.astype(np.float32), atol=1e-3
    )


def test_retrain_follows_the_augment_setting(one_plot):
    project, truth = one_plot
    (project.root / "labeler.toml").write_text(
        '[model]\nepochs = 1\nmc_samples = 2\nmin_labelled_tiles = 3\naugment = "features"\n'
    )
    project = open_project(project.root)
    try:
        for t in project.store.tiles()[:3]:
            save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
        result = retrain(project)
        assert result.mode == "features"
        assert project.store.latest_model_version(kind="head").details["mode"] == "features"
    finally:
        project.close()


def test_encoding_the_next_block_meanwhile_gives_the_same_proposals(
    one_plot, tmp_path, monkeypatch
):
    import shutil

    from labeler.workflow import proposing

    monkeypatch.setattr(proposing, "ROW_BLOCK_PX", 256)  # many blocks: a real pipeline
    project, truth = one_plot
    for t in project.store.tiles()[:3]:
        save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
    retrain(project)
    shutil.copytree(project.root, tmp_path / "twin")  # the same store, head and cache
    together = propose(project, overlap=True)  # next block encoded in a thread of its own
    with open_project(tmp_path / "twin") as twin:
        alone = propose(twin, overlap=False)
        theirs = twin.store.latest_proposals()
    assert together.proposed == alone.proposed == len(project.store.tiles())
    assert together.cache_misses == alone.cache_misses > 0
    ours = project.store.latest_proposals()
    assert set(ours) == set(theirs)
    for tile_id, p in ours.items():
        np.testing.assert_array_equal(p.mask(), theirs[tile_id].mask())
        np.testing.assert_array_equal(p.uncertainty(), theirs[tile_id].uncertainty())
