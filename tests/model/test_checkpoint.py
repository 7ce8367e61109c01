import math
import pickle

import numpy as np
import pytest
import torch

from labeler.model.checkpoint import load_checkpoint, save_checkpoint
from labeler.model.head import HeadConfig, ProposalHead


class Payload:
    """An arbitrary object: weights_only loading must refuse to rebuild it."""

    def __reduce__(self):
        return (print, ("this must never run",))


def _head():
    torch.manual_seed(0)
    return ProposalHead(HeadConfig(class_indices=(0, 1, 3), width=8))


def test_round_trip(tmp_path):
    head = _head()
    path = save_checkpoint(
        tmp_path / "m" / "head.pt",
        head,
        encoder_version="lite0-x-r1",
        val_iou=[0.9, math.nan, 0.5],
        extra={"epochs": 3, "note": "plot 7"},
    )
    loaded, meta = load_checkpoint(path)
    assert meta.class_indices == (0, 1, 3) and meta.encoder_version == "lite0-x-r1"
    assert meta.val_iou[0] == 0.9 and math.isnan(meta.val_iou[1]) and meta.val_iou[2] == 0.5
    assert meta.extra == {"epochs": 3, "note": "plot 7"}
    for (k, a), (_, b) in zip(head.state_dict().items(), loaded.state_dict().items(), strict=True):
        torch.testing.assert_close(a, b, rtol=0, atol=0, msg=k)
    assert not loaded.training
    assert [p.name for p in path.parent.iterdir()] == ["head.pt"]  # no temporary left


def test_pickled_object_is_refused(tmp_path):
    path = tmp_path / "evil.pt"
    torch.save({"format": "labeler-head", "payload": Payload()}, path)
    with pytest.raises(ValueError, match=r"evil\.pt: refused, not a plain-data head checkpoint"):
        load_checkpoint(path)
    raw = tmp_path / "raw.pt"
    raw.write_bytes(pickle.dumps(Payload()))
    with pytest.raises(ValueError, match=r"raw\.pt: refused"):
        load_checkpoint(raw)


def test_other_files_are_refused(tmp_path):
    path = tmp_path / "plain.pt"
    torch.save({"weights": torch.zeros(2)}, path)
    with pytest.raises(ValueError, match=r"plain\.pt: not a labeler head checkpoint"):
        load_checkpoint(path)
    with pytest.raises(ValueError, match=r"missing\.pt: no such checkpoint file"):
        load_checkpoint(tmp_path / "missing.pt")


def test_state_that_does_not_fit_is_refused(tmp_path):
    path = save_checkpoint(tmp_path / "h.pt", _head(), encoder_version="v", val_iou=[1, 1, 1])
    obj = torch.load(path, weights_only=True)
    obj["config"]["width"] = 16
    torch.save(obj, path)
    with pytest.raises(ValueError, match=r"h\.pt: damaged checkpoint"):
        load_checkpoint(path)


def test_save_checks_its_inputs(tmp_path):
    with pytest.raises(ValueError, match=r"val_iou: expected 3 values \(one per class\), got 2"):
        save_checkpoint(tmp_path / "a.pt", _head(), encoder_version="v", val_iou=np.ones(2))
    with pytest.raises(
        ValueError, match=r"extra\['x'\]: expected a str, int, float or bool, got list"
    ):
        save_checkpoint(
            tmp_path / "a.pt", _head(), encoder_version="v", val_iou=np.ones(3), extra={"x": [1]}
        )


def test_refining_head_round_trips(tmp_path):
    torch.manual_seed(1)
    head = ProposalHead(HeadConfig(class_indices=(0, 1, 3), width=8, refine_channels=4))
    path = save_checkpoint(tmp_path / "r.pt", head, encoder_version="v", val_iou=[1, 1, 1])
    loaded, meta = load_checkpoint(path)
    assert meta.config.refine_channels == 4 and loaded.refiner is not None
    for (k, a), (_, b) in zip(head.state_dict().items(), loaded.state_dict().items(), strict=True):
        torch.testing.assert_close(a, b, rtol=0, atol=0, msg=k)


def test_checkpoint_of_the_previous_format_asks_for_retraining(tmp_path):
    path = save_checkpoint(tmp_path / "old.pt", _head(), encoder_version="v", val_iou=[1, 1, 1])
    obj = torch.load(path, weights_only=True)
    obj["format_version"] = 1  # heads written before the refinement existed
    obj["config"].pop("refine_channels")
    torch.save(obj, path)
    with pytest.raises(
        ValueError,
        match=r"old\.pt: checkpoint format version 1, this labeler reads 2 and 3; retrain the head "
        r"\('labeler retrain'\)",
    ):
        load_checkpoint(path)
