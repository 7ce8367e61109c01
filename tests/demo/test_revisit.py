"""A demo plot seen again: same ground and plants, grown, other light, frame moved."""

from __future__ import annotations

import json
from datetime import date

import numpy as np
import pytest

from labeler.demo.fields import make_plot, write_scenario
from labeler.demo.revisit import make_revisit
from labeler.imagery.capture_date import read_capture_time
from labeler.imagery.read import open_image
from labeler.imagery.revisits import Footprint, revisit_pairs
from labeler.imagery.tiling import Window

H, W = 96, 128


def test_same_plants_at_growth_one_only_the_frame_and_light_differ():
    first = make_plot("long-acre", seed=3, height=H, width=W)
    again = make_revisit("long-acre", seed=3, height=H, width=W, growth=1.0, shift=(4, 7))
    assert again.image.shape == (H - 4, W - 7, 3)
    np.testing.assert_array_equal(again.truth, first.truth[4:, 7:])
    assert not np.array_equal(again.image, first.image[4:, 7:])  # other light
    # the new frame's corner is the first frame's pixel corner (row 4, col 7)
    t, u = first.transform, again.transform
    assert (u.c, u.f) == pytest.approx((t.c + 7 * t.a + 4 * t.b, t.f + 7 * t.d + 4 * t.e), abs=1e-9)
    assert (u.a, u.b, u.d, u.e) == (t.a, t.b, t.d, t.e)
    assert again.metadata["frame_shift_px"] == [4, 7]


def test_plants_grow():
    first = make_plot("long-acre", seed=3, height=H, width=W)
    again = make_revisit("long-acre", seed=3, height=H, width=W, growth=1.2, shift=(0, 0))
    crop_then, crop_now = (first.truth == 1).sum(), (again.truth == 1).sum()
    assert crop_now > 1.2 * crop_then  # area grows faster than size (about 1.2 ** 2)


def test_scenario_with_revisits_carries_dates_and_gives_pairs(tmp_path):
    paths = write_scenario(tmp_path, n_plots=2, size=(H, W), revisits=1)
    assert [p.name for p in paths] == ["long-acre.tif", "mill-piece.tif", "long-acre-later.tif"]
    when = [read_capture_time(p).when.date() for p in paths]
    assert when == [date(2027, 5, 14), date(2027, 5, 14), date(2027, 5, 28)]
    scenario = json.loads((tmp_path / "scenario.json").read_text())
    assert [e["captured"] for e in scenario["plots"]] == ["2027-05-14"] * 2 + ["2027-05-28"]
    prints = []
    for p, d in zip(paths, when, strict=True):
        with open_image(p) as r:
            g = r.info.georef
            prints.append(Footprint(p.stem, g.transform, g.crs, r.info.height, r.info.width, d))
    pairs = revisit_pairs(prints, {"long-acre": [Window(0, 0, 64, 64)]})
    assert len(pairs) == 1 and pairs[0].image_b == "long-acre-later" and pairs[0].days == 14
    assert pairs[0].window_b == Window(0, 0, 58, 55)  # shifted by the default (6, 9)


def test_errors():
    with pytest.raises(ValueError, match=r"shift: expected 0 <= rows < 96"):
        make_revisit("long-acre", seed=1, height=H, width=W, shift=(-1, 0))
    with pytest.raises(ValueError, match="growth: expected a size factor in 0.5..2"):
        make_plot("long-acre", seed=1, height=H, width=W, growth=3.0)
    with pytest.raises(ValueError, match="revisits: expected 0 to n_plots"):
        write_scenario("unused", n_plots=1, revisits=2)
