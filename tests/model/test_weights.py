import hashlib
import os

import pytest
import torch

from labeler.model.encoder import Lite0Encoder
from labeler.model.weights import (
    WEIGHTS_FILE,
    WeightsMismatchError,
    map_state_dict,
    read_state_dict,
    source_key_map,
    weights_digest,
    weights_path,
)


@pytest.fixture(scope="module")
def source():
    return read_state_dict()


@pytest.fixture(scope="module")
def model():
    return Lite0Encoder()


def test_packaged_file_is_the_named_one():
    assert weights_path().name == WEIGHTS_FILE


def test_packaged_digest_starts_with_the_file_name_hash():
    # torch.hub names checkpoint files "<name>-<first 8 hex digits of the SHA-256>.pth"
    # (torch.hub.download_url_to_file / load_state_dict_from_url, check_hash)
    digest = weights_digest()
    assert len(digest) == 64 and digest.startswith(WEIGHTS_FILE.rsplit("-", 1)[1][:8])


def test_digest_is_the_sha256_of_the_bytes_and_follows_a_changed_file(tmp_path):
    path = tmp_path / "w.pth"
    path.write_bytes(b"first")
    # reference: the standard library's hashlib.sha256 of the whole content
    assert weights_digest(path) == hashlib.sha256(b"first").hexdigest()
    path.write_bytes(b"second, longer")
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))  # a new mtime for sure
    assert weights_digest(path) == hashlib.sha256(b"second, longer").hexdigest()


def test_mapping_covers_every_key_both_ways(source, model):
    key_map = source_key_map(model.expand_ratios)
    # the file's own key count, read from the file (296 for efficientnet-lite0-57934424.pth)
    assert set(key_map) == set(source)
    assert set(key_map.values()) == set(model.state_dict())
    state = map_state_dict(source, model.state_dict(), key_map=key_map)
    assert torch.equal(
        state["blocks.3.depthwise.conv.weight"], source["_blocks.3._depthwise_conv.weight"]
    )
    assert torch.equal(state["head.bn.running_var"], source["_bn1.running_var"])
    assert torch.equal(state["stem.bn.running_var"], source["_bn0.running_var"])


def test_missing_key_fails_naming_it(source, model):
    broken = dict(source)
    del broken["_blocks.7._bn1.running_var"]
    with pytest.raises(
        WeightsMismatchError, match=r"missing from the weights file: _blocks\.7\._bn1\.running_var"
    ):
        map_state_dict(broken, model.state_dict(), key_map=source_key_map(model.expand_ratios))


def test_unexpected_key_fails_naming_it(source, model):
    broken = dict(source)
    broken["_blocks.3._se_reduce.weight"] = torch.zeros(6, 144, 1, 1)
    with pytest.raises(
        WeightsMismatchError,
        match=r"unexpected in the weights file: _blocks\.3\._se_reduce\.weight",
    ):
        map_state_dict(broken, model.state_dict(), key_map=source_key_map(model.expand_ratios))


def test_shape_mismatch_fails_naming_it(source, model):
    broken = dict(source)
    broken["_fc.weight"] = torch.zeros(10, 1280)
    with pytest.raises(
        WeightsMismatchError, match=r"_fc\.weight: expected shape \(1000, 1280\).*got \(10, 1280\)"
    ):
        map_state_dict(broken, model.state_dict(), key_map=source_key_map(model.expand_ratios))


def test_mismatch_is_a_key_error_with_plain_message(source, model):
    broken = dict(source)
    del broken["_conv_stem.weight"]
    with pytest.raises(KeyError) as info:
        map_state_dict(broken, model.state_dict(), key_map=source_key_map(model.expand_ratios))
    assert str(info.value).startswith("encoder weights do not match")


def test_read_state_dict_refuses_non_weights(tmp_path):
    bad = tmp_path / "bad.pth"
    bad.write_bytes(b"not a torch file")
    with pytest.raises(ValueError, match=r"bad\.pth: not a loadable weights file"):
        read_state_dict(bad)
