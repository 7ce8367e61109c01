"""EfficientNet-Lite0 encoder: the packaged ImageNet-1k weights must classify real photos."""

import numpy as np
import pytest
import skimage.data
import skimage.transform
import torch
from torch import nn

from labeler.model.encoder import (
    BN_EPS,
    FEATURE_CHANNELS,
    ConvBN,
    Lite0Encoder,
    _fold_one,
    _same_padding,
    encode_tiles,
    encoder_version,
    feature_shapes,
    fold_batchnorm,
    load_encoder,
    precision_of,
    resolve_precision,
    to_input,
    with_precision,
)

# ImageNet-1k class indices, published with the dataset (ILSVRC 2012 synset order):
# 281 tabby, 282 tiger cat, 283 Persian, 284 Siamese, 285 Egyptian cat; 504 coffee mug,
# 967 espresso.
CAT_CLASSES = range(281, 286)
COFFEE_CLASSES = (504, 967)


def _imagenet_view(image: np.ndarray) -> np.ndarray:
    """Shorter side to 256 (bilinear, anti-aliased, skimage.transform.resize), centre crop 224.

    Resize-256 / centre-crop-224 is the usual ImageNet evaluation view (common practice,
    no source).
    """
    h, w = image.shape[:2]
    s = 256 / min(h, w)
    r = skimage.transform.resize(
        image, (round(h * s), round(w * s)), order=1, anti_aliasing=True, preserve_range=True
    )
    top, left = (r.shape[0] - 224) // 2, (r.shape[1] - 224) // 2
    return np.clip(np.round(r[top : top + 224, left : left + 224]), 0, 255).astype(np.uint8)


@pytest.fixture(scope="module")
def photos():
    # skimage.data.chelsea (a cat) and skimage.data.coffee (a cup of coffee), scikit-image
    return np.stack([_imagenet_view(skimage.data.chelsea()), _imagenet_view(skimage.data.coffee())])


def test_chelsea_is_a_cat_and_coffee_is_coffee(encoder, photos):
    probs = encoder.classify(photos).softmax(dim=1).numpy()
    top = probs.argmax(axis=1)
    assert top[0] in CAT_CLASSES
    assert top[1] in COFFEE_CLASSES
    # clear margins: most of the mass on the right group, far ahead of anything else
    cat_mass = probs[0, list(CAT_CLASSES)].sum()
    assert cat_mass > 0.6
    assert probs[1, 967] > 0.6
    others = np.delete(probs[0], list(CAT_CLASSES))
    assert cat_mass > 10 * others.max()


def test_unfolded_nchw_encoder_classifies_the_same(photos):
    plain = load_encoder(fold=False, channels_last=False)
    top = plain.classify(photos).argmax(dim=1).numpy()
    assert top[0] in CAT_CLASSES and top[1] in COFFEE_CLASSES


def test_parameter_count_is_lite0():
    # EfficientNet-Lite0: 4.7M parameters (TensorFlow TPU repository, lite README)
    n = sum(p.numel() for p in Lite0Encoder().parameters())
    assert abs(n / 1e6 - 4.7) < 0.06


def test_batch_norm_uses_tensorflow_epsilon():
    # TF EfficientNet trains with batch_norm_epsilon 1e-3 (value from memory)
    bns = [m for m in Lite0Encoder().modules() if isinstance(m, nn.BatchNorm2d)]
    assert len(bns) == 49  # stem + 16 blocks (15 with expansion: 3 each, 1 without: 2) + head
    assert all(m.eps == BN_EPS == 1e-3 for m in bns)


@pytest.mark.parametrize("size", [(64, 64), (100, 72), (33, 31)])
def test_features_have_the_documented_strides_and_channels(encoder, size):
    rng = np.random.default_rng(1)
    image = rng.integers(0, 256, (*size, 3), dtype=np.uint8)
    feats = encoder.forward_features(image)
    assert [f.shape[1] for f in feats] == list(FEATURE_CHANNELS) == [24, 40, 112, 320]
    want = feature_shapes(*size)
    assert [tuple(f.shape[1:]) for f in feats] == [tuple(w) for w in want]
    h, w = size
    assert want[0][1:] == (-(-h // 4), -(-w // 4))
    assert want[3][1:] == (-(-h // 32), -(-w // 32))


def test_same_padding_puts_the_extra_pixel_after():
    # TensorFlow "SAME": out = ceil(in / stride), total pad = max((out-1)*s + k - in, 0),
    # the smaller half before (TensorFlow convolution docs; value from memory)
    assert _same_padding(8, 3, 2) == (0, 1)
    assert _same_padding(9, 3, 2) == (1, 1)
    assert _same_padding(8, 5, 2) == (1, 2)
    unit = ConvBN(1, 1, 3, 2, act=False)
    with torch.no_grad():
        unit.conv.weight.zero_()
        unit.conv.weight[0, 0, 1, 1] = 1.0  # pick the centre pixel
    unit.bn = nn.Identity()
    x = torch.arange(64, dtype=torch.float32).reshape(1, 1, 8, 8)
    y = unit(x)[0, 0]
    # with the extra pixel after, output (i, j) is centred on input (2i + 1, 2j + 1)
    np.testing.assert_array_equal(y.detach().numpy(), x[0, 0, 1::2, 1::2].numpy())


def test_fold_one_matches_a_channel_loop():
    rng = np.random.default_rng(2)
    unit = ConvBN(3, 5, 3, 1)
    with torch.no_grad():
        unit.conv.weight.copy_(torch.from_numpy(rng.normal(size=(5, 3, 3, 3)).astype(np.float32)))
        unit.bn.weight.copy_(torch.from_numpy(rng.uniform(0.5, 2, 5).astype(np.float32)))
        unit.bn.bias.copy_(torch.from_numpy(rng.normal(size=5).astype(np.float32)))
        unit.bn.running_mean.copy_(torch.from_numpy(rng.normal(size=5).astype(np.float32)))
        unit.bn.running_var.copy_(torch.from_numpy(rng.uniform(0.1, 3, 5).astype(np.float32)))
    w = unit.conv.weight.detach().numpy().astype(np.float64)
    g = unit.bn.weight.detach().numpy().astype(np.float64)
    b = unit.bn.bias.detach().numpy().astype(np.float64)
    mu, var = (
        unit.bn.running_mean.numpy().astype(np.float64),
        unit.bn.running_var.numpy().astype(np.float64),
    )
    want_w = np.empty_like(w)
    want_b = np.empty(5)
    for o in range(5):  # slow reference, one output channel at a time
        s = g[o] / np.sqrt(var[o] + BN_EPS)
        want_w[o] = w[o] * s
        want_b[o] = b[o] - mu[o] * s
    x = torch.from_numpy(rng.normal(size=(2, 3, 9, 9)).astype(np.float32))
    unit.eval()
    with torch.no_grad():
        before = unit(x)
        _fold_one(unit)
        after = unit(x)
    assert isinstance(unit.bn, nn.Identity)
    np.testing.assert_allclose(unit.conv.weight.detach().numpy(), want_w, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(unit.conv.bias.detach().numpy(), want_b, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(after.numpy(), before.numpy(), rtol=1e-4, atol=1e-5)


def test_folded_encoder_agrees_with_unfolded():
    plain = load_encoder(fold=False, channels_last=False)
    folded = fold_batchnorm(plain)
    assert not any(isinstance(m, nn.BatchNorm2d) for m in folded.modules())
    image = np.random.default_rng(3).integers(0, 256, (2, 64, 64, 3), dtype=np.uint8)
    for a, b in zip(plain.forward_features(image), folded.forward_features(image), strict=True):
        scale = float(a.abs().max())
        # stated tolerance: 1e-4 of the level's largest magnitude (float32 rounding)
        np.testing.assert_allclose(b.numpy(), a.numpy(), rtol=0, atol=1e-4 * scale)


def test_channels_last_agrees_with_nchw(encoder):
    plain = load_encoder(fold=True, channels_last=False)
    image = np.random.default_rng(4).integers(0, 256, (1, 64, 64, 3), dtype=np.uint8)
    for a, b in zip(plain.forward_features(image), encoder.forward_features(image), strict=True):
        np.testing.assert_allclose(b.numpy(), a.numpy(), rtol=0, atol=1e-4 * float(a.abs().max()))


def test_encoder_is_frozen(encoder):
    assert not encoder.training
    encoder.train()
    assert not encoder.training
    assert not any(p.requires_grad for p in encoder.parameters())
    assert encoder.version.startswith("lite0-") and encoder.version.endswith("-r1")


def test_numpy_and_tensor_inputs_agree(encoder):
    image = np.random.default_rng(5).integers(0, 256, (32, 32, 3), dtype=np.uint8)
    a = encoder.forward_features(image)
    b = encoder.forward_features(torch.from_numpy(image).permute(2, 0, 1).float())
    for x, y in zip(a, b, strict=True):
        torch.testing.assert_close(x, y)


def test_encode_tiles_batches_and_reports(encoder):
    rng = np.random.default_rng(6)
    tiles = [rng.integers(0, 256, (32, 32, 3), dtype=np.uint8) for _ in range(3)]
    tiles.append(rng.integers(0, 256, (64, 32, 3), dtype=np.uint8))
    seen = []
    out = encode_tiles(encoder, tiles, batch_size=2, progress=lambda d, t: seen.append((d, t)))
    assert seen[-1] == (4, 4) and len(seen) == 3  # batches [0,1], [2], [3]
    assert [a.dtype for a in out[0]] == [np.float16] * 4
    assert tuple(out[3][0].shape) == (24, 16, 8)
    single = encoder.forward_features(tiles[2])[1][0].numpy()
    np.testing.assert_allclose(out[2][1].astype(np.float32), single, rtol=2e-3, atol=2e-3)


@pytest.mark.parametrize(
    ("bad", "match"),
    [
        (np.zeros((8, 8), np.uint8), r"images: expected uint8 RGB of shape \(N, H, W, 3\)"),
        (np.zeros((8, 8, 4), np.uint8), r"got uint8 \(8, 8, 4\)"),
        (np.zeros((8, 8, 3), np.float32), r"got float32 \(8, 8, 3\)"),
        (torch.zeros(1, 4, 8, 8), r"images: expected a tensor of shape \(N, 3, H, W\)"),
        ([1, 2, 3], r"images: expected a numpy array or a torch tensor, got list"),
    ],
)
def test_to_input_rejects_bad_images(bad, match):
    with pytest.raises(ValueError, match=match):
        to_input(bad)


def test_encode_tiles_rejects_zero_batch(encoder):
    with pytest.raises(ValueError, match="batch_size: expected at least 1, got 0"):
        encode_tiles(encoder, [], batch_size=0)


def test_bfloat16_encoder_still_classifies(photos):
    fast = load_encoder(precision="bfloat16")
    # precision is a way of running the same weights: the version (cache key) is the same
    assert fast.version == load_encoder().version == encoder_version()
    assert precision_of(fast) == "bfloat16"
    probs = fast.classify(photos).softmax(dim=1).numpy()
    assert probs[0].argmax() in CAT_CLASSES and probs[0, list(CAT_CLASSES)].sum() > 0.6
    assert probs[1].argmax() in COFFEE_CLASSES and probs[1, 967] > 0.6
    feats = encode_tiles(fast, [photos[0]])
    assert all(f.dtype == np.float16 for f in feats[0])


def test_unknown_precision_is_refused():
    with pytest.raises(ValueError, match="precision: expected 'float32' or 'bfloat16', got 'int4'"):
        load_encoder(precision="int4")


@pytest.mark.parametrize(
    ("setting", "flags", "want"),
    [
        ("auto", {"avx512f", "avx512_bf16"}, "bfloat16"),
        ("auto", {"amx_bf16", "amx_tile"}, "bfloat16"),
        ("auto", {"avx512f", "avx2"}, "float32"),  # emulated bfloat16 is slower
        ("auto", set(), "float32"),
        ("float32", {"avx512_bf16"}, "float32"),
        ("bfloat16", set(), "bfloat16"),
    ],
)
def test_resolve_precision_follows_the_setting_and_the_cpu(setting, flags, want):
    # the CPU flag names are the Linux kernel's (arch/x86/include/asm/cpufeatures.h)
    assert resolve_precision(setting, flags=flags) == want


def test_resolve_precision_refuses_other_settings():
    with pytest.raises(ValueError, match="precision: expected 'auto', 'float32' or 'bfloat16'"):
        resolve_precision("float16", flags=set())


def test_with_precision_converts_in_place_and_back(encoder):
    model = fold_batchnorm(encoder)
    tile = np.random.default_rng(3).integers(0, 256, (64, 64, 3), dtype=np.uint8)
    want = encode_tiles(model, [tile])[0]
    assert with_precision(model, "bfloat16") is model and precision_of(model) == "bfloat16"
    low = encode_tiles(model, [tile])[0]
    with_precision(model, "float32")
    again = encode_tiles(model, [tile])[0]
    for a, b, c in zip(want, low, again, strict=True):
        # back in float32 the weights are the bfloat16-rounded ones: close, not equal
        rel = np.linalg.norm(a.astype(np.float32) - b) / np.linalg.norm(a.astype(np.float32))
        assert rel < 0.2  # bfloat16 keeps 8 bits of mantissa; common practice, no source
        assert c.dtype == np.float16 and c.shape == a.shape


def test_with_precision_refuses_a_training_encoder(encoder):
    model = fold_batchnorm(encoder).unfreeze()
    with pytest.raises(ValueError, match="encoder: expected a frozen inference encoder"):
        with_precision(model, "bfloat16")
    with pytest.raises(ValueError, match="precision: expected 'float32' or 'bfloat16'"):
        with_precision(model, "int8")


def test_stages_overlap_only_on_a_spare_core():
    from labeler.model.encoder import stages_can_overlap
    from labeler.model.runtime import available_cores

    before = torch.get_num_threads()
    try:
        torch.set_num_threads(available_cores())
        assert not stages_can_overlap()
        if available_cores() >= 2:
            torch.set_num_threads(1)
            assert stages_can_overlap()
    finally:
        torch.set_num_threads(before)
