"""Fine-tuned encoder stages: exact on cached levels, a version of their own, safe round trip."""

import numpy as np
import pytest
import torch

from labeler.model.checkpoint import load_checkpoint, save_checkpoint
from labeler.model.encoder import Lite0Encoder, encode_tiles, to_input
from labeler.model.head import HeadConfig, ProposalHead, features_to_tensors
from labeler.model.tail import TAIL_STAGES, EncoderTail, tail_features, tail_from_state
from tests.model.conftest import disk_tiles


@pytest.fixture(scope="module")
def tiles():
    images, _ = disk_tiles(3, size=64, seed=2)
    return images


@pytest.mark.parametrize("stages", sorted(TAIL_STAGES))
def test_untrained_tail_recomputes_the_encoders_own_levels(encoder, tiles, stages):
    tail = EncoderTail(encoder, stages=stages).eval()
    with torch.no_grad():
        levels = encoder(to_input(np.stack(tiles)))  # float32, straight from the encoder
        out = tail(list(levels))
    first, level = TAIL_STAGES[stages]
    assert tail.input_level == level and tail.first_block == first
    for i, (a, b) in enumerate(zip(out, levels, strict=True)):
        if i <= level:
            assert a is levels[i]  # passed through untouched
        else:  # recomputed by the copied blocks: the encoder's output to float rounding
            torch.testing.assert_close(a, b.float(), rtol=1e-4, atol=1e-4)
    assert tail.version.startswith(f"{encoder.version}-tail{stages}-")


def test_training_the_tail_leaves_the_encoder_alone(encoder):
    before = [p.detach().clone() for p in encoder.blocks[-1].parameters()]
    tail = EncoderTail(encoder, stages=2)
    assert all(p.requires_grad for p in tail.parameters())
    with torch.no_grad():
        for p in tail.parameters():
            p.add_(1.0)
    for a, b in zip(before, encoder.blocks[-1].parameters(), strict=True):
        assert torch.equal(a, b) and not b.requires_grad


def test_version_follows_the_weights(encoder):
    a, b = EncoderTail(encoder, stages=2), EncoderTail(encoder, stages=2)
    assert a.version == b.version  # same weights, same version
    with torch.no_grad():
        next(b.parameters())[0].flatten()[0] += 1e-3
    assert a.version != b.version
    assert EncoderTail(encoder, stages=4).version != a.version
    assert len(a.version) <= 128  # it may name a cache folder


def test_tail_round_trips_through_a_checkpoint(tmp_path, encoder, tiles):
    torch.manual_seed(0)
    tail = EncoderTail(encoder, stages=2)
    with torch.no_grad():
        for p in tail.parameters():
            p.mul_(1.01)
    head = ProposalHead(HeadConfig(class_indices=(0, 1), width=8)).eval()
    path = save_checkpoint(
        tmp_path / "head.pt",
        head,
        encoder_version=tail.version,
        val_iou=[0.5, 0.5],
        encoder_tail=tail.state(),
    )
    # weights_only=True: plain tensors and containers only (no pickled objects)
    raw = torch.load(path, map_location="cpu", weights_only=True)
    assert raw["encoder_tail"]["stages"] == 2
    _, meta = load_checkpoint(path)
    again = tail_from_state(encoder, meta.encoder_tail)
    assert again.version == tail.version == meta.encoder_version
    feats = encode_tiles(encoder, tiles)
    want = tail_features(tail, feats)
    got = tail_features(again, feats)
    for a, b in zip(want, got, strict=True):
        for x, y in zip(a, b, strict=True):
            np.testing.assert_array_equal(x, y)
    # levels up to the input stay the cached float16 arrays; the later ones are new
    assert got[0][2] is feats[0][2] and got[0][3].dtype == np.float32
    assert not np.allclose(got[0][3], feats[0][3].astype(np.float32), atol=1e-3)


def test_tail_features_batch_like_single_tiles(encoder, tiles):
    tail = EncoderTail(encoder, stages=4)
    feats = encode_tiles(encoder, tiles)
    together = tail_features(tail, feats, batch_size=8)
    alone = [tail_features(tail, [f])[0] for f in feats]
    for a, b in zip(together, alone, strict=True):
        for x, y in zip(a, b, strict=True):  # float32 sums in another order: 1e-6 relative
            np.testing.assert_allclose(x, y, rtol=1e-5, atol=1e-4)
    levels = features_to_tensors(feats)
    assert [tuple(t.shape[1:]) for t in levels] == [x.shape for x in together[0]]


def test_a_head_with_no_checkpoint_tail_reads_none(tmp_path):
    head = ProposalHead(HeadConfig(class_indices=(0, 1), width=8))
    path = save_checkpoint(tmp_path / "h.pt", head, encoder_version="lite0-x-r1", val_iou=[1, 1])
    assert load_checkpoint(path)[1].encoder_tail is None


@pytest.mark.parametrize(
    ("make", "match"),
    [
        (
            lambda enc: EncoderTail(enc, stages=3),
            r"stages: expected one of \[2, 4\] encoder stages",
        ),
        (
            lambda enc: EncoderTail(Lite0Encoder(), stages=2),
            r"encoder: expected an encoder with a version",
        ),
        (
            lambda enc: tail_from_state(
                enc, {**EncoderTail(enc, stages=2).state(), "base_version": "lite0-other-r1"}
            ),
            r"encoder tail: trained on encoder lite0-other-r1, the installed encoder is lite0-",
        ),
        (
            lambda enc: tail_from_state(enc, {"stages": 2}),
            r"encoder tail: damaged state \(KeyError",
        ),
        (
            lambda enc: tail_from_state(enc, {**EncoderTail(enc, stages=2).state(), "stages": 4}),
            r"encoder tail: weights do not fit",
        ),
    ],
)
def test_bad_tails_are_refused(encoder, make, match):
    with pytest.raises(ValueError, match=match):
        make(encoder)
