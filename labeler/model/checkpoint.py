"""Saving and loading trained heads: state dict + metadata, atomic, safe to load.

A checkpoint is one ``torch.save`` file holding only plain data: the head's state dict
(tensors), its :class:`~labeler.model.head.HeadConfig` as a dict, the schema class
indices, the encoder version the head was trained on, the per-class validation IoU,
optional extra scalars and, when the encoder's last stages were fine-tuned with the head,
their weights (:meth:`labeler.model.tail.EncoderTail.state`: base encoder version, stages,
state dict), so the head and the encoder version it reads travel together. It is written atomically (temporary file + ``os.replace``) and
read with ``torch.load(..., weights_only=True)``, which refuses any pickled object that
is not plain data, so a tampered file cannot run code.

The same bytes are what the project's database keeps for a model version, so any
machine of a team can use it: :func:`checkpoint_bytes` makes them, ``load_checkpoint(name,
data=...)`` reads them back from memory (a ``BytesIO``, ``weights_only=True`` as from a
file), and :func:`keep_weights_file` writes a local copy for readers that need a path
(workers of a cluster, the encoder loader), named by the weights' SHA-256 so a copy is
written once and never mistaken for another version's.

Format versions: 1 = the head alone; 2 = the head with its optional full-resolution
refinement (``HeadConfig.refine_channels``); 3 = version 2 with the optional fine-tuned
encoder stages. Versions 2 and 3 are read; a file of another version is refused with a
message to retrain (``labeler retrain``): version-1 heads are not read, because their
masks would silently lack the refinement.
"""

from __future__ import annotations

import hashlib
import io
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from labeler.fileio import atomic_write_bytes
from labeler.model.head import HeadConfig, ProposalHead

__all__ = [
    "CheckpointMeta",
    "save_checkpoint",
    "load_checkpoint",
    "checkpoint_bytes",
    "keep_weights_file",
    "FORMAT",
]

#: Format tag stored in every checkpoint.
FORMAT = "labeler-head"
_FORMAT_VERSION = 3
_READABLE = (2, 3)


@dataclass(frozen=True)
class CheckpointMeta:
    """What a checkpoint says about its head.

    Attributes
    ----------
    config : HeadConfig
    encoder_version : str
        The encoder whose features the head was trained on.
    val_iou : tuple of float
        Per-class validation IoU (NaN where a class was absent), in head channel order.
    extra : dict
        Extra scalars (str, int, float, bool) the caller stored.
    encoder_tail : dict or None
        The fine-tuned encoder stages (:func:`labeler.model.tail.tail_from_state` rebuilds
        them on the base encoder), or None when the encoder was frozen.
    """

    config: HeadConfig
    encoder_version: str
    val_iou: tuple[float, ...]
    extra: dict[str, object] = field(default_factory=dict)
    encoder_tail: dict[str, object] | None = None

    @property
    def class_indices(self) -> tuple[int, ...]:
        return self.config.class_indices


def checkpoint_bytes(
    head: ProposalHead,
    *,
    encoder_version: str,
    val_iou: Sequence[float] | np.ndarray,
    extra: Mapping[str, object] | None = None,
    encoder_tail: Mapping[str, object] | None = None,
) -> bytes:
    """The bytes of a checkpoint of ``head`` (what :func:`save_checkpoint` writes).

    Parameters
    ----------
    head : ProposalHead
    encoder_version : str
        The encoder whose features the head reads (the tail's version when tuned).
    val_iou : sequence of float, length n_classes
        Per-class validation IoU (NaN where a class was absent).
    extra : mapping of str to str, int, float or bool, optional
        Extra scalars to keep.
    encoder_tail : mapping, optional
        :meth:`labeler.model.tail.EncoderTail.state` of the stages tuned with the head.

    Returns
    -------
    bytes
        A ``torch.save`` file of plain data.

    Raises
    ------
    ValueError
        If ``val_iou`` does not have one value per class or ``extra`` holds anything but
        str/int/float/bool values.
    """
    k = head.config.n_classes
    iou = [float(v) for v in np.asarray(val_iou, np.float64).ravel()]
    if len(iou) != k:
        raise ValueError(f"val_iou: expected {k} values (one per class), got {len(iou)}")
    plain: dict[str, object] = {}
    for name, value in (extra or {}).items():
        if not isinstance(value, str | int | float | bool):
            raise ValueError(
                f"extra[{name!r}]: expected a str, int, float or bool, got {type(value).__name__}"
            )
        plain[str(name)] = value
    payload = {
        "format": FORMAT,
        "format_version": _FORMAT_VERSION,
        "config": head.config.as_dict(),
        "encoder_version": str(encoder_version),
        "val_iou": iou,
        "extra": plain,
        "encoder_tail": dict(encoder_tail) if encoder_tail is not None else None,
        "state_dict": {k_: v.detach().cpu().contiguous() for k_, v in head.state_dict().items()},
    }
    buf = io.BytesIO()
    torch.save(payload, buf)
    return buf.getvalue()


def save_checkpoint(
    path: str | os.PathLike[str],
    head: ProposalHead,
    *,
    encoder_version: str,
    val_iou: Sequence[float] | np.ndarray,
    extra: Mapping[str, object] | None = None,
    encoder_tail: Mapping[str, object] | None = None,
) -> Path:
    """Write ``head`` and its metadata to ``path`` atomically.

    ``encoder_tail`` is :meth:`labeler.model.tail.EncoderTail.state` of the encoder
    stages fine-tuned with the head (then ``encoder_version`` is the tail's version).

    Raises
    ------
    ValueError
        If ``val_iou`` does not have one value per class or ``extra`` holds anything but
        str/int/float/bool values.
    """
    data = checkpoint_bytes(
        head, encoder_version=encoder_version, val_iou=val_iou, extra=extra,
        encoder_tail=encoder_tail,
    )
    return atomic_write_bytes(path, data)


def keep_weights_file(
    folder: str | os.PathLike[str], name: str, data: bytes, *, sha256: str | None = None
) -> Path:
    """A local copy of a model version's weights, named by their SHA-256; written once.

    Parameters
    ----------
    folder : path
        Where copies are kept (the project's ``models/``).
    name : str
        The version's name (``"head-3"``), the start of the file name.
    data : bytes
        The weights file's bytes (as the database keeps them).
    sha256 : str, optional
        Their SHA-256 when known (else computed).

    Returns
    -------
    Path
        ``<folder>/<name>-<sha256[:12]>.pt``; an existing copy of the same size is kept.
    """
    digest = sha256 or hashlib.sha256(data).hexdigest()
    path = Path(folder) / f"{name}-{digest[:12]}.pt"
    try:
        if path.stat().st_size == len(data):
            return path
    except FileNotFoundError:
        pass
    path.parent.mkdir(parents=True, exist_ok=True)
    return atomic_write_bytes(path, data)


def load_checkpoint(
    path: str | os.PathLike[str], *, data: bytes | None = None
) -> tuple[ProposalHead, CheckpointMeta]:
    """Read a head written by :func:`save_checkpoint` (``weights_only=True``).

    Parameters
    ----------
    path : path-like or str
        The checkpoint file; with ``data``, only the name messages give it (e.g.
        ``"model head-3 in the database"``).
    data : bytes, optional
        The checkpoint's bytes (:func:`checkpoint_bytes`, as the database keeps them),
        read from memory instead of the file.

    Returns
    -------
    head : ProposalHead
        In eval mode.
    meta : CheckpointMeta

    Raises
    ------
    ValueError
        If the file is missing, not a checkpoint, holds objects other than plain data
        (refused by ``weights_only``), or its state does not fit its config; the message
        names the file.
    """
    p = Path(path) if data is None else str(path)
    try:
        source = p if data is None else io.BytesIO(data)
        obj = torch.load(source, map_location="cpu", weights_only=True)
    except FileNotFoundError:
        raise ValueError(f"{p}: no such checkpoint file") from None
    except Exception as exc:  # UnpicklingError, RuntimeError, EOFError, ...
        raise ValueError(
            f"{p}: refused, not a plain-data head checkpoint ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else ''}); retrain to write a new one"
        ) from None
    if not isinstance(obj, dict) or obj.get("format") != FORMAT:
        raise ValueError(f"{p}: not a labeler head checkpoint (no format tag {FORMAT!r})")
    if obj.get("format_version") not in _READABLE:
        raise ValueError(
            f"{p}: checkpoint format version {obj.get('format_version')!r}, this labeler reads "
            f"{' and '.join(map(str, _READABLE))}; retrain the head ('labeler retrain')"
        )
    try:
        config = HeadConfig.from_dict(obj["config"])
        head = ProposalHead(config)
        head.load_state_dict(obj["state_dict"], strict=True)
        meta = CheckpointMeta(
            config=config,
            encoder_version=str(obj["encoder_version"]),
            val_iou=tuple(float(v) if v == v else math.nan for v in obj["val_iou"]),
            extra=dict(obj.get("extra", {})),
            encoder_tail=_tail_state(obj.get("encoder_tail")),
        )
    except (KeyError, TypeError, ValueError, RuntimeError) as exc:
        raise ValueError(f"{p}: damaged checkpoint ({type(exc).__name__}: {exc})") from None
    head.eval()
    return head, meta


def _tail_state(obj: object) -> dict[str, object] | None:
    if obj is None:
        return None
    if not isinstance(obj, dict) or not isinstance(obj.get("state_dict"), dict):
        raise ValueError(
            f"encoder_tail: expected a dict with a state_dict, got {type(obj).__name__}"
        )
    return dict(obj)
