"""``labeler import`` as a save like any other (labeler/workflow/importing.py).

The project is the invented 300 x 500 GeoTIFF of tests/workflow/conftest.py, cut into
2 x 3 tiles of 256 px (rows start at 0 and 44, columns at 0, 122 and 244).
"""

from __future__ import annotations

import hashlib
import os
import re

import numpy as np
import pytest
import sqlalchemy as sa

from labeler.cli import main
from labeler.errors import LabelerError, MaskImportError
from labeler.imagery.write import write_png
from labeler.project import open_project
from labeler.workflow import (
    accept_tile,
    export_project,
    import_masks,
    project_status,
    queue_rows,
    save_tile_mask,
)
from labeler.workflow import importing as importing_module
from tests.export.pngs import header_only_png, raw_png
from tests.workflow.conftest import fake_proposals

SHAPE = (300, 500)


def full_mask(value: int) -> np.ndarray:
    return np.full(SHAPE, value, np.uint8)


def noisy(seed: int) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 4, SHAPE).astype(np.uint8)


def put(tmp_path, array, name="east-block_mask.png"):
    path = tmp_path / name
    write_png(path, array)
    return path


def project_fingerprint(project) -> tuple:
    """Every file (name, size, SHA-256) of the project folder and every database row.

    The database is compared by its rows (every table, read through SQLAlchemy on either
    backend), not by its bytes, which a checkpoint may rewrite without changing a row.
    """
    files = []
    for path in sorted(project.root.rglob("*")):
        if path.is_file() and not path.name.startswith("labeler.db"):
            data = path.read_bytes()
            files.append((str(path.relative_to(project.root)), len(data),
                          hashlib.sha256(data).hexdigest()))
    engine = sa.create_engine(project.settings.db_url)
    try:
        meta = sa.MetaData()
        meta.reflect(engine)
        with engine.connect() as conn:
            rows = {
                name: [tuple(r) for r in conn.execute(
                    table.select().order_by(*(table.primary_key.columns or table.columns)))]
                for name, table in sorted(meta.tables.items())
            }
    finally:
        engine.dispose()
    return tuple(files), rows


def states(project) -> list[str]:
    return [t.state for t in project.store.tiles()]


# -- outcomes ------------------------------------------------------------------------------


def test_fresh_import_full_weak_and_not_covered(project, tmp_path):
    t = project.store.tiles()
    m = np.full(SHAPE, 255, np.uint8)
    m[0:256, 0:256] = 1  # covers the first tile whole and touches all others
    res = import_masks(project, [put(tmp_path, m)], annotator="survey")
    assert (res.saved_full, res.saved_weak) == ([t[0].id], [x.id for x in t[1:]])
    assert states(project) == ["imported"] + ["unseen"] * 5  # a weak label keeps the state
    ann = project.store.latest_annotation(t[0].id)
    assert (ann.state, ann.kind, ann.parent_version, ann.source) == (
        "imported", "full", None, "import:east-block_mask.png")
    np.testing.assert_array_equal(ann.mask(), m[t[0].window.slices])
    # a file touching only the first tile leaves the others alone
    small = np.full(SHAPE, 255, np.uint8)
    small[0:10, 0:10] = 2
    res = import_masks(project, [put(tmp_path, small, "east-block.png")], annotator="survey")
    assert res.saved_weak == [t[0].id] and res.not_covered == [x.id for x in t[1:]]
    assert states(project)[0] == "imported"  # the weak label keeps the saved state


def test_reviewed_work_is_skipped_unless_replace(project, tmp_path):
    store = project.store
    fake_proposals(project)
    t = store.tiles()
    save_tile_mask(project, t[1].id, "tomas", np.full(t[1].shape, 2, np.uint8),
                   parent_version=None)
    save_tile_mask(project, t[2].id, "tomas", np.full(t[2].shape, 255, np.uint8),
                   parent_version=None, kind="scribble")
    accept_tile(project, t[3].id, "tomas")
    save_tile_mask(project, t[4].id, "ines", np.full(t[4].shape, 1, np.uint8),
                   parent_version=None)
    path = put(tmp_path, full_mask(3))
    res = import_masks(project, [path], annotator="ines")
    assert res.saved_full == [t[0].id, t[4].id, t[5].id]  # ines may replace her own mask
    assert res.skipped == {"others": [t[1].id, t[2].id, t[3].id]} and res.replaced == []
    assert states(project) == ["imported", "amended", "proposed", "accepted", "imported",
                               "imported"]
    assert [(a.annotator, a.version, a.parent_version) for a in
            store.annotation_history(t[4].id)] == [("ines", 1, None), ("ines", 2, 1)]
    # the same file again: nothing new to save
    again = import_masks(project, [path], annotator="ines")
    assert again.unchanged == [t[0].id, t[4].id, t[5].id] and again.saved_full == []
    assert again.skipped == {"others": [t[1].id, t[2].id, t[3].id]}
    before = {x.id: store.annotation_history(x.id) for x in t[1:4]}
    res = import_masks(project, [path], annotator="ines", replace=True)
    assert res.saved_full == res.replaced == [t[1].id, t[2].id, t[3].id]
    assert res.unchanged == [t[0].id, t[4].id, t[5].id] and res.skipped == {}
    for x in t[1:4]:
        history = store.annotation_history(x.id)
        assert history[:-1] == before[x.id]  # the replaced versions stay in the history
        assert (history[-1].annotator, history[-1].parent_version) == ("ines", 1)
    assert states(project) == ["imported"] * 6
    assert res.summary_lines() == [
        f"{path} -> image east-block",
        "imported 3 full masks and 0 partial masks (weak labels) as ines",
        f"replaced reviewed work on 3 tiles (--replace; the earlier versions stay in the "
        f"history): tiles {t[1].id}, {t[2].id}, {t[3].id}",
        "3 tiles already held these masks; nothing saved",
    ]
    event = store.events(kind="import")[-1]
    assert event.annotator == "ines" and event.detail["replaced"] == res.replaced


def test_settled_contested_and_overlap_tiles(overlap_project, tmp_path):
    project = overlap_project
    store = project.store
    t = store.tiles()
    assert all(x.overlap for x in t)
    rng = np.random.default_rng(5)

    def noise(tile):
        return rng.integers(0, 4, tile.shape).astype(np.uint8)

    for tile in t[:2]:  # two annotators disagree: contested
        save_tile_mask(project, tile.id, "tomas", noise(tile), parent_version=None)
        save_tile_mask(project, tile.id, "ines", noise(tile), parent_version=None)
    assert states(project)[:2] == ["contested", "contested"]
    settle_from = store.lineage_head(t[1].id, "rev", settling=True)
    save_tile_mask(project, t[1].id, "rev", noise(t[1]), parent_version=settle_from,
                   settling=True)
    save_tile_mask(project, t[2].id, "tomas", noise(t[2]), parent_version=None)
    path = put(tmp_path, full_mask(3))
    res = import_masks(project, [path], annotator="survey")
    assert res.skipped == {"contested": [t[0].id], "settled": [t[1].id]}
    # on an overlap tile the import stands beside tomas's mask and is compared with it
    assert res.saved_full == [x.id for x in t[2:]]
    assert states(project) == ["contested", "settled", "contested", "imported", "imported",
                               "imported"]
    assert store.savers(t[2].id) == ["survey", "tomas"]
    res = import_masks(project, [path], annotator="survey", replace=True)
    assert res.skipped == {"contested": [t[0].id]}  # never, even with --replace
    assert res.replaced == res.saved_full == [t[1].id]
    history = store.annotation_history(t[1].id)
    assert [(a.annotator, a.state) for a in history[-2:]] == [("rev", "settled"),
                                                              ("survey", "imported")]
    assert history[-1].parent_version == history[-2].version
    # as after an editor save, the tile's annotators are compared again: tomas and ines
    # still disagree, so the tile waits for a reviewer once more
    assert states(project)[:2] == ["contested", "contested"]


def test_a_save_while_the_import_runs_is_never_overwritten(project, tmp_path):
    t = project.store.tiles()
    other = open_project(project.root)
    saved = []

    def progress(done, total, label):
        if not saved:  # the files are being read; someone saves the last tile meanwhile
            saved.append(save_tile_mask(other, t[5].id, "tomas", np.full(t[5].shape, 2, np.uint8),
                                        parent_version=None))

    try:
        res = import_masks(project, [put(tmp_path, full_mask(1))], annotator="ines",
                           progress=progress)
    finally:
        other.close()
    assert res.skipped == {"changed": [t[5].id]}
    assert res.saved_full == [x.id for x in t[:5]]
    assert project.store.annotation_history(t[5].id) == [saved[0]]
    assert res.summary_lines()[-1] == (
        "skipped 1 tiles saved by someone else while this import ran; nothing was overwritten "
        f"(import again to see them): tiles {t[5].id}")


def test_two_imports_at_once_never_replace_each_other(project, tmp_path):
    first_path = put(tmp_path, full_mask(1), "east-block.png")
    second_path = put(tmp_path, noisy(3), "east-block_mask.png")
    other = open_project(project.root)
    second = []

    def progress(done, total, label):
        if not second:  # the second import runs whole while the first reads its file
            second.append(import_masks(other, [second_path], annotator="tomas"))

    try:
        first = import_masks(project, [first_path], annotator="ines", progress=progress)
    finally:
        other.close()
    ids = [x.id for x in project.store.tiles()]
    assert second[0].saved_full == ids
    assert first.saved_full == [] and first.skipped == {"changed": ids}
    for tile_id in ids:  # one version per tile: tomas's, untouched
        assert [a.annotator for a in project.store.annotation_history(tile_id)] == ["tomas"]
    # run again, the first import now sees tomas's masks as reviewed work
    assert import_masks(project, [first_path], annotator="ines").skipped == {"others": ids}


# -- the imported state everywhere a saved state counts ----------------------------------


def test_imported_tiles_in_status_queue_and_export(project, tmp_path, capsys):
    import_masks(project, [put(tmp_path, full_mask(2))], annotator="survey")
    assert project_status(project).by_state["imported"] == 6
    assert {r.state for r in queue_rows(project)} == {"imported"}
    assert {r.saved_by for r in queue_rows(project)} == {("survey",)}
    result = export_project(project, tmp_path / "out", formats="masks")
    assert result.tiles_exported == 6  # imported masks are exported by default
    assert project.store.available_for("tomas") == []  # saved: not handed out again
    assert main(["status", str(project.root)]) == 0
    assert "imported" in capsys.readouterr().out


def test_import_reads_one_band_of_rows_at_a_time(project, tmp_path, monkeypatch):
    asked = []
    real = importing_module.open_mask_file

    def spying_open(*args, **kwargs):
        source = real(*args, **kwargs)
        read = source.read_rows

        def read_rows(start, stop):
            asked.append((start, stop))
            return read(start, stop)

        source.read_rows = read_rows
        return source

    monkeypatch.setattr(importing_module, "open_mask_file", spying_open)
    import_masks(project, [put(tmp_path, full_mask(1))], annotator="survey")
    assert asked == [(0, 256), (44, 300)]  # one band per row of tiles, never the whole mask


# -- bad input: one clear error, the project unchanged ---------------------------------------


def _bad_inputs(tmp_path):
    """(name, files, options, error type, message pattern) of inputs that import nothing."""
    cases = []

    def case(label, files, match, error=MaskImportError, **options):
        cases.append((label, files, options, error, match))

    deep = tmp_path / "east-block.geojson"
    deep.write_text("[" * 200_000 + "]" * 200_000)
    case("nested 200000 deep", [deep], r"east-block.geojson: not GeoJSON: its JSON is nested")
    broken = tmp_path / "b" / "east-block.geojson"
    broken.parent.mkdir()
    broken.write_text('{"type": "FeatureCollection", "features": [')
    case("malformed GeoJSON", [broken], r"east-block.geojson: not valid JSON")
    small = put(tmp_path, np.zeros((10, 10), np.uint8), "c.png")
    case("wrong size", [small], r"c.png: mask is 10 x 10 pixels .* image is 300 x 500",
         image="east-block")
    wide = tmp_path / "d.png"
    w16 = full_mask(1).astype(np.uint16)
    w16[299, 499] = 1000
    wide.write_bytes(raw_png(w16, colour_type=0))
    case("16-bit", [wide], r"d.png: 16-bit grey mask holds values up to 1000 \(in rows 256..299\)",
         image="east-block")
    grey = put(tmp_path, np.full(SHAPE, 128, np.uint8), "e.png")
    case("grey picture", [grey], r"e.png: holds values \[128\] that are not class indices",
         image="east-block")
    alpha = tmp_path / "f.png"
    la = np.stack([full_mask(1), full_mask(255)], axis=2)
    la[290, 10, 1] = 0
    alpha.write_bytes(raw_png(la, colour_type=4))
    case("alpha", [alpha], r"f.png: the mask has transparent pixels", image="east-block")
    rgb = tmp_path / "g.png"
    rgb.write_bytes(raw_png(np.zeros((*SHAPE, 3), np.uint8), colour_type=2))
    case("RGB", [rgb], r"g.png: an RGB mask needs a colour table", image="east-block")
    bomb = tmp_path / "h" / "east-block.png"
    bomb.parent.mkdir()
    bomb.write_bytes(header_only_png(200_000, 200_000))
    case("declares 200000 x 200000", [bomb], r"mask is 200000 x 200000 pixels")
    folder = tmp_path / "i" / "east-block.png"
    folder.mkdir(parents=True)
    case("a folder", [folder], r"east-block.png: is a folder, not a mask file")
    fifo = tmp_path / "j.png"
    os.mkfifo(fifo)
    case("a pipe", [fifo], r"j.png: not a regular file \(a pipe, device or socket\)",
         image="east-block")
    device = tmp_path / "k" / "east-block.png"
    device.parent.mkdir()
    device.symlink_to("/dev/zero")
    case("a link to a device", [device], r"east-block.png: not a regular file")
    case("missing", [tmp_path / "east-block_mask.png"], r"east-block_mask.png: no such file")
    good = put(tmp_path / "b", full_mask(1), "east-block_mask.png")
    case("two files for one image", [good, bomb],
         r"2 files are for image 'east-block' .*import one file per image", error=LabelerError)
    damaged = tmp_path / "l" / "east-block.png"
    damaged.parent.mkdir()
    data = bytearray(raw_png(full_mask(1), colour_type=0))
    data[data.index(b"IDAT") + 20] ^= 0xFF  # one flipped byte of pixel data
    damaged.write_bytes(bytes(data))
    case("damaged PNG", [damaged], r"east-block.png: damaged PNG \(its IDAT chunk at byte 33 "
         r"fails its CRC check\)")
    case("empty annotator", [good], r"--annotator: expected a non-empty name",
         error=LabelerError, annotator=" ")
    case("unmatched name", [put(tmp_path, full_mask(1), "west-block.png")],
         r"west-block.png: no image of the project is called 'west-block'")
    newline = put(tmp_path, full_mask(1), "east\nblock.png")
    case("a newline in the name", [newline], r"east\\nblock.png': a file name with control "
         r"characters .* is not read; rename the file", image="east-block")
    undecodable = tmp_path / os.fsdecode(b"east-block-\xff.png")
    undecodable.write_bytes(b"")
    case("a name that is not UTF-8", [undecodable], r"east-block-\\udcff.png': the file name "
         r"is not valid UTF-8 text", image="east-block")
    return cases


def test_bad_inputs_import_nothing_and_change_nothing(project, tmp_path):
    fake_proposals(project)
    t = project.store.tiles()
    save_tile_mask(project, t[0].id, "tomas", np.full(t[0].shape, 2, np.uint8),
                   parent_version=None)
    cases = _bad_inputs(tmp_path)
    assert len(cases) == 18
    before = project_fingerprint(project)
    for label, files, options, error, match in cases:
        options = {"annotator": "survey", **options}
        with pytest.raises(error, match=match):
            import_masks(project, files, **options)
        assert project_fingerprint(project) == before, label


def test_bad_inputs_are_one_line_through_the_command(project, tmp_path, capsys):
    cases = _bad_inputs(tmp_path)
    before = project_fingerprint(project)
    for label, files, options, _, match in cases:
        argv = ["import", str(project.root), *map(str, files),
                "--annotator", options.get("annotator", "survey")]
        if "image" in options:
            argv += ["--image", options["image"]]
        assert main(argv) == 1, label
        out, err = capsys.readouterr()
        assert out == "" and err.count("\n") == 1 and err.startswith("labeler: error: "), label
        assert "Traceback" not in err
        assert re.search(match, err), (label, err)
    assert project_fingerprint(project) == before


def test_a_bad_second_file_stops_the_first(project, tmp_path):
    # the first file is good and read whole before the second fails: nothing is saved
    from PIL import Image

    from labeler.workflow import add_images

    rgb = np.random.default_rng(8).integers(0, 256, (60, 80, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(tmp_path / "west-block.png")
    add_images(project, [tmp_path / "west-block.png"])
    before = project_fingerprint(project)
    bad = np.zeros((60, 80), np.uint8)
    bad[59, 79] = 9
    files = [put(tmp_path, full_mask(1), "east-block.png"),
             put(tmp_path, bad, "west-block_mask.png")]
    with pytest.raises(MaskImportError, match=r"west-block_mask.png: holds values \[9\]"):
        import_masks(project, files, annotator="survey")
    assert project_fingerprint(project) == before


def test_the_command_prints_one_line_per_outcome(project, tmp_path, capsys):
    t = project.store.tiles()
    ids = ", ".join(str(x.id) for x in t)
    path = put(tmp_path, full_mask(1))
    argv = ["import", str(project.root), str(path), "--annotator"]
    assert main([*argv, "survey"]) == 0
    assert capsys.readouterr().out.splitlines() == [
        f"{path} -> image east-block",
        "imported 6 full masks and 0 partial masks (weak labels) as survey",
    ]
    assert main([*argv, "ines"]) == 0
    assert capsys.readouterr().out.splitlines()[1:] == [
        "imported 0 full masks and 0 partial masks (weak labels) as ines",
        "6 tiles already held these masks; nothing saved",
    ]
    other = put(tmp_path, full_mask(2), "east-block.png")
    assert main([*argv[:2], str(other), "--annotator", "ines"]) == 0
    assert capsys.readouterr().out.splitlines()[1:] == [
        "imported 0 full masks and 0 partial masks (weak labels) as ines",
        "skipped 6 tiles holding a mask another annotator saved (pass --replace to replace "
        f"them; the earlier versions stay in the history): tiles {ids}",
    ]
    assert main([*argv[:2], str(other), "--annotator", "ines", "--replace"]) == 0
    assert capsys.readouterr().out.splitlines()[1:] == [
        "imported 6 full masks and 0 partial masks (weak labels) as ines",
        "replaced reviewed work on 6 tiles (--replace; the earlier versions stay in the "
        f"history): tiles {ids}",
    ]
    assert [len(project.store.annotation_history(x.id)) for x in t] == [2] * 6
