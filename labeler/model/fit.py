"""What ``labeler retrain`` does with the labelled tiles, in one call.

:func:`fit_head` takes the labelled tiles (masks, pixels and feature-cache keys), makes
sure the features of the turned tiles it will train on are in the feature cache
(:mod:`labeler.model.turned`: the turns per tile fall as the label set grows, the codes
are drawn from the seed), and trains the head (:func:`labeler.model.train.train_head`)
with the project's model settings, fine-tuning the encoder's last stages when
``model.finetune_stages`` asks for it. The workflow's retraining stage and the quality
and speed benchmarks call it, so the benchmarks measure what the command does.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from labeler.model.cache import FeatureCache
from labeler.model.crop import CROP_SIZE
from labeler.model.encoder import resolve_precision
from labeler.model.train import ProgressFn, TrainResult, train_head
from labeler.model.turned import choose_turns, turned_features, turns_per_tile
from labeler.settings import ModelSettings

__all__ = ["fit_head", "TURN_SEED_OFFSET"]

#: Added to ``model.seed`` for the generator that draws the cached turns, so that the
#: draw does not shift the split and shuffles of training.
TURN_SEED_OFFSET = 7919


def fit_head(
    masks: Sequence[np.ndarray],
    images: Sequence[np.ndarray],
    keys: Sequence[str],
    *,
    class_indices: Sequence[int],
    cache: FeatureCache,
    encoder: Callable,
    settings: ModelSettings,
    progress: ProgressFn | None = None,
    encode_progress: Callable[[int, int], None] | None = None,
    **options,
) -> TrainResult:
    """Train a head on labelled tiles as ``labeler retrain`` does.

    Parameters
    ----------
    masks : sequence of N ndarray, each (H, W) uint8
        Truth per tile (schema class indices, 255 unlabelled).
    images : sequence of N ndarray, each (H, W, 3) uint8
        The tiles' pixels.
    keys : sequence of N str
        The tiles' feature-cache keys.
    class_indices : sequence of int
        Schema indices the head predicts.
    cache : FeatureCache
        The feature cache of ``encoder``'s version.
    encoder : Lite0Encoder
        The base encoder (frozen; the base of a fine-tuned tail).
    settings : ModelSettings
        The project's model settings (``augment`` chooses the mode: ``"auto"`` and
        ``"turns"`` cache the turned tiles; ``"features"`` and ``"images"`` use the
        tiles' own features).
    progress : callable, optional
        ``progress(step, total_steps, metrics)`` after each epoch.
    encode_progress : callable, optional
        ``progress(done, total)`` over the (turned) tiles encoded because the cache
        lacked them.
    **options
        Passed on to :func:`~labeler.model.train.train_head` (``steps``, ``crop``,
        ``finetune_stages``, ...); ``crop`` defaults to
        :data:`~labeler.model.crop.CROP_SIZE` (the full-resolution losses on a random
        128 x 128 window of each batch), ``keep`` to ``"last"`` (the state at the end
        of the step budget; the validation slice is only reported) and ``precision`` to
        the ``model.train_precision`` setting (the rule of
        :func:`labeler.model.encoder.resolve_precision`).

    Returns
    -------
    TrainResult
    """
    if len(images) != len(masks) or len(keys) != len(masks):
        raise ValueError(
            f"images, keys: expected one per mask ({len(masks)}), got {len(images)} images "
            f"and {len(keys)} keys"
        )
    use_turns = settings.augment in ("auto", "turns")
    codes: tuple[int, ...] = (0,)
    if use_turns:
        rng = np.random.default_rng(settings.seed + TURN_SEED_OFFSET)
        codes = choose_turns(turns_per_tile(len(masks)), rng)
    turned = turned_features(cache, encoder, keys, images, codes, progress=encode_progress)
    options.setdefault("crop", CROP_SIZE)
    options.setdefault("keep", "last")
    options.setdefault("precision", resolve_precision(settings.train_precision))
    given = {"turned": turned} if use_turns else {"features": [t[0] for t in turned]}
    return train_head(
        masks,
        class_indices=class_indices,
        images=images,
        encoder=encoder,
        settings=settings,
        mode=settings.augment,
        progress=progress,
        **given,
        **options,
    )
