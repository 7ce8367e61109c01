"""Checkpoints of a self-supervised adaptation run: write atomically, read safely, resume.

A checkpoint is one ``torch.save`` file of plain data: the encoder's and the projection
heads' state dicts, the optimiser state, the step count, the seconds used so far, the
settings of the run (a plain dict), the per-step losses and the random states at the
start of the next step (torch's CPU generator and the numpy generator that draws the
views), so a resumed run makes exactly the steps the uninterrupted run would have made.
It is written through a temporary file and a rename (a crash leaves the old file or the
new one) and read with ``torch.load(..., weights_only=True)``, which refuses anything but
tensors and plain containers, so a tampered file cannot run code.
"""

from __future__ import annotations

import io
import os
from dataclasses import dataclass, field
from pathlib import Path

import torch

# the generic atomic write; it moves to labeler.fileio with the architecture work
from labeler.fileio import atomic_write_bytes
from labeler.model.weights import read_tagged_file

__all__ = ["ADAPT_FORMAT", "AdaptCheckpoint", "save_adapt_checkpoint", "load_adapt_checkpoint"]

#: Format tag stored in every adaptation checkpoint.
ADAPT_FORMAT = "labeler-adapt"
_FORMAT_VERSION = 1


@dataclass
class AdaptCheckpoint:
    """The state of an adaptation run after ``step`` optimiser steps.

    Attributes
    ----------
    step : int
        Optimiser steps made.
    elapsed : float
        Seconds of the time budget used so far.
    settings : dict
        The run's settings (:meth:`labeler.model.adapt.AdaptConfig.as_dict`).
    encoder_state, heads_state, optimizer_state : dict
        State dicts (tensors on the CPU).
    torch_rng : Tensor
        ``torch.get_rng_state()`` at the start of the next step.
    numpy_rng : dict
        ``numpy.random.Generator.bit_generator.state`` at the start of the next step.
    losses : list of float
        Loss of every step made.
    """

    step: int
    elapsed: float
    settings: dict
    encoder_state: dict[str, torch.Tensor]
    heads_state: dict[str, torch.Tensor]
    optimizer_state: dict
    torch_rng: torch.Tensor
    numpy_rng: dict
    losses: list[float] = field(default_factory=list)


def _cpu(state: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    return {k: v.detach().cpu().clone() for k, v in state.items()}


def save_adapt_checkpoint(path: str | os.PathLike[str], checkpoint: AdaptCheckpoint) -> Path:
    """Write ``checkpoint`` to ``path`` atomically; returns the path."""
    payload = {
        "format": ADAPT_FORMAT,
        "format_version": _FORMAT_VERSION,
        "step": int(checkpoint.step),
        "elapsed": float(checkpoint.elapsed),
        "settings": dict(checkpoint.settings),
        "encoder": _cpu(checkpoint.encoder_state),
        "heads": _cpu(checkpoint.heads_state),
        "optimizer": checkpoint.optimizer_state,
        "torch_rng": checkpoint.torch_rng.clone(),
        "numpy_rng": checkpoint.numpy_rng,
        "losses": [float(v) for v in checkpoint.losses],
    }
    buf = io.BytesIO()
    torch.save(payload, buf)
    return atomic_write_bytes(path, buf.getvalue())


def load_adapt_checkpoint(path: str | os.PathLike[str]) -> AdaptCheckpoint:
    """Read a checkpoint written by :func:`save_adapt_checkpoint` (``weights_only=True``).

    Raises
    ------
    ValueError
        If the file is missing, holds anything but plain data, is not an adaptation
        checkpoint, or is of another format version; the message names the file.
    """
    p = Path(path)
    obj = read_tagged_file(
        p,
        what="adaptation checkpoint",
        kind="adaptation checkpoint",
        format_tag=ADAPT_FORMAT,
        format_version=_FORMAT_VERSION,
        fix="delete it to start the adaptation afresh",
    )
    try:
        return AdaptCheckpoint(
            step=int(obj["step"]),
            elapsed=float(obj["elapsed"]),
            settings=dict(obj["settings"]),
            encoder_state=dict(obj["encoder"]),
            heads_state=dict(obj["heads"]),
            optimizer_state=obj["optimizer"],
            torch_rng=obj["torch_rng"],
            numpy_rng=obj["numpy_rng"],
            losses=[float(v) for v in obj["losses"]],
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(
            f"{p}: damaged adaptation checkpoint ({type(exc).__name__}: {exc})"
        ) from None
