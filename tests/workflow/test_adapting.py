"""``labeler adapt`` end to end on a few tiny demo tiles: a loadable version, resume, dates.

The demo tiles are invented (Brackenlow Farm); the checks are of the loop's own promises
(the loss falls on a short run, the version round-trips, an interrupted run resumes from
its checkpoint), so there is no outside reference value here: common practice, no source.
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest
import torch
from affine import Affine

from labeler.demo.fields import make_plot
from labeler.errors import LabelerError
from labeler.imagery.write import write_geotiff
from labeler.model.checkpoint import load_checkpoint
from labeler.project import init_project, open_project
from labeler.workflow import (
    adapt,
    add_images,
    capture_dates,
    encoder_versions,
    project_status,
    propose,
    retrain,
    save_tile_mask,
)
from labeler.workflow.adapting import adapt_checkpoint_path, revisit_crops
from labeler.workflow.encoders import load_encoder_version
from labeler.workflow.features import encoder_and_cache

SMALL = (
    "[tiles]\nsize = 64\noverlap = 0\n"
    "[model]\nthreads = 1\nepochs = 2\nmc_samples = 2\nmin_labelled_tiles = 3\n"
)


def _short_adapt(project, **options):
    """A run of two steps of two 64-pixel pairs, projectors trained with the encoder from
    the first step (the tests' usual small run); ``options`` override or add to these."""
    small = dict(minutes=1.0, max_steps=2, batch_size=2, view_size=64, projector_steps=0)
    return adapt(project, **{**small, **options})


def _tiny_project(tmp_path, *, second_date=False):
    """Two tiny demo frames (128 x 192, six 64-pixel tiles each); optionally the first
    frame again on a later date, shifted by a few pixels."""
    paths = []
    for i, name in enumerate(("long-acre", "mill-piece")):
        plot = make_plot(name, seed=11 + i, height=128, width=192)
        paths.append(
            write_geotiff(
                tmp_path / f"{name}.tif", plot.image, transform=plot.transform, crs=plot.crs
            )
        )
    root = tmp_path / "proj"
    init_project(root).close()
    (root / "labeler.toml").write_text(SMALL)
    project = open_project(root)
    add_images(project, paths, captured=date(2027, 5, 14))
    if second_date:
        plot = make_plot("long-acre", seed=11, height=128, width=192)
        t = plot.transform  # the frame moved by 3 rows and 5 columns
        shifted = Affine(t.a, t.b, t.c + 5 * t.a, t.d, t.e, t.f + 3 * t.e)
        later = np.ascontiguousarray(np.roll(plot.image, (-3, -5), axis=(0, 1)))
        path = write_geotiff(
            tmp_path / "long-acre-later.tif", later, transform=shifted, crs=plot.crs
        )
        add_images(project, [path], captured=date(2027, 5, 28))
    return project


@pytest.fixture
def tiny(tmp_path):
    project = _tiny_project(tmp_path)
    yield project
    project.close()


def test_short_run_lowers_the_loss_and_writes_a_loadable_version(tiny):
    seen = []
    out = adapt(
        tiny,
        minutes=1.0,
        max_steps=24,
        batch_size=4,
        view_size=64,
        progress=lambda done, total, label: seen.append(label),
    )
    assert out.steps == 24 and out.stopped == "steps" and out.tiles == 12
    assert out.last_loss < out.first_loss
    assert any(label.startswith("step 24, loss") and "left" in label for label in seen)
    # the version is recorded and its weights load into an encoder of that version
    (record,) = encoder_versions(tiny)
    assert record.name == "encoder-1" and record.encoder_version == out.encoder.encoder_version
    assert "-ssl-" in record.encoder_version
    assert (tiny.root / record.checkpoint).is_file()
    encoder = load_encoder_version(tiny, "encoder-1")
    assert encoder.version == record.encoder_version
    imagenet = load_encoder_version(tiny, "imagenet")
    x = torch.from_numpy(
        np.random.default_rng(0).integers(0, 256, (1, 3, 64, 64)).astype(np.float32)
    )
    with torch.no_grad():
        assert not torch.allclose(encoder(x)[-1], imagenet(x)[-1], atol=1e-4)
    # the finished run's checkpoint is gone, so a new run starts afresh
    assert not adapt_checkpoint_path(tiny, method="dense", base_version=imagenet.version).exists()


def test_newest_version_is_the_default_and_the_cache_is_kept_per_version(tiny):
    first, cache0 = encoder_and_cache(tiny)
    assert "-ssl-" not in first.version  # no adapted version yet: ImageNet-1k
    out = _short_adapt(tiny, method="image")
    newest, cache1 = encoder_and_cache(tiny)
    assert newest.version == out.encoder.encoder_version
    assert cache1.encoder_version == newest.version != cache0.encoder_version
    # the same tile key lives in another file per version: never served across versions
    assert cache1.path_for("k") != cache0.path_for("k")
    feats = [np.zeros(s, np.float16) for s in ((24, 16, 16), (40, 8, 8), (112, 4, 4), (320, 2, 2))]
    cache0.store("k", feats, tile_shape=(64, 64))
    assert cache0.load("k", tile_shape=(64, 64)) is not None
    assert cache1.load("k", tile_shape=(64, 64)) is None
    # older versions stay selectable
    again, _ = encoder_and_cache(tiny, encoder="imagenet")
    assert again.version == first.version
    with pytest.raises(LabelerError, match=r"encoder 'encoder-9': no such encoder version"):
        encoder_and_cache(tiny, encoder="encoder-9")
    fallback, _ = encoder_and_cache(tiny, encoder="encoder-9", unknown_is_default=True)
    assert fallback.version == newest.version


def test_interrupt_then_resume_continues_from_the_checkpoint(tiny):
    calls = []

    def stop_at_3(done, total, label):
        calls.append(label)
        if label.startswith("step 3,"):
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        _short_adapt(tiny, max_steps=6, checkpoint_minutes=60, progress=stop_at_3)
    imagenet = load_encoder_version(tiny, "imagenet")
    ckpt = adapt_checkpoint_path(tiny, method="dense", base_version=imagenet.version)
    assert ckpt.is_file() and encoder_versions(tiny) == []
    out = _short_adapt(tiny, max_steps=6)
    assert out.resumed_from == 3 and out.steps == 6 and len(out.losses) == 6
    assert not ckpt.exists()


def test_threads_zero_means_the_free_cores_not_all_of_torchs(tmp_path, monkeypatch):
    # model.threads = 0 is "the free cores" (labeler.settings); with another job on one of
    # two cores the steps must run on the one free core, as encoding does
    project = _tiny_project(tmp_path)
    project.close()
    (project.root / "labeler.toml").write_text(SMALL.replace("threads = 1", "threads = 0"))
    monkeypatch.setattr("labeler.model.runtime.free_cores", lambda **_: 1)
    before = torch.get_num_threads()
    torch.set_num_threads(2)
    seen = []

    def during_steps(done, total, label):
        if label.startswith("step "):
            seen.append(torch.get_num_threads())

    try:
        with open_project(project.root) as p:
            _short_adapt(p, progress=during_steps)
        assert seen and set(seen) == {1}
        assert torch.get_num_threads() == 2  # restored after the run
    finally:
        torch.set_num_threads(before)


def test_errors(tiny, tmp_path):
    with pytest.raises(LabelerError, match=r"method: expected one of \('dense', 'image'\)"):
        adapt(tiny, method="moco")
    with pytest.raises(LabelerError, match="minutes: expected a positive time budget"):
        adapt(tiny, minutes=0)
    with pytest.raises(LabelerError, match="encoder 'encoder-3': no such encoder version"):
        adapt(tiny, start="encoder-3")
    with pytest.raises(
        LabelerError,
        match=r"made 2 steps, all of them among the first 3 .*"
        r"the encoder did not change and no version was kept",
    ):
        _short_adapt(tiny, projector_steps=3)
    assert encoder_versions(tiny) == []
    empty = tmp_path / "empty"
    init_project(empty).close()
    with open_project(empty) as p, pytest.raises(LabelerError, match="at least 2 tiles"):
        adapt(p)


def test_capture_dates_and_revisit_pairs(tmp_path):
    project = _tiny_project(tmp_path, second_date=True)
    try:
        dates = capture_dates(project)
        assert sorted(dates.values()) == [date(2027, 5, 14)] * 2 + [date(2027, 5, 28)]
        pairs = revisit_crops(project)
        # every tile of long-acre on the first date has the later frame over most of it
        assert len(pairs) == 6
        for a, b in pairs:
            assert a.shape == b.shape and a.ndim == 3
        # the later frame was cut from the same pixels shifted by (3, 5): aligned, they agree
        a, b = max(pairs, key=lambda p: p[0].size)
        assert np.abs(a.astype(int) - b.astype(int))[:-4, :-6].max() == 0
        out = _short_adapt(project, batch_size=4)
        assert out.revisit_pairs == 6 and out.tiles == 18
        # --date on an image already present records the new date
        (again,) = add_images(project, [tmp_path / "mill-piece.tif"], captured=date(2027, 6, 1))
        assert again.status == "skipped" and again.captured == date(2027, 6, 1)
        assert date(2027, 6, 1) in capture_dates(project).values()
    finally:
        project.close()


def test_retrain_records_the_encoder_and_propose_reads_the_heads_encoder(tiny):
    first = _short_adapt(tiny, method="image")
    truth = make_plot("long-acre", seed=11, height=128, width=192).truth
    for t in tiny.store.tiles()[:3]:
        save_tile_mask(tiny, t.id, "survey", truth[t.window.slices], parent_version=None)
    head = retrain(tiny).model_version
    assert head.encoder_version == first.encoder.encoder_version  # the newest encoder
    assert head.details["base_encoder_version"] == first.encoder.encoder_version
    _, meta = load_checkpoint(tiny.root / head.checkpoint)
    assert meta.encoder_version == first.encoder.encoder_version  # in the checkpoint too
    # a newer encoder does not change what the head reads
    second = _short_adapt(tiny, method="image")
    assert (
        second.encoder.name == "encoder-2" and second.base_version == first.encoder.encoder_version
    )
    status = project_status(tiny)
    assert (status.proposing_head, status.proposing_encoder, status.newest_encoder) == (
        head.name,
        "encoder-1",
        "encoder-2",
    )
    result = propose(tiny)
    assert result.mode == "head" and result.model_version.id == head.id and result.proposed == 12
    versions = {p.name for p in (tiny.cache_dir / "features").iterdir()}
    assert first.encoder.encoder_version in versions
    assert second.encoder.encoder_version not in versions


def test_retrain_on_an_older_encoder_version_and_propose_follows_it(tiny, capsys):
    from labeler.cli import main

    newest = _short_adapt(tiny, method="image")
    truth = make_plot("long-acre", seed=11, height=128, width=192).truth
    for t in tiny.store.tiles()[:3]:
        save_tile_mask(tiny, t.id, "survey", truth[t.window.slices], parent_version=None)
    imagenet = load_encoder_version(tiny, "imagenet").version
    head = retrain(tiny, encoder="imagenet").model_version
    assert head.encoder_version == imagenet != newest.encoder.encoder_version
    _, meta = load_checkpoint(tiny.root / head.checkpoint)
    assert meta.encoder_version == imagenet
    status = project_status(tiny)
    assert status.proposing_head == head.name and status.newest_encoder == "encoder-1"
    result = propose(tiny)
    assert result.mode == "head" and result.model_version.id == head.id
    versions = {p.name for p in (tiny.cache_dir / "features").iterdir()}
    assert imagenet in versions and newest.encoder.encoder_version not in versions
    with pytest.raises(LabelerError, match=r"encoder 'encoder-7': no such encoder version"):
        retrain(tiny, encoder="encoder-7")
    # the command line picks a version by name; the head then records that version
    root = str(tiny.root)
    tiny.close()
    assert main(["retrain", root, "--encoder", "encoder-1"]) == 0
    assert "trained head-2" in capsys.readouterr().out
    with open_project(root) as again:
        head2 = again.store.latest_model_version(kind="head")
        assert head2.encoder_version == newest.encoder.encoder_version
