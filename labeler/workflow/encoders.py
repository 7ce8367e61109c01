"""Encoder versions of a project: the ImageNet-1k encoder and every adapted one.

``labeler adapt`` (:mod:`labeler.workflow.adapting`) keeps each adapted encoder as a
model-version row of kind ``"encoder"`` (``encoder-<n>``, numbered by the database) with
its weights file's bytes in the project's database, so every machine of a team can use
it; each machine reads them through its own copy ``<project>/models/encoder-<sha256[:12]>.pt``
(written once, read with ``torch.load(..., weights_only=True)``;
:mod:`labeler.model.adapted`). Older versions stay in the database and selectable; retrain and propose use the newest one unless
told otherwise (:func:`labeler.workflow.features.encoder_and_cache`), and a head always
reads the encoder version it was trained on.

A version is chosen by the name of its row (``"encoder-2"``), by its version string
(``"lite0-...-ssl-..."``), or as :data:`IMAGENET` for the installed ImageNet-1k weights.
"""

from __future__ import annotations

import uuid
from collections.abc import Mapping
from typing import TYPE_CHECKING

from labeler.errors import LabelerError
from labeler.fileio import remove_file
from labeler.project import Project
from labeler.store.records import ModelVersionRecord

if TYPE_CHECKING:  # the model room is imported only when a function here is called
    from labeler.model.encoder import Lite0Encoder

__all__ = [
    "IMAGENET",
    "ENCODER_KIND",
    "encoder_versions",
    "find_encoder_version",
    "load_encoder_version",
    "save_encoder_version",
]

#: Name that selects the installed ImageNet-1k encoder.
IMAGENET = "imagenet"
#: Kind of the model-version rows of adapted encoders.
ENCODER_KIND = "encoder"


def encoder_versions(project: Project) -> list[ModelVersionRecord]:
    """The adapted encoder versions of a project.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of ModelVersionRecord
        Rows of kind ``"encoder"``, oldest first (the ImageNet encoder has no row).
    """
    return [m for m in project.store.model_versions() if m.kind == ENCODER_KIND]


def find_encoder_version(project: Project, which: str | None = None) -> ModelVersionRecord | None:
    """The adapted encoder version ``which`` names (the newest when None).

    Parameters
    ----------
    project : Project
        An open project.
    which : str, optional
        A row name (``"encoder-2"``), a version string, or :data:`IMAGENET`.

    Returns
    -------
    ModelVersionRecord or None
        None for the ImageNet encoder: asked for by name, a version string no row
        holds that is the ImageNet encoder's (the caller checks), or no adapted
        version yet when ``which`` is None.

    Raises
    ------
    LabelerError
        If ``which`` names no version of the project (the message lists them).
    """
    versions = encoder_versions(project)
    if which is None:
        return versions[-1] if versions else None
    if which == IMAGENET:
        return None
    for m in reversed(versions):
        if which in (m.name, m.encoder_version):
            return m
    if "-ssl-" not in which and which.startswith("lite0-"):
        return None  # an ImageNet version string; load_encoder_version checks it
    known = ", ".join([IMAGENET] + [m.name for m in versions])
    raise LabelerError(f"encoder {which!r}: no such encoder version in this project; choose one of {known}")


def load_encoder_version(
    project: Project, which: str | None = None, *, trainable: bool = False
) -> Lite0Encoder:
    """The encoder of a version (the newest adapted one, or ImageNet-1k, when None).

    Parameters
    ----------
    project : Project
        An open project.
    which : str, optional
        As :func:`find_encoder_version`.
    trainable : bool
        Unfolded float32 weights for more adaptation; else folded and frozen for features.

    Returns
    -------
    labeler.model.encoder.Lite0Encoder
        Its ``version`` is the version's string.

    Raises
    ------
    LabelerError
        If the version is unknown, its weights file is missing or unreadable, or an
        ImageNet version string is not the installed encoder's.
    """
    from labeler.model.adapted import inference_encoder, load_encoder_weights, trainable_encoder

    record = find_encoder_version(project, which)
    weights = None
    if record is not None:
        path = project.model_file(record)
        try:
            weights = load_encoder_weights(path)
            encoder = trainable_encoder(weights) if trainable else inference_encoder(weights)
        except ValueError as exc:
            raise LabelerError(str(exc)) from None
        if encoder.version != record.encoder_version:
            raise LabelerError(
                f"{path}: holds encoder version {encoder.version}, the project records "
                f"{record.encoder_version} for {record.name}; the file was replaced"
            )
        return encoder
    encoder = trainable_encoder() if trainable else inference_encoder()
    if which not in (None, IMAGENET) and which != encoder.version:
        raise LabelerError(
            f"encoder {which!r}: not the installed ImageNet encoder ({encoder.version}) "
            "nor an adapted version of this project; retrain the head ('labeler retrain')"
        )
    return encoder


def save_encoder_version(
    project: Project,
    state: Mapping,
    *,
    base_version: str,
    root_version: str,
    details: Mapping[str, object],
) -> ModelVersionRecord:
    """Keep adapted weights as a new encoder version: weights file and store row.

    Parameters
    ----------
    project : Project
        An open project.
    state : mapping of str -> Tensor
        The unfolded encoder's state dict.
    base_version : str
        The version the adaptation started from.
    root_version : str
        The installed ImageNet encoder's version (the version name's root).
    details : mapping
        Plain scalars describing the run (stored in the file and the row).

    Returns
    -------
    ModelVersionRecord
        The new row (kind ``"encoder"``, named ``encoder-<n>`` by the database;
        ``checkpoint`` is this machine's copy, relative to the project).
    """
    from labeler.model.adapted import adapted_version, save_encoder_weights
    from labeler.model.checkpoint import keep_weights_file

    version = adapted_version(root_version, state)
    # the weights file is made in a scratch file, kept by the database (which numbers
    # the version) and copied to this machine's models/ under its SHA-256
    scratch = project.models_dir / f".{ENCODER_KIND}-{uuid.uuid4().hex}.partial"
    try:
        save_encoder_weights(
            scratch, state, version=version, base_version=base_version, details=details
        )
        data = scratch.read_bytes()
    finally:
        remove_file(scratch)
    path = keep_weights_file(project.models_dir, ENCODER_KIND, data)
    return project.store.add_model_version(
        kind=ENCODER_KIND,
        weights=data,
        encoder_version=version,
        checkpoint=str(path.relative_to(project.root)),
        details={"base_version": base_version, **dict(details)},
    )
