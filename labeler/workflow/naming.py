"""Names people read for model versions: short in lists, the details on the model screen.

The store keeps each version's exact name (the cold-start rule's name spells out its
settings, so the same settings find the same version again). That name is for the
program; a person scanning a queue column or ``labeler status`` wants a short one:

* the cold-start rule (a vegetation colour index, no training) is ``colour rule``, and
  ``colour rule 2``, ``colour rule 3``, ... when the settings changed and a further rule
  version was stored;
* a trained head keeps its own name (``head-3``: already short).

:func:`model_details` spells out what the short name leaves out, for the model screen.
"""

from __future__ import annotations

from collections.abc import Sequence

from labeler.store.records import ModelVersionRecord

__all__ = ["COLD_START_LABEL", "model_label", "model_labels", "model_details"]

#: Short name of the cold-start rule in lists.
COLD_START_LABEL = "colour rule"


def model_labels(versions: Sequence[ModelVersionRecord]) -> dict[int, str]:
    """The short name of every version, by id.

    Parameters
    ----------
    versions : sequence of ModelVersionRecord
        All of the project's versions, oldest first (their order numbers the rules).

    Returns
    -------
    dict of int to str
    """
    out: dict[int, str] = {}
    rules = 0
    for v in versions:
        if v.kind == "cold_start":
            rules += 1
            out[v.id] = COLD_START_LABEL if rules == 1 else f"{COLD_START_LABEL} {rules}"
        else:
            out[v.id] = v.name
    return out


def model_label(version: ModelVersionRecord, versions: Sequence[ModelVersionRecord]) -> str:
    """The short name of ``version`` among the project's versions.

    Parameters
    ----------
    version : ModelVersionRecord
        The version named.
    versions : sequence of ModelVersionRecord
        All of the project's versions, oldest first.

    Returns
    -------
    str
    """
    return model_labels(versions).get(version.id, version.name)


def model_details(version: ModelVersionRecord) -> str:
    """What a version is, in a line: the rule's settings, or a head's training.

    Parameters
    ----------
    version : ModelVersionRecord

    Returns
    -------
    str
        E.g. ``"vegetation colour index ExG - ExR (ExR weight 1.4), threshold zero,
        objects from 24 px; no training"`` for the cold-start rule.
    """
    d = version.details or {}
    if version.kind == "cold_start":
        parts = ["vegetation colour index ExG - ExR"]
        if "exr_coefficient" in d:
            parts[0] += f" (ExR weight {d['exr_coefficient']:g})"
        if "threshold" in d:
            parts.append(f"threshold {d['threshold']}")
        if "min_object_px" in d:
            parts.append(f"objects from {d['min_object_px']} px")
        return ", ".join(parts) + "; no training"
    text = f"trained on {version.n_train_tiles} tiles"
    if version.encoder_version:
        text += f", encoder {version.encoder_version}"
    if d.get("best_epoch") is not None:
        text += f", weights of epoch {d['best_epoch']}"
    return text
