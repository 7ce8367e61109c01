"""Encoder features of the flips and quarter turns of labelled tiles, computed once, cached.

The eight symmetries of the square (four quarter turns, each with or without a
left-right flip; ``code`` 0..7 as in :func:`labeler.model.augment.dihedral`) are the
natural augmentation of nadir field imagery: a picture taken from above has no "up".
Turning the cached feature maps instead of the tile is only approximate, because the
encoder is not equivariant to flips and turns (learned filters, asymmetric padding).
Here each labelled tile is turned first and the turned tile goes through the encoder,
once: its features are kept in the project's feature cache under the key
``"<tile key>|turn<code>"`` (code 0 is the tile itself, under the tile's own key, so the
features ``labeler propose`` cached are reused). Training then reads the exact features
of the turned tile for every step and never runs the encoder again.

The number of turns kept per tile falls as the label set grows
(:func:`turns_per_tile`): a dozen tiles get all eight, a thousand get one or two, so
the features held in memory stay near :data:`MAX_VIEWS` tile views (about 0.4 MB each
for a 256 x 256 tile in float16), and the first retrain of a large label set encodes at
most that many views less the tiles themselves (800: a 200-tile set keeps 4 turns per
tile, 600 encoder passes where 8 turns took 1 400). Which turns a tile keeps is drawn once from the
training seed (:func:`choose_turns`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np

from labeler.model.cache import FeatureCache

__all__ = [
    "N_TURNS",
    "MAX_VIEWS",
    "turn_array",
    "turn_key",
    "turns_per_tile",
    "choose_turns",
    "turned_features",
]

#: Symmetries of the square.
N_TURNS = 8
#: Tile views (tile x turn) whose features training keeps in memory, about.
MAX_VIEWS = 800

Features = tuple[np.ndarray, ...]


def turn_array(a: np.ndarray, code: int) -> np.ndarray:
    """One of the eight flips/turns of an image or mask, on its first two axes.

    Parameters
    ----------
    a : ndarray, shape (H, W) or (H, W, C)
    code : int
        0..7: ``code % 4`` quarter turns (from the first axis towards the second, as
        ``numpy.rot90``), then a left-right flip when ``code >= 4``; the same
        convention as :func:`labeler.model.augment.dihedral` on ``(..., H, W)`` tensors.

    Returns
    -------
    ndarray, shape (H, W, ...) or (W, H, ...) after an odd number of turns, C-contiguous

    Raises
    ------
    ValueError
        If ``code`` is not in 0..7 or ``a`` has fewer than two axes.
    """
    if not 0 <= int(code) < N_TURNS:
        raise ValueError(f"code: expected a flip/turn code in 0..7, got {code}")
    arr = np.asarray(a)
    if arr.ndim < 2:
        raise ValueError(f"a: expected an array (H, W, ...), got shape {arr.shape}")
    out = np.rot90(arr, int(code) % 4, axes=(0, 1))
    if code >= 4:
        out = out[:, ::-1]
    return np.ascontiguousarray(out)


def turn_key(key: str, code: int) -> str:
    """Cache key of the turned tile ``code`` of the tile ``key`` (code 0: ``key`` itself)."""
    if not 0 <= int(code) < N_TURNS:
        raise ValueError(f"code: expected a flip/turn code in 0..7, got {code}")
    return key if code == 0 else f"{key}|turn{int(code)}"


def turns_per_tile(n_tiles: int, *, max_views: int = MAX_VIEWS) -> int:
    """Turns kept per tile for a label set of ``n_tiles`` tiles.

    Returns
    -------
    int
        ``max_views // n_tiles`` clipped to 1..8: 8 up to 100 tiles (with the default
        ``max_views`` 800), 4 for 200, 2 for 400, 1 from 401 tiles on.
    """
    if n_tiles < 0 or max_views < 1:
        raise ValueError(
            f"n_tiles, max_views: expected n_tiles >= 0 and max_views >= 1, got {n_tiles} "
            f"and {max_views}"
        )
    return int(np.clip(max_views // max(n_tiles, 1), 1, N_TURNS))


def choose_turns(per_tile: int, rng: np.random.Generator) -> tuple[int, ...]:
    """The codes every tile keeps: 0 (the tile itself) and ``per_tile - 1`` drawn ones.

    Parameters
    ----------
    per_tile : int
        1..8.
    rng : numpy.random.Generator
        Draws the other codes (without repetition).

    Returns
    -------
    tuple of int
        Increasing codes, starting with 0.
    """
    if not 1 <= per_tile <= N_TURNS:
        raise ValueError(f"per_tile: expected 1..8 turns per tile, got {per_tile}")
    others = rng.permutation(np.arange(1, N_TURNS))[: per_tile - 1]
    return tuple(sorted([0, *(int(c) for c in others)]))


def turned_features(
    cache: FeatureCache,
    encoder: Callable,
    keys: Sequence[str],
    images: Sequence[np.ndarray],
    codes: Sequence[int],
    *,
    batch_size: int = 8,
    progress: Callable[[int, int], None] | None = None,
) -> list[Mapping[int, Features]]:
    """Features of the turned tiles, from the cache or encoded once and stored.

    Parameters
    ----------
    cache : FeatureCache
        The feature cache of ``encoder``'s version.
    encoder : Lite0Encoder or callable
        Maps a float batch ``(N, 3, H, W)`` in 0..255 to the four feature maps.
    keys : sequence of N str
        Cache keys of the (unturned) tiles.
    images : sequence of N ndarray, each (H, W, 3) uint8
        The tiles.
    codes : sequence of int
        Flip/turn codes to provide for every tile (:func:`choose_turns`).
    batch_size : int
        Tiles per encoder pass.
    progress : callable, optional
        ``progress(done, total)`` over the turned tiles that are encoded (not cached).

    Returns
    -------
    list of N dict
        Per tile, ``{code: features}`` with the four float16 maps of the turned tile,
        shapes :func:`labeler.model.encoder.feature_shapes` of the turned tile's size.

    Raises
    ------
    ValueError
        ``keys`` and ``images`` of different lengths, or a bad code.
    """
    if len(keys) != len(images):
        raise ValueError(f"images: expected one tile per key ({len(keys)}), got {len(images)}")
    codes = [int(c) for c in codes]
    wanted: list[str] = []
    shapes: list[tuple[int, int]] = []
    source: dict[str, tuple[int, int]] = {}
    for i, key in enumerate(keys):
        h, w = np.shape(images[i])[:2]
        for code in codes:
            k = turn_key(key, code)
            wanted.append(k)
            shapes.append((h, w) if code % 2 == 0 else (w, h))
            source[k] = (i, code)
    feats = cache.get_or_compute(
        wanted,
        lambda ks: [turn_array(images[source[k][0]], source[k][1]) for k in ks],
        encoder,
        tile_shapes=shapes,
        batch_size=batch_size,
        progress=progress,
    )
    out: list[dict[int, Features]] = [{} for _ in keys]
    for k, f in zip(wanted, feats, strict=True):
        i, code = source[k]
        out[i][code] = f
    return out
