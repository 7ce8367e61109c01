"""Head training: epochs, augmentation modes, early stopping, refinement, repeatability."""

import copy
import dataclasses
import math

import numpy as np
import pytest
import torch

from labeler.errors import InputError
from labeler.model import train as train_module
from labeler.model.encoder import encode_tiles
from labeler.model.head import REFINE_CHANNELS, HeadConfig
from labeler.model.predict import propose_tiles
from labeler.model.train import epoch_batches, train_head
from labeler.settings import ModelSettings
from tests.model.conftest import disk_tiles

TINY = ModelSettings(epochs=2, batch_size=2, min_labelled_tiles=3, val_share=0.34, seed=0)


def fit(*args, **kwargs):
    """train_head with one pass per epoch (min_steps_per_epoch=1) to keep tiny tests fast."""
    kwargs.setdefault("min_steps_per_epoch", 1)
    return train_head(*args, **kwargs)


@pytest.fixture(scope="module")
def tiles(encoder):
    images, masks = disk_tiles(3, size=64, seed=0)
    return images, masks, encode_tiles(encoder, images)


def test_batches_repeat_whole_passes_up_to_min_steps():
    rng = np.random.default_rng(0)
    groups = {(64, 64): [0, 1, 2], (32, 32): [3, 4]}
    out = epoch_batches(groups, 2, rng, min_steps=7)
    assert len(out) == 9  # passes of 3 batches (2 of the 64 px tiles, 1 of the 32 px) until >= 7
    for k in (0, 3, 6):
        one_pass = sorted(i for b in out[k : k + 3] for i in b)
        assert one_pass == [0, 1, 2, 3, 4]
    for b in out:  # a batch never mixes tile sizes
        assert len({(64, 64) if i < 3 else (32, 32) for i in b}) == 1
    assert len(epoch_batches(groups, 8, rng)) == 2


def test_too_few_labelled_tiles_is_a_clear_error(tiles):
    images, masks, feats = tiles
    empty = [masks[0], masks[1], np.full_like(masks[2], 255)]  # third tile unlabelled
    with pytest.raises(
        InputError, match=r"at least 3 labelled tiles \(model.min_labelled_tiles\), got 2"
    ):
        fit(empty, class_indices=(0, 1), features=feats, settings=TINY)


def test_training_on_features_returns_head_and_val_iou(tiles):
    images, masks, feats = tiles
    seen = []
    res = fit(
        masks,
        class_indices=(0, 1, 2),
        features=feats,
        settings=TINY,
        mode="features",
        progress=lambda e, n, m: seen.append((e, n, sorted(m))),
    )
    assert res.mode == "features" and res.n_train == 2 and res.n_val == 1
    assert [s[:2] for s in seen] == [(1, 2), (2, 2)]
    assert seen[0][2] == ["epoch", "step", "train_loss", "val_loss", "val_miou"]
    assert res.val_iou.shape == (3,)
    assert np.isfinite(res.val_iou[:2]).all() and np.isnan(res.val_iou[2])  # no weed in validation
    assert 1 <= res.best_epoch <= 2 and not res.head.training


def test_weak_labels_train_and_auto_picks_image_mode(tiles, encoder):
    images, masks, feats = tiles
    weak_labels = []
    for m in masks:  # keep only every fourth row: a weak label
        s = np.full_like(m, 255)
        s[::4] = m[::4]
        weak_labels.append(s)
    res = fit(weak_labels, class_indices=(0, 1), images=images, encoder=encoder, settings=TINY)
    assert res.mode == "images"
    assert np.isfinite(res.history[-1]["train_loss"])


def test_training_is_repeatable(tiles):
    images, masks, feats = tiles
    a = fit(masks, class_indices=(0, 1), features=feats, settings=TINY, mode="features")
    b = fit(masks, class_indices=(0, 1), features=feats, settings=TINY, mode="features")
    for (ka, va), (kb, vb) in zip(
        a.head.state_dict().items(), b.head.state_dict().items(), strict=True
    ):
        assert ka == kb
        torch.testing.assert_close(va, vb, rtol=0, atol=0)


def _scripted_validation(monkeypatch, losses):
    """Make train_head's validation return the hand-made ``losses``, one per epoch, and
    record a copy of the head's state at each call (the state the epoch ends with)."""
    states = []

    def fake_validate(head, *args, **kwargs):
        states.append(copy.deepcopy(head.state_dict()))
        cm = np.array([[3, 1], [1, 3]])  # IoU 0.6 for both classes
        return losses[len(states) - 1], cm

    monkeypatch.setattr(train_module, "validate", fake_validate)
    return states


@pytest.mark.parametrize(
    ("patience", "stop_epoch", "best_epoch"),
    [
        # losses 1.0, 0.8, 0.9, 0.85, 0.7, 0.75, 0.76, 0.77, 0.6, 0.5 (worked by hand):
        (1, 3, 2),  # 0.9 at epoch 3 does not improve on 0.8: stop, keep epoch 2
        (2, 4, 2),  # 0.9 and 0.85: two epochs without a lower loss
        (3, 8, 5),  # 0.7 at epoch 5 improves; 0.75, 0.76, 0.77 do not
        (4, 10, 10),  # never stale for 4 epochs: runs all 10 epochs, keeps the last
    ],
)
def test_early_stopping_stops_at_the_known_epoch(
    tiles, monkeypatch, patience, stop_epoch, best_epoch
):
    images, masks, feats = tiles
    losses = [1.0, 0.8, 0.9, 0.85, 0.7, 0.75, 0.76, 0.77, 0.6, 0.5]
    states = _scripted_validation(monkeypatch, losses)
    s = ModelSettings(epochs=10, batch_size=2, val_share=0.34, seed=0)
    res = fit(
        masks, class_indices=(0, 1), features=feats, settings=s, mode="features", patience=patience
    )
    assert len(res.history) == len(states) == stop_epoch
    assert [h["val_loss"] for h in res.history] == losses[:stop_epoch]
    assert res.best_epoch == best_epoch
    np.testing.assert_allclose(res.val_iou, [0.6, 0.6], atol=1e-12)
    # the head comes back in the state of the best epoch, not of the last one
    kept = res.head.state_dict()
    for name, value in states[best_epoch - 1].items():
        torch.testing.assert_close(kept[name], value, rtol=0, atol=0)
    if best_epoch != stop_epoch:
        last = states[stop_epoch - 1]
        assert any(not torch.equal(kept[k], last[k]) for k in last if k.endswith("weight"))


def test_without_validation_every_epoch_runs_and_the_last_is_kept(tiles, monkeypatch):
    images, masks, feats = tiles
    states = []

    def fake_validate(head, *args, **kwargs):  # what validate returns without validation tiles
        states.append(copy.deepcopy(head.state_dict()))
        return math.nan, None

    monkeypatch.setattr(train_module, "validate", fake_validate)
    s = ModelSettings(epochs=4, batch_size=2, val_share=0.0, seed=0, min_labelled_tiles=3)
    res = fit(masks, class_indices=(0, 1), features=feats, settings=s, mode="features", patience=1)
    assert res.n_val == 0 and len(res.history) == 4 and res.best_epoch == 4
    assert np.isnan(res.val_iou).all() and res.val_iou.shape == (2,)
    for name, value in states[-1].items():
        torch.testing.assert_close(res.head.state_dict()[name], value, rtol=0, atol=0)


def test_keep_last_runs_every_epoch_and_keeps_the_last_state(tiles, monkeypatch):
    images, masks, feats = tiles
    # the same scripted losses as above: patience 1 would stop at epoch 3 and keep epoch 2
    losses = [1.0, 0.8, 0.9, 0.85, 0.7, 0.75, 0.76, 0.77, 0.6, 0.5]
    states = _scripted_validation(monkeypatch, losses[:6] + [0.9])
    s = ModelSettings(epochs=7, batch_size=2, val_share=0.34, seed=0)
    res = fit(
        masks,
        class_indices=(0, 1),
        features=feats,
        settings=s,
        mode="features",
        patience=1,
        keep="last",
    )
    assert len(res.history) == len(states) == 7 and res.best_epoch == 7
    assert [h["val_loss"] for h in res.history] == losses[:6] + [0.9]
    for name, value in states[-1].items():
        torch.testing.assert_close(res.head.state_dict()[name], value, rtol=0, atol=0)


def test_keep_last_validates_at_spaced_epochs_and_the_last(tiles, monkeypatch):
    images, masks, feats = tiles
    states = _scripted_validation(monkeypatch, [float(k) for k in range(20)])
    s = ModelSettings(epochs=20, batch_size=2, val_share=0.34, seed=0)
    res = fit(masks, class_indices=(0, 1), features=feats, settings=s, mode="features", keep="last")
    # worked by hand: 20 epochs of one step, at most 8 reported validations -> every
    # ceil(20 / 8) = 3rd epoch (3, 6, ..., 18) and the last (20)
    validated = [int(h["epoch"]) for h in res.history if not math.isnan(h["val_loss"])]
    assert validated == [3, 6, 9, 12, 15, 18, 20] and len(states) == 7
    assert len(res.history) == 20 and res.best_epoch == 20
    assert res.val_iou == pytest.approx([0.6, 0.6])  # the last epoch's scripted matrix


def test_real_validation_losses_follow_the_rule(tiles):
    images, masks, feats = tiles
    s = ModelSettings(epochs=12, batch_size=2, val_share=0.34, seed=0)
    res = fit(masks, class_indices=(0, 1), features=feats, settings=s, mode="features", patience=1)
    losses = [h["val_loss"] for h in res.history]
    assert all(np.isfinite(losses))
    assert res.best_epoch == int(np.argmin(losses)) + 1
    # patience 1: every epoch but the last lowered the loss, or training ran out of epochs
    assert all(b < a for a, b in zip(losses[:-2], losses[1:-1], strict=True))
    assert len(losses) == 12 or losses[-1] >= losses[-2]


def test_patience_defaults_to_the_setting(tiles):
    images, masks, feats = tiles
    s = ModelSettings(epochs=12, batch_size=2, val_share=0.34, seed=0, patience=1)
    by_setting = fit(masks, class_indices=(0, 1), features=feats, settings=s, mode="features")
    explicit = fit(
        masks,
        class_indices=(0, 1),
        features=feats,
        settings=dataclasses.replace(s, patience=10),
        mode="features",
        patience=1,
    )
    assert by_setting.history == explicit.history
    assert by_setting.best_epoch == explicit.best_epoch


def test_learns_the_invented_disk_scene(tiles):
    images, masks, feats = tiles
    s = ModelSettings(epochs=15, batch_size=2, val_share=0.34, seed=0)
    res = fit(masks, class_indices=(0, 1), features=feats, settings=s, mode="features")
    assert res.val_iou[1] > 0.5  # green disks on brown soil: an easy scene


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (
            {"mode": "sideways"},
            "mode: expected one of 'auto', 'turns', 'features', 'images', got 'sideways'",
        ),
        ({"mode": "images"}, "mode: 'images' needs both images and encoder"),
        ({"patience": 0}, "patience: expected at least 1 epoch, got 0"),
        ({"keep": "first"}, "keep: expected 'best' or 'last', got 'first'"),
        ({"precision": "half"}, "precision: expected 'float32' or 'bfloat16', got 'half'"),
        ({"min_steps_per_epoch": 0}, "min_steps_per_epoch: expected at least 1, got 0"),
        ({"class_indices": (0, 2)}, r"masks: tile 0 holds values \[1\] that are not head classes"),
    ],
)
def test_bad_options_are_refused(tiles, kwargs, match):
    images, masks, feats = tiles
    args = {"class_indices": (0, 1), "features": feats, "settings": TINY} | kwargs
    with pytest.raises(ValueError, match=match):
        fit(masks, **args)


def test_features_of_other_tiles_are_refused(tiles):
    images, masks, feats = tiles
    big = [np.zeros((128, 128), np.uint8)] * 3
    with pytest.raises(
        ValueError,
        match=r"features: tile 0 has stride-4 features 16 x 16 but its mask is \(128, 128\)",
    ):
        fit(big, class_indices=(0, 1), features=feats, settings=TINY, mode="features")


# -- refinement -------------------------------------------------------------------------------
def blade_tiles(n, *, size=64, seed=0):
    """``n`` invented tiles: thin green blades (1-2 px wide, class 1) on brown soil."""
    rng = np.random.default_rng(seed)
    images, masks = [], []
    for _ in range(n):
        im = np.empty((size, size, 3), np.float64)
        im[:] = (120, 90, 60)
        m = np.zeros((size, size), np.uint8)
        for _ in range(6):
            k, w = int(rng.integers(2, size - 4)), int(rng.integers(1, 3))
            if rng.random() < 0.5:
                m[:, k : k + w] = 1
            else:
                m[k : k + w, :] = 1
        im[m == 1] = (50, 160, 40)
        im += rng.normal(0, 6, im.shape)
        images.append(np.clip(im, 0, 255).astype(np.uint8))
        masks.append(m)
    return images, masks


def test_default_head_refines_only_when_pixels_are_given(tiles):
    images, masks, feats = tiles
    plain = fit(masks, class_indices=(0, 1), features=feats, settings=TINY, mode="features")
    assert plain.head.config.refine_channels == 0 and plain.head.refiner is None
    refined = fit(
        masks, class_indices=(0, 1), features=feats, images=images, settings=TINY, mode="features"
    )
    assert refined.head.config.refine_channels == REFINE_CHANNELS
    assert refined.mode == "features" and np.isfinite(refined.history[-1]["val_loss"])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (
            {"config": HeadConfig(class_indices=(0, 1), refine_channels=8)},
            r"images: a head with refinement \(config.refine_channels = 8\) learns from the "
            r"tiles' pixels",
        ),
        (
            {"images": [np.zeros((64, 60, 3), np.uint8)] * 3},
            r"images: tile 0 expected an RGB tile of shape \(64, 64, 3\) like its mask, got "
            r"\(64, 60, 3\)",
        ),
        ({"aux_weight": -1.0}, r"aux_weight: expected a weight >= 0, got -1.0"),
    ],
)
def test_bad_refinement_inputs_are_refused(tiles, kwargs, match):
    images, masks, feats = tiles
    args = {"class_indices": (0, 1), "features": feats, "settings": TINY, "mode": "features"}
    with pytest.raises(ValueError, match=match):
        fit(masks, **(args | kwargs))


def test_refinement_recovers_blades_thinner_than_a_cell(pooling_encoder):
    # blades of 1-2 px fill at most half a stride-4 cell: the bilinear mask of the coarse
    # logits misses most of them, the refinement sees them in the pixels
    images, masks = blade_tiles(8, seed=1)
    feats = encode_tiles(pooling_encoder, images)
    s = ModelSettings(epochs=6, batch_size=4, val_share=0.0, seed=0, min_labelled_tiles=3)
    res = train_head(  # a constant rate: the claim is the refinement's, not the schedule's
        masks[:6],
        class_indices=(0, 1),
        features=feats[:6],
        images=images[:6],
        settings=s,
        schedule="constant",
    )
    refined = propose_tiles(res.head, feats[6:], images=images[6:], mc_samples=1)
    coarse = propose_tiles(res.head, feats[6:], mc_samples=1)

    def iou(props):  # IoU = TP / (TP + FP + FN), pooled over the held-out tiles
        pred = np.stack([p.mask for p in props]) == 1
        true = np.stack(masks[6:]) == 1
        return (pred & true).sum() / (pred | true).sum()

    assert all(p.refined for p in refined)
    assert iou(refined) > 0.8 and iou(refined) > iou(coarse) + 0.2


# -- turns mode, step budget, schedule, fine-tuning -------------------------------------------
@pytest.fixture(scope="module")
def turned_tiles(encoder, tmp_path_factory):
    from labeler.model.cache import FeatureCache
    from labeler.model.turned import turned_features

    images, masks = disk_tiles(3, size=64, seed=0)
    cache = FeatureCache(tmp_path_factory.mktemp("cache"), encoder_version=encoder.version)
    keys = [f"disk{i}:0:0:64:64" for i in range(3)]
    return images, masks, turned_features(cache, encoder, keys, images, (0, 1, 5))


def test_turns_mode_reads_the_cached_turns_and_stops_at_the_step_budget(turned_tiles, encoder):
    images, masks, turned = turned_tiles
    seen = []
    res = train_head(
        masks,
        class_indices=(0, 1),
        turned=turned,
        images=images,
        encoder=encoder,
        settings=dataclasses.replace(TINY, epochs=40),
        steps=20,
        progress=lambda step, total, m: seen.append((step, total)),
    )
    assert res.mode == "turns" and res.steps == res.budget == 20
    # epochs of 16 steps: one whole epoch, then the 4 steps left of the budget
    assert seen == [(16, 20), (20, 20)] and [h["step"] for h in res.history] == [16.0, 20.0]
    assert np.isfinite(res.history[-1]["train_loss"])


def test_epochs_bound_the_budget_too(turned_tiles):
    images, masks, turned = turned_tiles
    res = fit(masks, class_indices=(0, 1), turned=turned, settings=TINY, steps=500)
    # 2 epochs x 1 step (min_steps_per_epoch=1, 2 training tiles in one batch of 2)
    assert res.budget == 2 and res.steps == 2


def test_turns_mode_is_repeatable(turned_tiles):
    images, masks, turned = turned_tiles
    runs = [
        fit(masks, class_indices=(0, 1), turned=turned, images=images, settings=TINY)
        for _ in range(2)
    ]
    for k, v in runs[0].head.state_dict().items():
        torch.testing.assert_close(runs[1].head.state_dict()[k], v, rtol=0, atol=0)


def test_bfloat16_steps_train_float32_weights_to_nearly_the_same_loss(turned_tiles):
    images, masks, turned = turned_tiles
    runs = {
        p: fit(
            masks, class_indices=(0, 1), turned=turned, images=images, settings=TINY, precision=p
        )
        for p in ("float32", "bfloat16")
    }
    assert runs["bfloat16"].precision == "bfloat16"
    assert all(v.dtype == torch.float32 for v in runs["bfloat16"].head.state_dict().values())
    losses = {p: r.history[0]["train_loss"] for p, r in runs.items()}
    # bfloat16 keeps 8 bits of mantissa (relative rounding 2**-9 per operation): the
    # first epoch's loss of the same draws agrees to a few per cent (common practice, no source)
    assert losses["bfloat16"] == pytest.approx(losses["float32"], rel=0.03)


def test_fine_tuned_stages_train_and_come_back_in_their_best_state(turned_tiles, encoder):
    images, masks, turned = turned_tiles
    s = dataclasses.replace(TINY, finetune_stages=2)
    res = fit(
        masks, class_indices=(0, 1), turned=turned, images=images, encoder=encoder, settings=s
    )
    assert res.tail is not None and res.tail.stages == 2 and not res.tail.training
    from labeler.model.tail import EncoderTail

    untouched = EncoderTail(encoder, stages=2)
    changed = [
        not torch.equal(a, b)
        for a, b in zip(
            res.tail.state_dict().values(), untouched.state_dict().values(), strict=True
        )
    ]
    assert any(changed)  # the tail learned
    assert res.tail.version != untouched.version
    again = fit(
        masks, class_indices=(0, 1), turned=turned, images=images, encoder=encoder, settings=s
    )
    assert again.tail.version == res.tail.version  # seeded: the same encoder version again
    frozen = fit(
        masks, class_indices=(0, 1), turned=turned, images=images, encoder=encoder, settings=TINY
    )
    assert frozen.tail is None


def test_cosine_schedule_on_worked_steps():
    from labeler.model.steps import cosine_schedule

    w = torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.SGD([w], lr=2.0)
    sched = cosine_schedule(opt, 21, warmup=0.05)  # warm-up round(1.05) = 1 step
    rates = []
    for _ in range(21):
        rates.append(opt.param_groups[0]["lr"])
        opt.step()
        sched.step()
    # worked by hand: step 0 of a 1-step warm-up: 2 * 1/1; then 2 * (1 + cos(pi t / 20)) / 2
    want = [2.0] + [1.0 + math.cos(math.pi * (t - 1) / 20) for t in range(1, 21)]
    np.testing.assert_allclose(rates, want, atol=1e-12)
    with pytest.raises(ValueError, match=r"total_steps: expected at least 1 step, got 0"):
        cosine_schedule(opt, 0)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"steps": 0}, r"steps: expected at least 1 optimiser step \(or None: automatic\), got 0"),
        ({"schedule": "steep"}, r"schedule: expected 'cosine' or 'constant', got 'steep'"),
        ({"coarse_loss": "tiles"}, r"coarse_loss: expected 'cells' or 'pixels', got 'tiles'"),
        (
            {"mode": "turns", "turned": None},
            r"turned: 'turns' mode needs the features of the turned tiles",
        ),
        (
            {"finetune_stages": 2},
            r"encoder: fine-tuning 2 encoder stages \(finetune_stages\) needs the encoder itself",
        ),
    ],
)
def test_bad_budget_and_tuning_options_are_refused(tiles, kwargs, match):
    images, masks, feats = tiles
    args = {
        "class_indices": (0, 1),
        "features": feats,
        "settings": TINY,
        "mode": "features",
    } | kwargs
    with pytest.raises(ValueError, match=match):
        fit(masks, **args)


def test_turned_features_must_match_the_tiles(turned_tiles):
    images, masks, turned = turned_tiles
    short = [dict(t) for t in turned]
    del short[1][5]
    with pytest.raises(
        ValueError, match=r"turned: tile 1 holds the turns \[0, 1\], tile 0 holds \[0, 1, 5\]"
    ):
        fit(masks, class_indices=(0, 1), turned=short, settings=TINY)
    no_zero = [{c: f for c, f in t.items() if c} for t in turned]
    with pytest.raises(
        ValueError, match=r"turned: tile 0 has no entry for code 0 \(the tile itself\)"
    ):
        fit(masks, class_indices=(0, 1), turned=no_zero, settings=TINY)
