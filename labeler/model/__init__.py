"""The only room that imports torch: encoder, head, feature cache, training, prediction.

Modules: :mod:`~labeler.model.encoder` (EfficientNet-Lite0, multi-scale features),
:mod:`~labeler.model.weights` (packaged ImageNet-1k weights, explicit key mapping),
:mod:`~labeler.model.cache` (float16 feature cache per encoder version),
:mod:`~labeler.model.head` (FPN head with dropout), :mod:`~labeler.model.refine`
(full-resolution refinement), :mod:`~labeler.model.trainset` (labelled tiles prepared
for training), :mod:`~labeler.model.augment` (flips, turns, colour jitter),
:mod:`~labeler.model.loss` (partial cross-entropy, class weights),
:mod:`~labeler.model.train` (the training loop),
:mod:`~labeler.model.validation` (validation loss, early stopping),
:mod:`~labeler.model.predict` (proposals with MC-dropout uncertainty),
:mod:`~labeler.model.upsample` (colour-guided upsampling), :mod:`~labeler.model.checkpoint`
and :mod:`~labeler.model.runtime` (threads, inference mode). Import from the modules
(importing this package does not import torch).
"""

__all__: list[str] = []
