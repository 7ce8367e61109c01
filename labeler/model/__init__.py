"""The only room that imports torch: encoder, head, feature cache, training, prediction.

Modules: :mod:`~labeler.model.encoder` (EfficientNet-Lite0, multi-scale features),
:mod:`~labeler.model.weights` (packaged ImageNet-1k weights, explicit key mapping),
:mod:`~labeler.model.cache` (float16 feature cache per encoder version),
:mod:`~labeler.model.head` (FPN head with dropout), :mod:`~labeler.model.train`
(partial cross-entropy training, early stopping), :mod:`~labeler.model.predict`
(proposals with MC-dropout uncertainty), :mod:`~labeler.model.checkpoint` and
:mod:`~labeler.model.runtime` (threads, inference mode). Import from the modules.
"""

__all__: list[str] = []
