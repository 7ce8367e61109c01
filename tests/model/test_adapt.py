"""Self-supervised adaptation: the loss falls, checkpoints load, interrupt and resume."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from labeler.model.adapt import AdaptConfig, AdaptProgress, adapt_encoder
from labeler.model.adapt_checkpoint import load_adapt_checkpoint
from labeler.model.adapt_objective import draw_batch, feature_strides
from labeler.model.encoder import Lite0Encoder, load_encoder
from tests.model.conftest import disk_tiles


class TinyEncoder(nn.Module):
    """A small multi-scale conv net (strides 4, 8, 16, 32) with batch norms, for speed."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        chans = (3, 8, 12, 16, 24)
        self.stages = nn.ModuleList()
        for i in range(4):
            stride = 4 if i == 0 else 2
            self.stages.append(
                nn.Sequential(
                    nn.Conv2d(chans[i], chans[i + 1], 3, stride, 1, bias=False),
                    nn.BatchNorm2d(chans[i + 1]),
                    nn.ReLU(),
                )
            )
            # He initialisation keeps the activations' scale through the layers (the
            # default init shrinks them, and the pooled features would all be alike)
            nn.init.kaiming_normal_(self.stages[-1][0].weight, nonlinearity="relu")

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, ...]:
        x = (x - 127.0) / 128.0
        out = []
        for stage in self.stages:
            x = stage(x)
            out.append(x)
        return tuple(out)


def first_last(losses, k):
    return float(np.mean(losses[:k])), float(np.mean(losses[-k:]))


SMALL = AdaptConfig(
    batch_size=4, view_size=64, dense_strides=(8, 16), warmup_steps=5, projector_steps=0
)


@pytest.fixture(scope="module")
def tiles():
    return disk_tiles(6, size=64, seed=1)[0]


def test_feature_strides_of_the_lite0_encoder():
    strides, channels = feature_strides(Lite0Encoder(), size=64)
    # EfficientNet-Lite0 taps (Tan & Le 2019 stage table): strides 4..32, 24/40/112/320 ch
    assert strides == (4, 8, 16, 32)
    assert channels == (24, 40, 112, 320)


@pytest.mark.parametrize("method", ["dense", "image"])
def test_short_run_lowers_the_loss(method, tmp_path):
    tiles = disk_tiles(8, size=64, seed=1)[0]
    encoder = TinyEncoder().eval()
    bn = encoder.stages[1][1]
    stats_before = bn.running_mean.clone()
    weight_before = bn.weight.detach().clone()
    # a randomly initialised encoder learns at a larger rate than a pretrained one
    config = AdaptConfig(
        method=method,
        batch_size=6,
        view_size=64,
        dense_strides=(8, 16),
        warmup_steps=5,
        learning_rate=1e-3,
    )
    result = adapt_encoder(
        encoder,
        tiles,
        config=config,
        seconds=300,
        max_steps=80,
        seed=3,
        threads=1,
        checkpoint=tmp_path / "adapt.pt",
    )
    assert result.steps == 80 and result.stopped == "steps" and len(result.losses) == 80
    first, last = first_last(result.losses, 10)
    # seeded run (about 11 % lower when written); margin: at least 5 % below
    assert last < 0.95 * first, (first, last)
    # batch-norm statistics kept, batch-norm affine trained
    torch.testing.assert_close(bn.running_mean, stats_before)
    assert not torch.equal(bn.weight.detach(), weight_before)
    # modes restored (eval, as before) and the returned state is the module's
    assert not encoder.training
    for k, v in encoder.state_dict().items():
        torch.testing.assert_close(result.encoder_state[k], v)
    ckpt = load_adapt_checkpoint(tmp_path / "adapt.pt")
    assert ckpt.step == 80 and ckpt.losses == result.losses
    fresh = TinyEncoder()
    fresh.load_state_dict(ckpt.encoder_state, strict=True)


def test_lite0_state_loads_into_a_new_encoder(tiles, tmp_path):
    encoder = load_encoder(fold=False, channels_last=False)
    stem = encoder.stem.conv.weight.detach().clone()
    early = encoder.blocks[2].project.conv.weight.detach().clone()
    late = encoder.blocks[10].project.conv.weight.detach().clone()
    stats = encoder.blocks[5].depthwise.bn.running_var.clone()
    result = adapt_encoder(
        encoder,
        tiles,
        config=SMALL,
        seconds=300,
        max_steps=2,
        threads=1,
        checkpoint=tmp_path / "lite0.pt",
    )
    assert result.steps == 2 and all(np.isfinite(result.losses))
    assert encoder.frozen and not encoder.training  # handed back frozen, as it came
    assert not any(p.requires_grad for p in encoder.parameters())
    torch.testing.assert_close(encoder.blocks[5].depthwise.bn.running_var, stats, rtol=0, atol=0)
    again = Lite0Encoder()
    again.load_state_dict(load_adapt_checkpoint(tmp_path / "lite0.pt").encoder_state, strict=True)
    # the stem and the stride-4 blocks stay as pretrained (frozen_prefixes), later ones learn
    assert torch.equal(again.stem.conv.weight, stem)
    assert torch.equal(again.blocks[2].project.conv.weight, early)
    assert not torch.equal(again.blocks[10].project.conv.weight, late)
    key = "blocks.10.project.conv.weight"
    torch.testing.assert_close(again.blocks[10].project.conv.weight, result.encoder_state[key])


def test_checkpoint_is_plain_data(tiles, tmp_path):
    path = tmp_path / "plain.pt"
    adapt_encoder(TinyEncoder(), tiles, config=SMALL, max_steps=1, checkpoint=path, threads=1)
    obj = torch.load(path, weights_only=True)  # refuses any pickled object
    assert obj["format"] == "labeler-adapt" and obj["step"] == 1


def test_interrupt_then_resume_continues_from_the_checkpoint(tiles, tmp_path):
    whole = adapt_encoder(TinyEncoder(), tiles, config=SMALL, max_steps=12, seed=5, threads=1)

    path = tmp_path / "run.pt"

    def stop_at_5(p: AdaptProgress) -> None:
        if p.step == 5:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        adapt_encoder(
            TinyEncoder(),
            tiles,
            config=SMALL,
            max_steps=12,
            seed=5,
            threads=1,
            checkpoint=path,
            checkpoint_every=3600,
            progress=stop_at_5,
        )
    assert load_adapt_checkpoint(path).step == 5  # written by the interrupt, not the timer

    seen: list[int] = []
    resumed = adapt_encoder(
        TinyEncoder(),
        tiles,
        config=SMALL,
        max_steps=12,
        seed=5,
        threads=1,
        checkpoint=path,
        progress=lambda p: seen.append(p.step),
    )
    assert resumed.resumed_from == 5 and seen[0] == 6 and resumed.steps == 12
    # the resumed run makes the very steps the uninterrupted run made
    np.testing.assert_allclose(resumed.losses, whole.losses, rtol=1e-5)
    for k, v in whole.encoder_state.items():
        torch.testing.assert_close(resumed.encoder_state[k], v, rtol=1e-5, atol=1e-6)


def test_periodic_checkpoint_follows_the_steps(tiles, tmp_path):
    path = tmp_path / "every.pt"
    steps_on_disk: list[int] = []

    def look(p: AdaptProgress) -> None:
        steps_on_disk.append(load_adapt_checkpoint(path).step)

    adapt_encoder(
        TinyEncoder(),
        tiles,
        config=SMALL,
        max_steps=3,
        checkpoint=path,
        checkpoint_every=0,
        progress=look,
        threads=1,
    )
    assert steps_on_disk == [1, 2, 3]


def test_time_budget_ends_the_run(tiles):
    reports: list[AdaptProgress] = []
    result = adapt_encoder(
        TinyEncoder(), tiles, config=SMALL, seconds=1.5, progress=reports.append, threads=1
    )
    assert result.stopped == "time" and result.steps >= 1
    assert result.seconds <= 1.5 + 1.0  # at most one step past a predicted stop, with slack
    assert reports[-1].remaining <= reports[0].remaining


def test_revisit_pairs_fill_part_of_the_batch(tiles):
    # the same ground on a second date: brighter, as under another sun
    later = [np.clip(t.astype(int) + 25, 0, 255).astype(np.uint8) for t in tiles[:3]]
    pairs = list(zip(tiles[:3], later, strict=True))
    result = adapt_encoder(
        TinyEncoder(),
        tiles,
        revisits=pairs,
        config=AdaptConfig(batch_size=4, view_size=64, dense_strides=(8,), revisit_share=0.5),
        max_steps=3,
        threads=1,
    )
    assert result.steps == 3 and all(np.isfinite(result.losses))
    only_pairs = adapt_encoder(
        TinyEncoder(), [], revisits=pairs, config=SMALL, max_steps=2, threads=1
    )
    assert only_pairs.steps == 2


def test_resume_refuses_other_settings(tiles, tmp_path):
    path = tmp_path / "a.pt"
    adapt_encoder(TinyEncoder(), tiles, config=SMALL, max_steps=1, checkpoint=path, threads=1)
    other = AdaptConfig(batch_size=4, view_size=64, dense_strides=(8,), warmup_steps=5)
    with pytest.raises(
        ValueError, match=r"a.pt: the checkpoint was made with other settings \(dense_strides"
    ):
        adapt_encoder(TinyEncoder(), tiles, config=other, max_steps=2, checkpoint=path)


def test_resume_refuses_another_encoder(tiles, tmp_path):
    path = tmp_path / "tiny.pt"
    adapt_encoder(TinyEncoder(), tiles, config=SMALL, max_steps=1, checkpoint=path, threads=1)
    wider = TinyEncoder()
    wider.stages[0][0] = nn.Conv2d(3, 8, 5, 4, 2, bias=False)  # same shapes out, other kernel
    with pytest.raises(ValueError, match="tiny.pt: the checkpoint does not fit this encoder"):
        adapt_encoder(wider, tiles, config=SMALL, max_steps=2, checkpoint=path, threads=1)


def test_errors(tiles, tmp_path):
    enc = TinyEncoder()
    with pytest.raises(ValueError, match="tiles: expected at least 2 tiles or revisit pairs"):
        adapt_encoder(enc, tiles[:1])
    with pytest.raises(ValueError, match=r"revisits\[0\]: expected two arrays of one shape"):
        adapt_encoder(enc, tiles, revisits=[(tiles[0], tiles[0][:32])])
    with pytest.raises(ValueError, match="seconds: expected a positive time budget"):
        adapt_encoder(enc, tiles, seconds=0)
    with pytest.raises(ValueError, match="dense_strides: the encoder gives strides"):
        adapt_encoder(enc, tiles, config=AdaptConfig(view_size=64, dense_strides=(2,)))
    with pytest.raises(ValueError, match="encoder: expected float32 parameters"):
        adapt_encoder(TinyEncoder().to(torch.bfloat16), tiles, config=SMALL)
    with pytest.raises(ValueError, match="method: expected one of"):
        AdaptConfig(method="colour")
    with pytest.raises(ValueError, match="batch_size: expected at least 2"):
        AdaptConfig(batch_size=1)
    with pytest.raises(ValueError, match="view_size: expected a positive multiple of 32"):
        AdaptConfig(view_size=100)
    with pytest.raises(ValueError, match="alpha: expected a weight"):
        AdaptConfig(alpha=2.0)
    with pytest.raises(ValueError, match="revisit_share: expected a share"):
        AdaptConfig(revisit_share=-0.1)
    with pytest.raises(ValueError, match="projector_steps: expected 0 or more"):
        AdaptConfig(projector_steps=-1)
    bad = tmp_path / "bad.pt"
    bad.write_bytes(b"not a checkpoint")
    with pytest.raises(ValueError, match="bad.pt: refused, not a plain-data adaptation checkpoint"):
        adapt_encoder(enc, tiles, config=SMALL, checkpoint=bad)


def test_draw_batch_mixes_tiles_and_revisits():
    rng = np.random.default_rng(0)
    config = AdaptConfig(batch_size=8, revisit_share=0.25)
    items = draw_batch(10, 5, config, rng=rng)
    assert sorted(k for k, _ in items) == ["pair"] * 2 + ["tile"] * 6
    assert len(set(items)) == 8  # no item twice
    assert [k for k, _ in draw_batch(10, 0, config, rng=rng)] == ["tile"] * 8
    # too few tiles: revisit pairs fill the batch
    assert sorted(k for k, _ in draw_batch(1, 9, config, rng=rng)) == ["pair"] * 7 + ["tile"]
    assert len(draw_batch(2, 1, config, rng=rng)) == 3


def test_projectors_learn_alone_first_then_the_encoder_warms_up(tiles):
    from labeler.model.adapt import _warm

    # the linear warm-up factor, by hand: nothing before its start, then 1/3, 2/3, 1
    assert [_warm(k, 3) for k in (-2, -1, 0, 1, 2, 3)] == [0.0, 0.0, 1 / 3, 2 / 3, 1.0, 1.0]
    assert _warm(0, 0) == 1.0
    encoder = TinyEncoder()
    before = {k: v.clone() for k, v in encoder.state_dict().items()}
    config = AdaptConfig(
        batch_size=4, view_size=64, dense_strides=(8, 16), warmup_steps=2, projector_steps=3
    )
    held = adapt_encoder(encoder, tiles, config=config, seconds=300, max_steps=3, seed=0)
    assert held.steps == 3
    for k, v in held.encoder_state.items():  # three steps of the projectors alone
        assert torch.equal(v, before[k]), k
    moved = adapt_encoder(TinyEncoder(), tiles, config=config, seconds=300, max_steps=4, seed=0)
    assert not torch.equal(
        moved.encoder_state["stages.1.0.weight"], before["stages.1.0.weight"]
    )  # the fourth step trains the encoder
