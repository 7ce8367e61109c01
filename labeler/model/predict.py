"""Mask proposals with MC-dropout uncertainty, from cached encoder features.

For each tile the head's deterministic trunk runs once; the classifier (dropout + a
1x1 convolution) then runs ``mc_samples`` = T times with dropout active (Gal &
Ghahramani 2016). From the T softmax outputs at stride 4:

- the proposed mask: for a head with refinement (:mod:`labeler.model.refine`) and the
  tiles' pixels passed (``images=``), the argmax of the refined full-resolution logits,
  computed once per tile from the dropout-free trunk features and the pixels (not per
  dropout pass); otherwise the argmax of the mean probabilities, bilinearly upsampled to
  the tile size (only the mean is upsampled), or, for a head without refinement given
  ``images=``, upsampled with guidance by the pixels' colours
  (:mod:`labeler.model.upsample`), so mask edges follow colour edges. A refining head
  given no pixels falls back to the bilinear mask (``TileProposal.refined`` is False);
- the uncertainty maps are computed on a grid of ``uncertainty_stride`` (default 4, the
  native grid of the logits; other strides resize the T probability maps first, by area
  averaging when coarser and bilinearly when finer): entropy of the mean, margin of the
  mean (top-1 minus top-2), and BALD = H[mean_t p_t] - mean_t H[p_t] (Houlsby et al.
  2011). Natural logarithms (nats). These are torch twins of
  :func:`labeler.picker.pixel_entropy`, :func:`~labeler.picker.pixel_margin` and
  :func:`~labeler.picker.pixel_bald` (the tests hold them to those definitions);
- the tile means of the three maps, and the tile mean of the least confidence of the
  mean, ``1 - max_k p_k`` on the same grid (:func:`labeler.picker.pixel_least_confidence`;
  a scalar only, no map is kept).

The T dropout masks are drawn once per call from ``seed`` (a local generator) and shared
by every tile of one size, so a tile's proposal depends on the seed and the tile only,
not on which other tiles share its batch. ``mc_samples=1`` (or a head without dropout)
runs one pass without dropout, and BALD is then 0.

Cost: the T passes share the trunk (dropout acts only on the classifier's input, so the
pyramid and the refinement run once per tile; the T masked 1x1 classifiers are one
batched matrix product). Measured on 40 peanut tiles with a trained head (one thread),
the pyramid took about 28 %, the T = 8 passes with the uncertainty maps 18 %, the
refinement 45 % and the rest 10 % of the head's time: the passes do not dominate. With
``precision="bfloat16"`` (:class:`labeler.model.fasthead.FastHead`) the pyramid and the
refinement's convolutions run in bfloat16; the passes, the probabilities and every
uncertainty measure stay float32 with the same T, so the maps mean what they meant (they
move only by the bfloat16 rounding of the trunk features: at most 0.04 nats per cell and
2e-4 nats in the tile mean on those tiles).

The pooled embedding for the picker's core-set is the global average of the stride-32
encoder features (320 values for EfficientNet-Lite0): it depends on the encoder only,
so embeddings stay comparable across retrained heads.

Masks are decision support: where they drive spraying or fungicide decisions, local
regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F

from labeler.model.fasthead import HEAD_PRECISIONS, FastHead, levels_from_features
from labeler.model.head import ProposalHead
from labeler.model.runtime import inference
from labeler.model.upsample import guided_upsample
from labeler.settings import UNCERTAINTY_MEASURES

__all__ = [
    "TileProposal",
    "propose_tiles",
    "entropy_t",
    "margin_t",
    "bald_t",
    "UNCERTAINTY_NAMES",
]

#: Order of the maps in :attr:`TileProposal.uncertainty`: the measures of the one list
#: :data:`labeler.settings.UNCERTAINTY_MEASURES`, less least confidence (not kept as a map).
UNCERTAINTY_NAMES = tuple(m for m in UNCERTAINTY_MEASURES if m != "least_confidence")


def entropy_t(probs: torch.Tensor, *, dim: int) -> torch.Tensor:
    """Shannon entropy in nats along ``dim`` (0 log 0 = 0); twin of ``pixel_entropy``."""
    return -torch.special.xlogy(probs, probs).sum(dim=dim)


def margin_t(probs: torch.Tensor, *, dim: int) -> torch.Tensor:
    """Top-1 minus top-2 probability along ``dim``; twin of ``pixel_margin``."""
    if probs.shape[dim] == 1:
        return probs.select(dim, 0)
    top2 = probs.topk(2, dim=dim).values
    return top2.select(dim, 0) - top2.select(dim, 1)


def bald_t(samples: torch.Tensor, *, sample_dim: int, class_dim: int) -> torch.Tensor:
    """BALD ``H[mean_t p_t] - mean_t H[p_t]``, clipped at 0; twin of ``pixel_bald``.

    ``class_dim`` is numbered in the input, like ``pixel_bald``'s ``class_axis``.
    """
    s = samples.movedim((sample_dim, class_dim), (0, 1))
    total = entropy_t(s.mean(dim=0), dim=0)
    expected = entropy_t(s, dim=1).mean(dim=0)
    return (total - expected).clamp_min(0.0)


@dataclass
class TileProposal:
    """A proposed mask and its uncertainty for one tile.

    Attributes
    ----------
    mask : ndarray, shape (H, W), uint8
        Schema class index per pixel (argmax of the mean MC-dropout probabilities).
    uncertainty : ndarray, shape (3, ceil(H / s), ceil(W / s)), float16
        Entropy (nats), margin and BALD (nats) per cell of the uncertainty grid
        (``s`` = ``uncertainty_stride``), in :data:`UNCERTAINTY_NAMES` order.
    mean_entropy, mean_margin, mean_bald : float
        Tile means of the three maps (computed before rounding to float16).
    mean_least_confidence : float
        Tile mean of ``1 - max_k p_k`` of the mean probabilities on the uncertainty grid.
    class_fractions : ndarray, shape (K,), float64
        Share of the mask's pixels per head class (sums to 1).
    embedding : ndarray, shape (D,), float32
        Global average of the stride-32 encoder features (D = 320).
    class_indices : tuple of int
        Schema index of each entry of ``class_fractions``.
    refined : bool
        True when the mask comes from the full-resolution refinement.
    """

    mask: np.ndarray
    uncertainty: np.ndarray
    mean_entropy: float
    mean_margin: float
    mean_bald: float
    mean_least_confidence: float
    class_fractions: np.ndarray
    embedding: np.ndarray
    class_indices: tuple[int, ...]
    refined: bool = False


def _dropout_masks(
    n: int, h: int, w: int, c: int, *, p: float, generator: torch.Generator
) -> torch.Tensor:
    """``n`` inverted-dropout masks ``(n, h * w, c)``: 0 or ``1 / (1 - p)``."""
    keep = torch.rand((n, h * w, c), generator=generator) >= p
    return keep.to(torch.float32) / (1.0 - p)


def _masked_weights(masks: torch.Tensor, weight: torch.Tensor) -> torch.Tensor:
    """Per-pixel classifier weights of every pass, ``(h * w, C, T * K)``.

    Pass ``t`` computes ``logits[p] = (z[p] * m_t[p]) @ W.T``, which equals
    ``z[p] @ (m_t[p][:, None] * W.T)``; building these per-pixel weights once lets one
    batched matrix product serve all T passes of all tiles without materialising the
    T masked copies of the features.
    """
    t, hw, c = masks.shape
    k = weight.shape[0]
    per = masks[..., None] * weight.t()[None, None]  # (T, HW, C, K)
    return per.permute(1, 2, 0, 3).reshape(hw, c, t * k).contiguous()


def _resize_probs(probs: torch.Tensor, size: tuple[int, int]) -> torch.Tensor:
    """Resize ``(N, K, h, w)`` probability maps; area averaging down, bilinear up."""
    if tuple(probs.shape[-2:]) == size:
        return probs
    if size[0] <= probs.shape[-2] and size[1] <= probs.shape[-1]:
        return F.adaptive_avg_pool2d(probs, size)
    return F.interpolate(probs, size=size, mode="bilinear", align_corners=False)


def _argmax_first(x: torch.Tensor, *, dim: int) -> torch.Tensor:
    """Argmax along ``dim`` by running comparisons (first index on ties)."""
    best = x.select(dim, 0)
    idx = torch.zeros(best.shape, dtype=torch.uint8)
    for k in range(1, x.shape[dim]):
        cand = x.select(dim, k)
        better = cand > best
        idx[better] = k
        best = torch.maximum(best, cand)
    return idx


def _softmax(x: torch.Tensor, *, dim: int) -> torch.Tensor:
    m = x.amax(dim=dim, keepdim=True)
    e = (x - m).exp_()
    return e.div_(e.sum(dim=dim, keepdim=True))


def _propose_batch(
    fast: FastHead,
    levels: list[torch.Tensor],
    *,
    tile_size: tuple[int, int],
    pass_weights: torch.Tensor | None,
    n_passes: int,
    uncertainty_stride: int,
    guide: np.ndarray | None = None,
    embeddings: np.ndarray,
) -> list[TileProposal]:
    """Proposals of one batch of equal-size tiles; ``guide`` = their pixels ``(B, H, W, 3)``."""
    head = fast.head
    cfg = head.config
    z_low, z = fast.trunk(levels)  # (B, C, h, w), channels-last memory; z in float32
    b, c, h, w = z.shape
    k = cfg.n_classes
    bias = head.classifier.bias
    if pass_weights is None:
        zc = z.permute(0, 2, 3, 1).reshape(b * h * w, c)
        logits = torch.addmm(bias, zc, head.classifier.weight[:, :, 0, 0].t())
        logits = logits.reshape(1, b, h * w, k).permute(0, 1, 3, 2)  # (1, B, K, HW)
    else:
        zp = z.permute(2, 3, 0, 1).reshape(h * w, b, c)  # (HW, B, C), one copy
        out = torch.baddbmm(bias.repeat(n_passes)[None, None], zp, pass_weights)  # (HW, B, T*K)
        logits = out.reshape(h * w, b, n_passes, k).permute(2, 1, 3, 0)  # (T, B, K, HW)
    probs = _softmax(logits.contiguous(), dim=2).reshape(-1, b, k, h, w)  # (T, B, K, h, w)
    t = probs.shape[0]
    mean = probs.mean(dim=0)  # (B, K, h, w)

    height, width = tile_size
    grid = (math.ceil(height / uncertainty_stride), math.ceil(width / uncertainty_stride))
    samples = _resize_probs(probs.reshape(t * b, k, h, w), grid).reshape(t, b, k, *grid)
    mean_g = samples.mean(dim=0)  # (B, K, gh, gw)
    ent = entropy_t(mean_g, dim=1)
    mar = margin_t(mean_g, dim=1)
    bald = bald_t(samples, sample_dim=0, class_dim=2) if t > 1 else torch.zeros_like(ent)
    maps = torch.stack([ent, mar, bald], dim=1)  # (B, 3, gh, gw)
    # least confidence of the mean (B, gh, gw), kept in [0, 1] against float32 rounding
    least = (1.0 - mean_g.amax(dim=1)).clamp_(0.0, 1.0).numpy()

    refined = guide is not None and head.refiner is not None
    if refined:
        # once per tile, on the dropout-free trunk features: the mean is not refined
        up = fast.refine(z_low, z, guide)
    elif guide is None:
        up = F.interpolate(mean, size=tile_size, mode="bilinear", align_corners=False)
    else:
        pixels = torch.from_numpy(guide).permute(0, 3, 1, 2).to(torch.float32)
        up = guided_upsample(mean, pixels)
    arg = _argmax_first(up, dim=1).numpy()  # (B, H, W) channel numbers
    lut = np.asarray(cfg.class_indices, np.uint8)
    emb = embeddings
    maps_np = maps.numpy()
    out_list = []
    for i in range(b):
        counts = np.bincount(arg[i].ravel(), minlength=k)
        out_list.append(
            TileProposal(
                mask=lut[arg[i]],
                uncertainty=maps_np[i].astype(np.float16),
                mean_entropy=float(maps_np[i, 0].mean(dtype=np.float64)),
                mean_margin=float(maps_np[i, 1].mean(dtype=np.float64)),
                mean_bald=float(maps_np[i, 2].mean(dtype=np.float64)),
                mean_least_confidence=float(least[i].mean(dtype=np.float64)),
                class_fractions=counts / counts.sum(),
                embedding=emb[i].copy(),
                class_indices=cfg.class_indices,
                refined=refined,
            )
        )
    return out_list


def propose_tiles(
    head: ProposalHead,
    features: Sequence[Sequence[np.ndarray]],
    *,
    tile_shapes: Sequence[tuple[int, int]] | None = None,
    mc_samples: int = 8,
    seed: int = 0,
    uncertainty_stride: int = 4,
    images: Sequence[np.ndarray] | None = None,
    batch_size: int = 16,
    progress: Callable[[int, int], None] | None = None,
    dropout_weights: dict | None = None,
    precision: str = "float32",
) -> list[TileProposal]:
    """Proposed masks and MC-dropout uncertainty for tiles whose features are known.

    Parameters
    ----------
    head : ProposalHead
        A trained head (used in eval mode; dropout is applied by this function).
    features : sequence of N tuples of 4 arrays
        Encoder features per tile (from :class:`labeler.model.cache.FeatureCache`),
        shapes ``(C_i, h_i, w_i)`` for strides 4, 8, 16, 32.
    tile_shapes : sequence of (int, int), optional
        ``(H, W)`` of each tile; default 4 x the stride-4 grid (exact for tiles whose
        sides are multiples of 4).
    mc_samples : int
        T, dropout passes (the ``model.mc_samples`` setting); 1 = one pass, no dropout.
    seed : int
        Seed of the dropout masks.
    uncertainty_stride : int
        Pixels per cell of the uncertainty maps (the store keeps a downsampled map).
    images : sequence of ndarray, each (H, W, 3) uint8, optional
        The tiles themselves. With a refining head the mask comes from the refined
        full-resolution logits; with a head without refinement the mean probabilities are
        upsampled with colour guidance (:func:`labeler.model.upsample.guided_upsample`)
        instead of bilinearly. Without them the mask is the bilinear one. The uncertainty
        maps never depend on them.
    batch_size : int
        Tiles per pass.
    progress : callable, optional
        ``progress(done, total)`` after each batch.
    dropout_weights : dict, optional
        A dict the caller keeps across calls with the same ``head``: the per-pixel
        classifier weights of the T dropout passes are made once per grid size, seed and
        T and reused (they depend on nothing else, so the proposals are the same as
        without it). Default: made again in every call. The head's bfloat16 copy
        (``precision``) is kept there too.
    precision : {"float32", "bfloat16"}
        Arithmetic of the head's feature pyramid and refinement convolutions
        (:class:`labeler.model.fasthead.FastHead`); the MC-dropout passes, the
        probabilities and the uncertainty maps are float32 in either.

    Returns
    -------
    proposals : list of TileProposal, in the order of ``features``

    Raises
    ------
    ValueError
        For a bad option or features of the wrong shape (the message names it).
    """
    if mc_samples < 1:
        raise ValueError(f"mc_samples: expected at least 1, got {mc_samples}; set model.mc_samples")
    if uncertainty_stride < 1:
        raise ValueError(f"uncertainty_stride: expected at least 1 pixel, got {uncertainty_stride}")
    if batch_size < 1:
        raise ValueError(f"batch_size: expected at least 1, got {batch_size}")
    if precision not in HEAD_PRECISIONS:
        raise ValueError(
            f"precision: expected 'float32' or 'bfloat16', got {precision!r}; set model.precision"
        )
    n = len(features)
    if images is not None and len(images) != n:
        raise ValueError(f"images: expected one tile per features entry ({n}), got {len(images)}")
    if tile_shapes is not None and len(tile_shapes) != n:
        raise ValueError(f"tile_shapes: expected one (H, W) per tile ({n}), got {len(tile_shapes)}")
    shapes = []
    for i, f in enumerate(features):
        if len(f) != 4:
            raise ValueError(f"features: tile {i} expected 4 levels, got {len(f)}")
        h4, w4 = np.shape(f[0])[-2:]
        size = tuple(tile_shapes[i]) if tile_shapes is not None else (4 * h4, 4 * w4)
        if images is not None:
            im_shape = np.shape(images[i])
            if tile_shapes is None:
                size = tuple(im_shape[:2])
            if len(im_shape) != 3 or im_shape[2] != 3 or tuple(im_shape[:2]) != size:
                raise ValueError(
                    f"images: tile {i} expected shape {(*size, 3)} (RGB of the tile), "
                    f"got {im_shape}"
                )
        if math.ceil(size[0] / 4) != h4 or math.ceil(size[1] / 4) != w4:
            raise ValueError(
                f"tile_shapes: tile {i} is {size} but its stride-4 features are {h4} x {w4}; "
                "pass the tile sizes the features were computed from"
            )
        shapes.append((size, tuple(tuple(np.shape(a)) for a in f)))
    head.eval()
    p = head.config.dropout
    pass_weights: dict = {} if dropout_weights is None else dropout_weights
    fkey = ("fast head", id(head), precision)
    fast = pass_weights.get(fkey)
    if fast is None or fast.head is not head:
        fast = FastHead(head, precision=precision)
        if precision != "float32":  # a copy of the head in bfloat16, made once per run
            pass_weights[fkey] = fast
    weight = head.classifier.weight.detach()[:, :, 0, 0]
    results: list[TileProposal | None] = [None] * n
    groups: dict[tuple, list[int]] = {}
    for i, key in enumerate(shapes):
        groups.setdefault(key, []).append(i)
    done = 0
    with inference():
        for (size, level_shapes), members in sorted(groups.items()):
            h4, w4 = level_shapes[0][-2:]
            per_pixel = None
            if mc_samples > 1 and p > 0:
                wkey = (h4, w4, int(seed), mc_samples, float(p), id(head.classifier.weight))
                if wkey not in pass_weights:
                    # one generator per grid size: masks depend on the seed and size only
                    generator = torch.Generator().manual_seed(
                        (int(seed) * 1_000_003 + h4 * 1009 + w4) % (2**63)
                    )
                    masks = _dropout_masks(
                        mc_samples, h4, w4, head.config.width, p=p, generator=generator
                    )
                    pass_weights[wkey] = _masked_weights(masks, weight)
                per_pixel = pass_weights[wkey]
            for start in range(0, len(members), batch_size):
                idx = members[start : start + batch_size]
                chosen = [features[i] for i in idx]
                levels = levels_from_features(chosen, dtype=fast.dtype)
                # global average of the stride-32 features, from the float16 values
                emb = np.stack([np.asarray(f[3], np.float32) for f in chosen]).mean(axis=(2, 3))
                guide = None
                if images is not None:
                    guide = np.stack([np.asarray(images[i]) for i in idx])
                batch = _propose_batch(
                    fast,
                    levels,
                    embeddings=emb,
                    tile_size=size,
                    pass_weights=per_pixel,
                    n_passes=mc_samples if per_pixel is not None else 1,
                    uncertainty_stride=uncertainty_stride,
                    guide=guide,
                )
                for i, prop in zip(idx, batch, strict=True):
                    results[i] = prop
                done += len(idx)
                if progress is not None:
                    progress(done, n)
    return results  # type: ignore[return-value]
