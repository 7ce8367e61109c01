"""Adapted encoder versions: weights round-trip, plain data only, version names."""

from __future__ import annotations

import hashlib
import io

import pytest
import torch

from labeler.model.adapted import (
    adapted_version,
    inference_encoder,
    load_encoder_weights,
    save_encoder_weights,
    state_digest,
    trainable_encoder,
)
from labeler.model.encoder import load_encoder


@pytest.fixture(scope="module")
def nudged():
    """ImageNet weights with one bias moved: stands for an adapted encoder."""
    encoder = trainable_encoder()
    state = {k: v.clone() for k, v in encoder.state_dict().items()}
    state["blocks.15.project.bn.bias"] += 0.25
    return encoder.version, state


def test_digest_is_sha256_of_names_shapes_and_float32_bytes():
    # reference: hashlib's SHA-256 (FIPS 180-4) of the bytes spelled out by hand
    state = {"w": torch.tensor([[1.0, 2.0]]), "b": torch.tensor([0.5], dtype=torch.float64)}
    h = hashlib.sha256()
    h.update(b"w:(1, 2);" + torch.tensor([[1.0, 2.0]]).numpy().tobytes())
    h.update(b"b:(1,);" + torch.tensor([0.5]).numpy().tobytes())
    assert state_digest(state) == h.hexdigest()


def test_version_names_keep_their_root(nudged):
    root, state = nudged
    v = adapted_version(root, state)
    assert v == f"{root}-ssl-{state_digest(state)[:12]}"
    assert adapted_version(v, state) == v  # an adapted start does not make names grow


def test_weights_round_trip_into_an_encoder_of_that_version(nudged, tmp_path):
    root, state = nudged
    version = adapted_version(root, state)
    path = save_encoder_weights(
        tmp_path / "encoder-1.pt", state, version=version, base_version=root,
        details={"method": "dense", "steps": 3, "note": None},
    )
    back = load_encoder_weights(path)
    assert (back.version, back.base_version, back.details) == (
        version, root, {"method": "dense", "steps": 3, "note": None},
    )
    assert all(torch.equal(back.state_dict[k], state[k]) for k in state)
    enc = trainable_encoder(back)
    assert enc.version == version and not enc.training
    assert all(torch.equal(enc.state_dict()[k], state[k]) for k in state)
    # folded for features: the same outputs to float rounding, another than ImageNet's
    x = torch.rand(1, 3, 64, 64) * 255
    folded = inference_encoder(back)
    assert folded.version == version
    with torch.no_grad():
        a, b, c = enc(x)[-1], folded(x)[-1], load_encoder()(x)[-1]
    torch.testing.assert_close(b, a, rtol=1e-4, atol=1e-4)
    assert (a - c).abs().max() > 1e-3


def test_refuses_files_that_are_not_plain_encoder_weights(tmp_path):
    with pytest.raises(ValueError, match="no such encoder weights file"):
        load_encoder_weights(tmp_path / "none.pt")
    buf = io.BytesIO()
    torch.save({"format": "labeler-head"}, buf)
    (tmp_path / "head.pt").write_bytes(buf.getvalue())
    with pytest.raises(ValueError, match="not a labeler encoder file"):
        load_encoder_weights(tmp_path / "head.pt")
    buf = io.BytesIO()
    torch.save({"format": "labeler-encoder", "format_version": 1, "x": object()}, buf)
    (tmp_path / "code.pt").write_bytes(buf.getvalue())
    with pytest.raises(ValueError, match="refused, not a plain-data encoder weights file"):
        load_encoder_weights(tmp_path / "code.pt")
    with pytest.raises(ValueError, match=r"details\['bad'\]: expected a str, int, float, bool"):
        save_encoder_weights(tmp_path / "x.pt", {}, version="v", base_version="b", details={"bad": [1]})


def test_weights_of_another_network_do_not_load(tmp_path):
    path = save_encoder_weights(
        tmp_path / "e.pt", {"w": torch.zeros(2)}, version="lite0-x-ssl-y", base_version="b"
    )
    with pytest.raises(ValueError, match="encoder version lite0-x-ssl-y: the weights do not fit"):
        trainable_encoder(load_encoder_weights(path))


def test_weights_sent_as_bytes_load_and_damaged_ones_are_refused(nudged, tmp_path):
    from labeler.model.adapted import inference_encoder_from_bytes

    root, state = nudged
    version = adapted_version(root, state)
    good = save_encoder_weights(
        tmp_path / "e.pt", state, version=version, base_version=root
    ).read_bytes()
    encoder = inference_encoder_from_bytes(good, source="encoder x")
    assert encoder.version == version
    x = torch.full((1, 3, 64, 64), 100.0)
    reference = inference_encoder(load_encoder_weights(tmp_path / "e.pt"))
    with torch.no_grad():
        for a, b in zip(encoder(x), reference(x), strict=True):
            assert torch.equal(a, b)
    # a version name whose digest is not that of the weights it carries
    wrong = save_encoder_weights(
        tmp_path / "w.pt", trainable_encoder().state_dict(), version=version, base_version=root
    ).read_bytes()
    with pytest.raises(ValueError, match=r"encoder x: the weights do not match their version"):
        inference_encoder_from_bytes(wrong, source="encoder x")
    # adapted from another ImageNet encoder than the installed one
    other = "lite0-000000000000-r0"
    moved = save_encoder_weights(
        tmp_path / "o.pt", state, version=adapted_version(other, state), base_version=other
    ).read_bytes()
    with pytest.raises(ValueError, match=r"encoder x: adapted from encoder lite0-000000000000-r0"):
        inference_encoder_from_bytes(moved, source="encoder x")
    buf = io.BytesIO()
    torch.save({"format": "something else"}, buf)
    with pytest.raises(ValueError, match=r"encoder x: not a labeler encoder file"):
        inference_encoder_from_bytes(buf.getvalue(), source="encoder x")
    with pytest.raises(ValueError, match=r"encoder x: refused, not plain-data encoder weights"):
        inference_encoder_from_bytes(b"not a torch file", source="encoder x")
