"""What one adaptation step optimises: projection heads, view batches, the loss per method.

Used by :func:`labeler.model.adapt.adapt_encoder`; see there for the methods.

``"image"``
    NT-Xent (SimCLR; :mod:`labeler.model.contrastive`) on the pooled deepest features
    through a two-layer projector.
``"dense"``
    As VICRegL (:mod:`labeler.model.dense`): ``alpha`` times VICReg on the pooled
    projections plus ``1 - alpha`` times the mean over ``dense_strides`` of VICReg on the
    feature cells that see the same ground in the two views, each stride through its own
    1 x 1 convolution projector. The VICRegL paper weighs its global and local terms the
    same way and reports that a smaller ``alpha`` favours dense tasks over classification
    (from memory); ``alpha = 0.5`` here is not tuned.

The projectors have no batch normalisation (small CPU batches) and are discarded after
the run.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
import torch
from torch import nn

from labeler.masks.vegetation import vegetation_mask
from labeler.model.contrastive import nt_xent_loss
from labeler.model.dense import dense_vicreg_loss, vicreg_loss
from labeler.model.views import ColourJitter, field_views

if TYPE_CHECKING:  # the settings live with the loop that takes them
    from labeler.model.adapt import AdaptConfig

__all__ = ["ProjectionHeads", "AdaptObjective", "feature_strides", "draw_batch", "view_batch"]


class ProjectionHeads(nn.Module):
    """Projectors used only during adaptation (discarded afterwards).

    ``image``: pooled deepest features -> Linear -> ReLU -> Linear (SimCLR's projector,
    without batch norm). ``dense[str(s)]``: 1 x 1 convolution -> ReLU -> 1 x 1
    convolution on the stride-``s`` features.

    Parameters
    ----------
    channels, strides : sequence of int
        Of the encoder's feature maps (:func:`feature_strides`).
    dense_strides : sequence of int
        Strides that get a dense projector (none for the method "image").
    dim : int
        Output width of every projector.
    """

    def __init__(
        self,
        channels: Sequence[int],
        strides: Sequence[int],
        *,
        dense_strides: Sequence[int],
        dim: int,
    ) -> None:
        super().__init__()
        hidden = max(2 * dim, 256)
        self.image = nn.Sequential(
            nn.Linear(channels[-1], hidden), nn.ReLU(inplace=True), nn.Linear(hidden, dim)
        )
        self.dense = nn.ModuleDict()
        for s in dense_strides:
            c = channels[list(strides).index(s)]
            self.dense[str(s)] = nn.Sequential(
                nn.Conv2d(c, hidden, 1), nn.ReLU(inplace=True), nn.Conv2d(hidden, dim, 1)
            )


def feature_strides(
    encoder: nn.Module, *, size: int = 64
) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Strides and channels of an encoder's feature maps, from one pass on a blank image.

    Returns
    -------
    strides, channels : tuple of int
    """
    was_training = encoder.training
    encoder.eval()
    with torch.no_grad():
        maps = encoder(torch.zeros(1, 3, size, size))
    encoder.train(was_training)
    return tuple(size // m.shape[-1] for m in maps), tuple(m.shape[1] for m in maps)


def draw_batch(
    n_tiles: int, n_pairs: int, config: AdaptConfig, *, rng: np.random.Generator
) -> list[tuple[str, int]]:
    """Which tiles and revisit pairs make the next batch.

    Returns
    -------
    items : list of (kind, index)
        ``("tile", i)`` or ``("pair", i)``; ``revisit_share`` of the batch from pairs
        (all of it when there are no tiles), no item twice.
    """
    want = config.batch_size
    from_pairs = min(n_pairs, round(want * config.revisit_share))
    from_tiles = min(n_tiles, want - from_pairs)
    if from_tiles + from_pairs < want:  # too few tiles: fill up with revisit pairs
        from_pairs = min(n_pairs, want - from_tiles)
    items = [("tile", int(i)) for i in rng.choice(n_tiles, size=from_tiles, replace=False)]
    if from_pairs:
        items += [("pair", int(i)) for i in rng.choice(n_pairs, size=from_pairs, replace=False)]
    return items


class AdaptObjective:
    """The loss of one batch of view pairs for the configured method.

    Parameters
    ----------
    encoder : nn.Module
        Float ``(N, 3, H, W)`` in 0..255 -> feature maps at ``strides``.
    heads : ProjectionHeads
    strides : tuple of int
        Strides of the encoder's maps (:func:`feature_strides`).
    config : AdaptConfig

    Calling it with views A and B ``(N, 3, S, S)`` and the matched cells per dense
    stride (``(M, 3)`` int64, see :func:`labeler.model.dense.gather_matched`) returns
    the scalar loss; with ``encoder_grad=False`` the encoder runs without gradients
    (only the projectors learn from the loss).
    """

    def __init__(self, encoder, heads: ProjectionHeads, strides, config: AdaptConfig):
        self.encoder, self.heads, self.strides, self.config = encoder, heads, strides, config

    def __call__(
        self,
        views_a,
        views_b,
        pairs_by_stride: dict[int, torch.Tensor],
        *,
        encoder_grad: bool = True,
    ) -> torch.Tensor:
        n = views_a.shape[0]
        with torch.set_grad_enabled(encoder_grad and torch.is_grad_enabled()):
            maps = self.encoder(torch.cat([views_a, views_b]))
        pooled = self.heads.image(maps[-1].float().mean(dim=(2, 3)))
        za, zb = pooled[:n], pooled[n:]
        cfg = self.config
        if cfg.method == "image":
            return nt_xent_loss(za, zb, temperature=cfg.temperature)
        local = []
        for s in cfg.dense_strides:
            pairs = pairs_by_stride[s]
            if pairs.shape[0] < 2:
                continue
            proj = self.heads.dense[str(s)](maps[self.strides.index(s)].float())
            local.append(dense_vicreg_loss(proj[:n], proj[n:], pairs))
        image_term = vicreg_loss(za, zb)
        if not local:
            return image_term
        return cfg.alpha * image_term + (1 - cfg.alpha) * torch.stack(local).mean()


def view_batch(
    items: Sequence[tuple[str, int]],
    tiles: Sequence[np.ndarray],
    revisits: Sequence[tuple[np.ndarray, np.ndarray]],
    *,
    plants: dict,
    config: AdaptConfig,
    size: int,
    rng: np.random.Generator,
) -> tuple[torch.Tensor, torch.Tensor, dict[int, torch.Tensor]]:
    """Two views of each item as float batches, and the matched cells per dense stride.

    Parameters
    ----------
    items : sequence of (kind, index)
        From :func:`draw_batch`.
    tiles, revisits
        As given to :func:`labeler.model.adapt.adapt_encoder`.
    plants : dict
        Cache of vegetation masks per item, filled on first use.
    config : AdaptConfig
    size : int
        View side in pixels.
    rng : numpy.random.Generator

    Returns
    -------
    views_a, views_b : Tensor, shape (N, 3, size, size), float32 in 0..255
    pairs : dict of int -> Tensor (M, 3) int64
        Rows ``(sample, cell_a, cell_b)`` per dense stride (method "dense" only).
    """
    jitter = ColourJitter() if config.jitter else None
    a, b = [], []
    pairs: dict[int, list[np.ndarray]] = {s: [] for s in config.dense_strides}
    for k, (kind, i) in enumerate(items):
        if kind == "tile":
            src, other, key = np.asarray(tiles[i]), None, ("tile", i)
        else:
            src, other, key = np.asarray(revisits[i][0]), np.asarray(revisits[i][1]), ("pair", i)
        if key not in plants:  # vegetation masks computed once, on first use
            plants[key] = (
                vegetation_mask(src),
                None if other is None else vegetation_mask(other),
            )
        pm, pm_other = plants[key]
        vp = field_views(
            src,
            rng=rng,
            other=other,
            plants=pm,
            plants_other=pm_other,
            size=size,
            scale_range=config.scale_range,
            min_overlap=config.min_overlap,
            jitter=jitter,
        )
        a.append(vp.a)
        b.append(vp.b)
        if config.method == "dense":
            for s in config.dense_strides:
                cp = vp.cell_pairs(s)
                pairs[s].append(np.concatenate([np.full((len(cp), 1), k), cp], axis=1))
    to_t = lambda v: torch.from_numpy(np.stack(v)).permute(0, 3, 1, 2).float()  # noqa: E731
    by_stride = {
        s: torch.from_numpy(np.concatenate(p).astype(np.int64)) for s, p in pairs.items() if p
    }
    return to_t(a), to_t(b), by_stride
