"""The feature pyramid against torchvision's FeaturePyramidNetwork as the oracle."""

from __future__ import annotations

from collections import OrderedDict

import pytest
import torch
from torchvision.ops import FeaturePyramidNetwork

from labeler.model.pyramid import FeaturePyramid

CHANNELS = [8, 12, 16, 20]


def _stages(generator: torch.Generator) -> OrderedDict[str, torch.Tensor]:
    sizes = [16, 8, 4, 2]
    return OrderedDict(
        (f"s{i}", torch.randn(2, c, s, s + 1, generator=generator))
        for i, (c, s) in enumerate(zip(CHANNELS, sizes, strict=True))
    )


def test_same_seed_gives_torchvisions_parameters_name_for_name():
    # oracle: torchvision.ops.FeaturePyramidNetwork (no norm layers, no extra blocks)
    torch.manual_seed(3)
    ours = FeaturePyramid(CHANNELS, 6)
    torch.manual_seed(3)
    ref = FeaturePyramidNetwork(CHANNELS, 6)
    a, b = ours.state_dict(), ref.state_dict()
    assert list(a) == list(b)
    for name in a:
        torch.testing.assert_close(a[name], b[name], rtol=0, atol=0)


def test_outputs_equal_torchvisions_with_shared_weights():
    ref = FeaturePyramidNetwork(CHANNELS, 6)
    ours = FeaturePyramid(CHANNELS, 6)
    ours.load_state_dict(ref.state_dict())
    x = _stages(torch.Generator().manual_seed(7))
    with torch.no_grad():
        got, want = ours(x), ref(x)
    assert list(got) == list(want)
    for name in want:
        assert got[name].shape == (2, 6, *x[name].shape[-2:])
        torch.testing.assert_close(got[name], want[name], rtol=1e-6, atol=1e-6)


def test_bad_channels_width_and_stage_count_are_refused():
    with pytest.raises(ValueError, match="in_channels: expected one positive"):
        FeaturePyramid([], 4)
    with pytest.raises(ValueError, match="in_channels: expected one positive"):
        FeaturePyramid([4, 0], 4)
    with pytest.raises(ValueError, match="width: expected a positive"):
        FeaturePyramid([4], 0)
    pyramid = FeaturePyramid(CHANNELS, 4)
    stages = _stages(torch.Generator().manual_seed(1))
    del stages["s3"]
    with pytest.raises(ValueError, match="stages: expected 4 stage maps, got 3"):
        pyramid(stages)


def test_the_propose_path_does_not_import_torchvision():
    # the reason the module exists: a propose does not pay torchvision's import time
    import subprocess
    import sys

    code = ("import sys, labeler.model.predict, labeler.model.head; "
            "print('torchvision' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"
