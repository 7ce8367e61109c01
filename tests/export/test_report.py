"""The agreement report writer (labeler/export/report.py).

Scenario: an invented farm ("Hollow Ash"), its plots and annotators; demo data only.
"""

from __future__ import annotations

import base64
import csv
import io
import math
import re
from datetime import datetime, timedelta

import numpy as np
import pytest
from PIL import Image

from labeler import agreement as ag
from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass
from labeler.export import report as rp
from labeler.masks.overlay import overlay_mask

T0 = datetime(2025, 6, 2, 9, 0)


def build(n_plots: int = 4, tiles: bool = True):
    rng = np.random.default_rng(42)
    items, sources = [], {}
    for n in range(n_plots):
        a = rng.integers(0, 4, (40, 48)).astype(np.uint8)
        b = np.where(rng.random(a.shape) < 0.1 + 0.1 * n, rng.integers(0, 4, a.shape), a)
        b = b.astype(np.uint8)
        b[:4] = 255
        name = f"hollow-ash-{n}"
        masks = {"odile": a, "marek": b}
        windows = {"t0": (0, 0, 20, 24), "t1": (20, 24, 20, 24)} if tiles else {}
        items.append(ag.ComparedImage(name, masks, {"odile": T0 + timedelta(days=n),
                                                     "marek": T0 + timedelta(days=n)},
                                      tiles=windows))
        sources[name] = rp.OverlaySource(rng.integers(0, 256, (40, 48, 3), dtype=np.uint8),
                                         masks)
    return ag.summarise_agreement(items, schema=DEFAULT_SCHEMA), sources


def test_report_files_are_self_contained_and_complete(tmp_path):
    summary, sources = build()
    least = summary.least_agreed(10)
    wanted = {e.image for e in least}
    files = rp.write_agreement_report(
        summary, tmp_path / "out", schema=DEFAULT_SCHEMA,
        overlays={k: v for k, v in sources.items() if k in wanted}, title="Hollow Ash, June",
    )
    text = files.html.read_text(encoding="utf-8")
    assert "<title>Hollow Ash, June</title>" in text
    # self-contained: every image is a data URI, nothing is fetched from elsewhere
    srcs = re.findall(r'src="([^"]*)"', text)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert "href=" not in text
    for s in srcs:
        with Image.open(io.BytesIO(base64.b64decode(s.split(",", 1)[1]))) as im:
            assert im.format == "PNG"
    # one heat map (one pair), IoU bars, over time, and one strip per least agreed tile;
    # marek left rows 0-3 unlabelled, so the t0 tiles were not compared whole and are out
    assert len(least) == 4 and {e.tile for e in least} == {"t1"}
    assert len(files.plots) == 1 + 2 + len(least) == len(srcs)
    for p in files.plots:
        with Image.open(p) as im:
            im.verify()
    for name in DEFAULT_SCHEMA.names:
        assert name in text
    assert "licensed agronomist" in text and "decision support only" in text
    assert "marek / odile" in text
    # nothing half-written is left behind
    assert not [p for p in (tmp_path / "out").iterdir() if p.name.startswith(".")]


def test_least_agreed_lists_whole_tiles_and_names_each_column_once(tmp_path):
    summary, sources = build(n_plots=2)
    # by hand: t0 spans rows 0-19, marek's rows 0-3 are unlabelled, so 16 x 24 = 384 of
    # its 480 pixels are compared; t1 (rows 20-39) is compared whole
    tiles = {(t.image, t.tile): t.pixels_compared for img in summary.images for t in img.tiles}
    assert set(tiles.values()) == {384, 480}
    assert {(e.image, e.tile) for e in summary.least_agreed(10)} == {
        ("hollow-ash-0", "t1"), ("hollow-ash-1", "t1")
    }
    assert len(summary.least_agreed(10, whole_tiles=False)) == 4
    files = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA,
                                      overlays=sources)
    text = files.html.read_text(encoding="utf-8")
    head = text.split("least agreed tiles</h2>", 1)[1].split("</tr>", 1)[0]
    assert "kappa kappa" not in " ".join(re.findall(r"<th[^>]*>([^<]*)</th>", head))
    assert re.findall(r"<th[^>]*>([^<]*)</th>", head) == [
        "image", "tile", "Cohen&#x27;s kappa", "mean IoU", "pixels"
    ] or re.findall(r"<th[^>]*>([^<]*)</th>", head) == [
        "image", "tile", "Cohen's kappa", "mean IoU", "pixels"
    ]


def test_overlay_strip_shows_each_annotator(tmp_path):
    summary, sources = build(n_plots=1)
    files = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA,
                                      overlays=sources, least=1)
    strip = [p for p in files.plots if p.name.startswith("least_")]
    assert len(strip) == 1
    with Image.open(strip[0]) as im:
        arr = np.asarray(im)
    entry = summary.least_agreed(1)[0]
    r0, c0, h, w = entry.window
    zoom = max(1, 160 // max(h, w))
    # image panel + two annotators, 6 px gaps, each enlarged by whole pixels
    assert arr.shape == (h * zoom, 3 * w * zoom + 2 * 6, 3)
    src = sources[entry.image]
    crop = src.rgb[r0:r0 + h, c0:c0 + w]
    np.testing.assert_array_equal(arr[::zoom, : w * zoom : zoom], crop)
    # the second panel is marek's overlay (annotators in name order)
    start = w * zoom + 6
    expected = overlay_mask(crop, src.masks["marek"][r0:r0 + h, c0:c0 + w],
                               schema=DEFAULT_SCHEMA)
    np.testing.assert_array_equal(arr[::zoom, start: start + w * zoom: zoom], expected)


def test_csv_holds_every_figure(tmp_path):
    summary, _ = build()
    files = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA)
    with files.csv.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == rp.CSV_COLUMNS
    pair = summary.pairs[0]

    def get(**keys):
        hits = [r for r in rows if all(r[k] == v for k, v in keys.items())]
        assert len(hits) == 1, keys
        return hits[0]

    row = get(figure="pair", pair="marek / odile", metric="kappa")
    assert float(row["value"]) == pair.kappa and int(row["n"]) == pair.pixels_compared
    cells = [r for r in rows if r["figure"] == "confusion"]
    assert len(cells) == 16
    assert sum(int(r["value"]) for r in cells) == pair.pixels_compared
    cell = get(figure="confusion", **{"class": "crop"}, other_class="weed")
    assert int(cell["value"]) == pair.confusion[1, 2]
    weed = get(figure="class", metric="iou", **{"class": "weed"})
    assert float(weed["value"]) == summary.classes[2].iou
    assert len([r for r in rows if r["figure"] == "tile"]) == 3 * 2 * len(summary.images)
    days = [r for r in rows if r["figure"] == "day" and r["metric"] == "kappa"]
    assert [r["day"] for r in days] == [d.day.isoformat() for d in summary.days]
    assert get(figure="overall", metric="pixels_compared")["value"] == str(
        summary.overall.pixels_compared)


def test_undefined_figures_are_blank_in_csv_and_dash_in_table(tmp_path):
    left = np.full((6, 6), 255, np.uint8)
    left[:, :3] = 1
    right = np.full((6, 6), 255, np.uint8)
    right[:, 3:] = 2
    item = ag.ComparedImage("hollow-ash-9", {"odile": left, "marek": right},
                            {"odile": T0, "marek": T0})
    summary = ag.summarise_agreement([item], schema=DEFAULT_SCHEMA)
    files = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA)
    with files.csv.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    kappa = [r for r in rows if r["figure"] == "pair" and r["metric"] == "kappa"][0]
    assert kappa["value"] == "" and kappa["n"] == "0"
    table = rp.format_agreement_table(summary, schema=DEFAULT_SCHEMA)
    first = table.splitlines()[2].split()
    assert first[:4] == ["marek", "/", "odile", "all"]
    assert first[4:] == ["-", "undefined", "-", "0"]
    assert "The 0 least agreed images" in files.html.read_text(encoding="utf-8")


def test_format_agreement_table_columns_align():
    summary, _ = build()
    table = rp.format_agreement_table(summary, schema=DEFAULT_SCHEMA)
    lines = table.rstrip("\n").splitlines()
    assert lines[0].split() == ["pair", "class", "kappa", "band", "IoU", "images"]
    # rows: (1 pair + all pairs) x (1 + 4 classes), a header and a rule
    assert len(lines) == 2 + 2 * 5
    # the right-aligned numbers end in the same column as their header
    end_kappa = lines[0].index("kappa") + len("kappa")
    end_images = len(lines[0])
    pair = summary.pairs[0]
    for line in lines[2:]:
        assert re.fullmatch(r"-?\d\.\d{3}|-", line[end_kappa - 5:end_kappa].strip())
        assert line.endswith(str(pair.images_compared))
        assert len(line) == end_images
    assert f"{pair.kappa:.3f}" in lines[2] and pair.band in lines[2]
    weed_row = [ln for ln in lines if " weed " in ln][0]
    assert f"{pair.iou[2]:.3f}" in weed_row


def test_schema_mismatch_and_bad_options(tmp_path):
    summary, _ = build(n_plots=1)
    other = ClassSchema([LabelClass(0, "soil", None), LabelClass(1, "crop", "#0072B2")])
    with pytest.raises(ValueError, match="schema: classes .* differ from the summary's"):
        rp.write_agreement_report(summary, tmp_path, schema=other)
    with pytest.raises(ValueError, match="schema: classes"):
        rp.format_agreement_table(summary, schema=other)
    with pytest.raises(ValueError, match="max_panel_px: expected at least 16 pixels"):
        rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA, max_panel_px=4)
    with pytest.raises(TypeError, match="summary: expected an AgreementSummary"):
        rp.write_agreement_report({}, tmp_path, schema=DEFAULT_SCHEMA)


def test_large_images_are_subsampled_and_reports_replace(tmp_path):
    rng = np.random.default_rng(5)
    a = rng.integers(0, 4, (300, 230)).astype(np.uint8)
    b = a.copy()
    b[:100] = 0
    item = ag.ComparedImage("hollow-ash-big", {"odile": a, "marek": b},
                            {"odile": T0, "marek": T0})
    summary = ag.summarise_agreement([item], schema=DEFAULT_SCHEMA)
    src = rp.OverlaySource(rng.integers(0, 256, (300, 230, 3), dtype=np.uint8),
                           {"odile": a, "marek": b})
    first = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA,
                                      overlays={"hollow-ash-big": src}, max_panel_px=100)
    strip = [p for p in first.plots if p.name.startswith("least_")][0]
    with Image.open(strip) as im:
        # step ceil(300 / 100) = 3: panels of 100 x 77 (then enlarged 160 // 100 = 1 time)
        assert im.size == (3 * 77 + 12, 100)
    again = rp.write_agreement_report(summary, tmp_path, schema=DEFAULT_SCHEMA, title="again")
    assert "<title>again</title>" in again.html.read_text(encoding="utf-8")
    assert not math.isnan(summary.images[0].agreement)


def test_effort_section_shows_each_model_version(tmp_path):
    # hand-made rows of the effort figures (labeler.workflow.VersionEffort); common
    # practice, no source
    from labeler.workflow import VersionEffort

    summary, _ = build(n_plots=1)
    rows = [VersionEffort(1, "cold-start", 3, 4.0, 30.0, 1 / 3),
            VersionEffort(2, "head-1", 2, 1.5, 2.5, 0.5)]
    text = rp.write_agreement_report(summary, tmp_path / "a", schema=DEFAULT_SCHEMA,
                                     effort=rows).html.read_text(encoding="utf-8")
    assert "Annotation effort per model version" in text
    cells = re.findall(r"<td[^>]*>([^<]*)</td>", text)
    for row in (["cold-start", "3", "4", "30.0", "33 %"], ["head-1", "2", "1.5", "2.5", "50 %"]):
        i = cells.index(row[0])
        assert cells[i:i + 5] == row
    empty = rp.write_agreement_report(summary, tmp_path / "b", schema=DEFAULT_SCHEMA)
    assert "No save from a proposal yet." in empty.html.read_text(encoding="utf-8")
