"""labeler retrain: turned tiles cached once, a test-sized budget, encoder versions in the store.

Plumbing only; model quality and speed are measured by benchmarks/proposal_quality.py and
benchmarks/retrain_speed.py.
"""

import re

import numpy as np
import pytest
import torch
from PIL import Image

from labeler.cli import main
from labeler.demo.build import demo_images, truth_path
from labeler.errors import LabelerError
from labeler.project import init_project, open_project
from labeler.workflow import add_images, propose, retrain, save_tile_mask

SETTINGS = "[model]\nepochs = 2\nmc_samples = 2\nmin_labelled_tiles = 3\n"


def _project(tmp_path, settings):
    plot = demo_images()[0]  # an invented Brackenlow Farm plot: 20 tiles of 256 px
    root = tmp_path / "proj"
    init_project(root).close()
    (root / "labeler.toml").write_text(settings)
    project = open_project(root)
    add_images(project, [plot])
    truth = np.asarray(Image.open(truth_path(plot)))
    for t in project.store.tiles()[:3]:
        save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
    return project


@pytest.fixture
def three_tiles(tmp_path):
    project = _project(tmp_path, SETTINGS)
    yield project
    project.close()


@pytest.fixture
def tuned(tmp_path):
    project = _project(tmp_path, SETTINGS + "finetune_stages = 2\n")
    yield project
    project.close()


def _cache_files(project):
    return sorted(p for p in (project.cache_dir / "features").rglob("*.feat"))


def test_three_tiny_tiles_train_within_the_test_budget(three_tiles):
    project = three_tiles
    seen = []
    result = retrain(project, progress=lambda d, t, label: seen.append((d, t, label)))
    # 2 epochs of at least 16 steps (3 tiles: 2 train, 1 validates; batches of 8)
    assert result.steps == 32 and len(result.history) == 2 and result.mode == "turns"
    assert result.seconds > 0 and result.tuned_stages == 0
    mv = result.model_version
    assert mv.details["steps"] == 32 and mv.details["seconds"] == pytest.approx(
        result.seconds, abs=0.01
    )
    assert mv.encoder_version == result.encoder_version == mv.details["base_encoder_version"]
    # the eight turns of each labelled tile were encoded once into the cache
    assert len(_cache_files(project)) == 3 * 8
    labels = [label for _, _, label in seen]
    assert labels[0] == "reading labelled tiles" and "encoding turned tiles" in labels
    steps = [(d, t) for d, t, label in seen if label.startswith("step ")]
    assert steps == [(16, 32), (32, 32)]
    assert re.search(r"^step 16/32, val mIoU \d\.\d{3}, about \d+ (s|min) left$", labels[-2])


def test_a_second_retrain_encodes_nothing(three_tiles):
    project = three_tiles
    first = retrain(project)
    files = {p: p.stat().st_mtime_ns for p in _cache_files(project)}
    seen = []
    second = retrain(project, progress=lambda d, t, label: seen.append(label))
    assert "encoding turned tiles" not in seen
    assert {p: p.stat().st_mtime_ns for p in _cache_files(project)} == files
    # fixed seeds and budget: the same head again
    a = torch.load(project.root / first.model_version.checkpoint, weights_only=True)
    b = torch.load(project.root / second.model_version.checkpoint, weights_only=True)
    for k, v in a["state_dict"].items():
        torch.testing.assert_close(b["state_dict"][k], v, rtol=0, atol=0)


def test_the_command_says_how_long_it_took(three_tiles, capsys):
    assert main(["retrain", str(three_tiles.root)]) == 0
    out = capsys.readouterr().out
    assert re.search(r"took \d+\.\d s \(32 optimiser steps\)", out)


def test_a_tuned_encoder_version_round_trips_through_the_store(tuned):
    from labeler.model.cache import FeatureCache
    from labeler.model.checkpoint import load_checkpoint
    from labeler.model.encoder import load_encoder, resolve_precision
    from labeler.model.predict import propose_tiles
    from labeler.model.tail import tail_features, tail_from_state
    from labeler.workflow.features import tile_key

    project = tuned
    store = project.store
    result = retrain(project)
    encoder = load_encoder()
    mv = result.model_version
    assert result.tuned_stages == 2 and mv.details["tuned_stages"] == 2
    assert mv.encoder_version.startswith(f"{encoder.version}-tail2-")
    # saved with the head, loaded weights_only, the same version and the same outputs
    head, meta = load_checkpoint(project.root / mv.checkpoint)
    tail = tail_from_state(encoder, meta.encoder_tail)
    assert tail.version == mv.encoder_version == meta.encoder_version
    assert propose(project).proposed == 20
    tile = store.tiles()[7]
    image = store.images()[0]
    precision = resolve_precision(project.settings.model.precision)  # what propose ran in
    base = FeatureCache(
        project.cache_dir / "features", encoder_version=encoder.version, precision=precision
    )
    feats = base.load(tile_key(image, tile), tile_shape=tile.shape)
    from labeler.imagery.read import read_image

    pixels = read_image(project.image_path(image))[tile.window.slices]
    settings = project.settings.model
    want = propose_tiles(
        head,
        tail_features(tail, [feats]),
        mc_samples=settings.mc_samples,
        seed=settings.seed,
        images=[pixels],
        precision=precision,  # as propose runs the head
    )[0]
    stored = store.latest_proposal(tile.id)
    np.testing.assert_array_equal(stored.mask(), want.mask)
    # the embedding stays the installed encoder's, comparable with other heads' proposals
    np.testing.assert_allclose(stored.embedding(), feats[3].astype(np.float32).mean(axis=(1, 2)))
    # the cache holds the installed encoder's features only: a tuned version never reads
    # or writes entries of another version
    folders = {p.name for p in (project.cache_dir / "features").iterdir()}
    assert folders == {encoder.version}
    tuned_cache = FeatureCache(project.cache_dir / "features", encoder_version=tail.version)
    assert tuned_cache.load(tile_key(image, tile), tile_shape=tile.shape) is None


def _replace_weights(project, version, payload):
    """Put other weights in the database in place of a version's (a damaged project)."""
    import hashlib
    import io

    import sqlalchemy as sa

    buf = io.BytesIO()
    torch.save(payload, buf)
    data = buf.getvalue()
    engine = sa.create_engine(project.store.url)
    with engine.begin() as conn:
        conn.execute(
            sa.text("UPDATE model_weights SET data = :d, sha256 = :s, size = :n "
                    "WHERE model_version_id = :i"),
            {"d": data, "s": hashlib.sha256(data).hexdigest(), "n": len(data), "i": version.id},
        )
    engine.dispose()


def test_propose_refuses_a_tail_of_another_base_encoder(tuned):
    project = tuned
    result = retrain(project)
    path = project.root / result.model_version.checkpoint
    payload = torch.load(path, weights_only=True)
    payload["encoder_tail"]["base_version"] = "lite0-000000000000-r1"
    _replace_weights(project, result.model_version, payload)  # the team's copy
    with pytest.raises(
        LabelerError,
        match=r"cannot load the model head-1 \(encoder tail: trained on encoder lite0-0+-r1",
    ):
        propose(project)


def test_propose_refuses_a_head_of_another_encoder_version(three_tiles):
    project = three_tiles
    result = retrain(project)
    path = project.root / result.model_version.checkpoint
    payload = torch.load(path, weights_only=True)
    payload["encoder_version"] = "lite0-000000000000-r1-tail2-abc"
    _replace_weights(project, result.model_version, payload)  # the team's copy
    with pytest.raises(
        LabelerError,
        match=r"model head-1 was trained on encoder lite0-0+-r1-tail2-abc, the installed encoder gives lite0-",
    ):
        propose(project)


def test_finetune_stages_setting_is_checked(tmp_path):
    root = tmp_path / "p"
    init_project(root).close()
    (root / "labeler.toml").write_text("[model]\nfinetune_stages = 3\n")
    with pytest.raises(Exception, match=r"model.finetune_stages: expected one of 0, 2, 4, got 3"):
        open_project(root)
