import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.head import HeadConfig, ProposalHead, class_lut, features_to_tensors
from labeler.model.refine import pixel_input


def _features(n, size=64, seed=0):
    rng = np.random.default_rng(seed)
    return [
        tuple(
            rng.standard_normal((c, size // s, size // s)).astype(np.float16)
            for c, s in zip((24, 40, 112, 320), (4, 8, 16, 32), strict=True)
        )
        for _ in range(n)
    ]


def test_features_to_tensors_matches_a_plain_stack():
    feats = _features(3)
    levels = features_to_tensors(feats)
    for lvl in range(4):
        want = np.stack([f[lvl].astype(np.float32) for f in feats])  # reference
        assert levels[lvl].is_contiguous(memory_format=torch.channels_last)
        np.testing.assert_array_equal(levels[lvl].numpy(), want)


def test_features_to_tensors_rejects_mixed_sizes():
    feats = _features(1, size=64) + _features(1, size=32)
    with pytest.raises(
        ValueError,
        match=r"features: tile 1 level 0 has shape \(24, 8, 8\), tile 0 has \(24, 16, 16\)",
    ):
        features_to_tensors(feats)
    with pytest.raises(ValueError, match="features: expected at least one tile"):
        features_to_tensors([])
    with pytest.raises(ValueError, match="features: expected 4 levels per tile, got 2"):
        features_to_tensors([feats[0][:2]])


def test_head_outputs_logits_at_tile_size():
    torch.manual_seed(0)
    head = ProposalHead(HeadConfig(class_indices=(0, 1, 3), width=8)).eval()
    levels = features_to_tensors(_features(2))
    out = head(levels)
    assert tuple(out.shape) == (2, 3, 64, 64)
    assert tuple(head(levels, size=(62, 61)).shape) == (2, 3, 62, 61)
    z = head.trunk(levels)
    assert tuple(z.shape) == (2, 8, 16, 16) and bool((z >= 0).all())


def test_head_rejects_wrong_levels():
    head = ProposalHead(HeadConfig(width=8))
    levels = features_to_tensors(_features(1))
    with pytest.raises(ValueError, match="features: expected 4 levels, got 3"):
        head(levels[:3])
    with pytest.raises(ValueError, match=r"features: level 1 expected shape \(N, 40, h, w\)"):
        head([levels[0], levels[0], levels[2], levels[3]])


def test_dropout_is_active_only_in_training():
    torch.manual_seed(1)
    head = ProposalHead(HeadConfig(width=8, dropout=0.5))
    levels = features_to_tensors(_features(1))
    head.eval()
    with torch.no_grad():
        a, b = head(levels), head(levels)
    torch.testing.assert_close(a, b)
    head.train()
    with torch.no_grad():
        c, d = head(levels), head(levels)
    assert not torch.allclose(c, d)


def test_class_lut():
    lut = class_lut((0, 1, 3))
    assert lut[0] == 0 and lut[1] == 1 and lut[3] == 2 and lut[255] == 255
    assert lut[2] == -1 and (lut[4:255] == -1).all()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"class_indices": (0,)}, r"class_indices: expected at least 2 classes, got \(0,\)"),
        ({"class_indices": (1, 0)}, r"class_indices: expected distinct increasing"),
        (
            {"class_indices": (0, 255)},
            r"class_indices: expected distinct increasing indices in 0..254",
        ),
        ({"width": 0}, "width: expected at least 1 channel, got 0"),
        ({"dropout": 1.0}, r"dropout: expected a probability in \[0, 1\), got 1.0"),
    ],
)
def test_head_config_validation(kwargs, match):
    with pytest.raises(ValueError, match=match):
        HeadConfig(**kwargs)


def test_head_config_round_trips_through_a_dict():
    cfg = HeadConfig(class_indices=(0, 2, 3), width=16, dropout=0.1)
    assert HeadConfig.from_dict(cfg.as_dict()) == cfg


# -- refinement -------------------------------------------------------------------------------
def test_refining_head_gives_full_resolution_logits():
    torch.manual_seed(0)
    cfg = HeadConfig(class_indices=(0, 1, 3), width=8, refine_channels=4)
    assert cfg.refines and HeadConfig.from_dict(cfg.as_dict()) == cfg
    head = ProposalHead(cfg).eval()
    levels = features_to_tensors(_features(2))
    pixels = pixel_input(np.random.default_rng(0).integers(0, 256, (2, 62, 61, 3), np.uint8))
    with torch.no_grad():
        out = head(levels, pixels=pixels)
        z = head.trunk(levels)
        # untrained refiner (zero output layer): the dropout-free logits, bilinearly upsampled
        want = F.interpolate(head.classifier(z), size=(62, 61), mode="bilinear")
    assert tuple(out.shape) == (2, 3, 62, 61)
    torch.testing.assert_close(out, want, rtol=0, atol=1e-6)


def test_refinement_is_deterministic_in_training_mode():
    torch.manual_seed(1)
    head = ProposalHead(HeadConfig(width=8, dropout=0.5, refine_channels=4)).train()
    levels = features_to_tensors(_features(1))
    pixels = pixel_input(np.zeros((1, 64, 64, 3), np.uint8))
    with torch.no_grad():
        a, b = head(levels, pixels=pixels), head(levels, pixels=pixels)
    torch.testing.assert_close(a, b, rtol=0, atol=0)  # dropout is only in classify()


def test_refine_refuses_what_does_not_fit():
    plain = ProposalHead(HeadConfig(width=8))
    levels = features_to_tensors(_features(1))
    pixels = pixel_input(np.zeros((1, 64, 64, 3), np.uint8))
    with torch.no_grad():
        z = plain.trunk(levels)
        with pytest.raises(ValueError, match=r"pixels: this head has no refinement"):
            plain.refine(z, pixels)
        head = ProposalHead(HeadConfig(width=8, refine_channels=4))
        with pytest.raises(
            ValueError, match=r"rounded up\) is 16 x 16, got shape \(1, 4, 70, 64\)"
        ):
            head.refine(z, pixel_input(np.zeros((1, 70, 64, 3), np.uint8)))
    with pytest.raises(ValueError, match=r"refine_channels: expected 0 \(no refinement\)"):
        HeadConfig(refine_channels=-1)
