"""Importing masks (labeler/export/importing.py, geojson_import.py, png_import.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image
from skimage.measure import label as sk_label

from labeler.errors import MaskImportError
from labeler.export.geojson import (
    NotRFC7946Warning,
    image_feature_collection,
    write_geojson,
)
from labeler.export.geojson_import import features_to_mask, read_geojson_mask
from labeler.export.importing import match_mask_to_image, read_mask_file
from labeler.export.png_import import read_png_mask
from tests.common import PEANUT, SOYBEAN, require_dataset, zoo_four_classes, zoo_ring

UTM31 = "EPSG:32631"
T_UTM = Affine(0.02, 0.0, 431_250.0, 0.0, -0.02, 4_582_100.0)  # 2 cm pixels, zone 31N
#: Peanut field labels (Tran & Phan, IEEE Access 11, 2023; CC BY-SA 4.0): colour legend
#: from the dataset's SOURCE.md.
PEANUT_COLOURS = {(0, 0, 0): 0, (0, 255, 0): 1, (255, 0, 0): 2}


def square_feature(x0, y0, x1, y1, **props):
    ring = [[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]
    return {"type": "Feature", "geometry": {"type": "Polygon", "coordinates": [ring]},
            "properties": props}


def pixel_collection(*features):
    return {"type": "FeatureCollection", "labeler:coordinates": "pixel",
            "features": list(features)}


def export(mask, **kw):
    return image_feature_collection(mask, image="plot-a", transform=T_UTM, crs=UTM31, **kw)


def keep_large(mask: np.ndarray, min_px: int, *, fill: int = 0) -> np.ndarray:
    """Reference: the mask with 8-connected regions smaller than ``min_px`` set to fill."""
    out = mask.copy()
    for cls in np.unique(mask):
        if cls == fill:
            continue
        lab = sk_label(mask == cls, connectivity=2)
        sizes = np.bincount(lab.ravel())
        small = (sizes < min_px)[lab] & (lab > 0)
        out[small] = fill
    return out


def iou(a: np.ndarray, b: np.ndarray) -> float:
    union = np.count_nonzero(a | b)
    return 1.0 if union == 0 else np.count_nonzero(a & b) / union


def blobs_with_holes(rng: np.random.Generator, shape=(48, 48), n=6) -> np.ndarray:
    m = np.zeros(shape, np.uint8)
    rr, cc = np.indices(shape)
    for _ in range(n):
        cy, cx = rng.uniform(0, shape[0]), rng.uniform(0, shape[1])
        a, b = rng.uniform(3.0, 9.0, 2)
        m[((rr + 0.5 - cy) / a) ** 2 + ((cc + 0.5 - cx) / b) ** 2 < 1] = rng.integers(1, 4)
        if min(a, b) > 4.0:
            m[((rr + 0.5 - cy) / 1.6) ** 2 + ((cc + 0.5 - cx) / 2.0) ** 2 < 1] = 0
    return m


# -- round trips ---------------------------------------------------------------------


@settings(max_examples=25, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**32 - 1))
def test_property_mask_geojson_mask_keeps_iou_per_class(seed):
    rng = np.random.default_rng(seed)
    m = blobs_with_holes(rng)
    fc = export(m, min_area_px=20)  # default simplification (0.5 px)
    back = features_to_mask(fc, shape=m.shape, transform=T_UTM, crs=UTM31, fill=0)
    ref = keep_large(m, 20)
    for cls in (1, 2, 3):
        if (ref == cls).any() or (back == cls).any():
            assert iou(ref == cls, back == cls) >= 0.99


def test_exact_round_trip_through_a_file(tmp_path):
    m = zoo_four_classes()
    path = write_geojson(tmp_path / "plot-a.geojson", export(m, min_area_px=1))
    back = read_geojson_mask(path, shape=m.shape, transform=T_UTM, crs=UTM31, fill=0)
    np.testing.assert_array_equal(back, m)
    weak = read_geojson_mask(path, shape=m.shape, transform=T_UTM, crs=UTM31)
    np.testing.assert_array_equal(weak, np.where(m == 0, 255, m))  # soil not in the file


def test_pixel_coordinate_file_round_trip_without_georeferencing(tmp_path):
    m = zoo_ring()
    with pytest.warns(NotRFC7946Warning):
        fc = image_feature_collection(m, image="plot-b", pixel_coordinates=True)
    path = write_geojson(tmp_path / "plot-b.geojson", fc)
    np.testing.assert_array_equal(read_geojson_mask(path, shape=m.shape, fill=0), m)


def test_rfc7946_appendix_a3_polygon_on_a_lonlat_grid():
    # RFC 7946 Appendix A.3 polygon with a hole, on a 100 x 100 grid of 0.01 degree
    # pixels covering 100..101 E, 0..1 N: every pixel except the 60 x 60 hole
    # (100.2..100.8 in both axes) is inside (by construction from the RFC coordinates)
    fc = {"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {"class": "crop"},
        "geometry": {"type": "Polygon", "coordinates": [
            [[100.0, 0.0], [101.0, 0.0], [101.0, 1.0], [100.0, 1.0], [100.0, 0.0]],
            [[100.8, 0.8], [100.8, 0.2], [100.2, 0.2], [100.2, 0.8], [100.8, 0.8]],
        ]},
    }]}
    t = Affine(0.01, 0.0, 100.0, 0.0, -0.01, 1.0)
    m = features_to_mask(fc, shape=(100, 100), transform=t, crs="EPSG:4326", fill=0)
    assert np.count_nonzero(m == 1) == 100 * 100 - 60 * 60
    assert (m[20:80, 20:80] == 0).all()


def test_fill_decides_what_uncovered_pixels_become():
    crop = square_feature(1, 1, 4, 4, **{"class": "crop"})
    weak = features_to_mask(pixel_collection(crop), shape=(6, 6))
    assert np.count_nonzero(weak == 1) == 9 and np.count_nonzero(weak == 255) == 27
    as_soil = features_to_mask(pixel_collection(crop), shape=(6, 6), fill=0)
    assert np.count_nonzero(as_soil == 0) == 27
    # soil polygons everywhere else make a full mask even with fill 255
    soil = square_feature(0, 0, 6, 6, **{"class": "soil"})
    full = features_to_mask(pixel_collection(soil, crop), shape=(6, 6))
    assert not (full == 255).any() and np.count_nonzero(full == 1) == 9


def test_gis_style_file_clockwise_rings_and_class_index_only():
    # RFC 7946 section 3.1.6: parsers should not reject clockwise exteriors
    ring = [[1, 1], [1, 4], [4, 4], [4, 1], [1, 1]]  # clockwise in x/y
    feature = {"type": "Feature", "geometry": {"type": "Polygon", "coordinates": [ring]},
               "properties": {"class_index": 2, "source": "field survey"}}
    m = features_to_mask(pixel_collection(feature), shape=(5, 5), fill=0)
    assert np.count_nonzero(m == 2) == 9
    named = square_feature(1, 1, 4, 4, **{"class": "Weed"})  # names are case-insensitive
    assert (features_to_mask(pixel_collection(named), shape=(5, 5), fill=0) == m).all()


def test_image_filter_and_null_geometries():
    a = square_feature(0, 0, 2, 2, **{"class": "crop", "image": "plot-a"})
    b = square_feature(2, 2, 4, 4, **{"class": "weed", "image": "plot-b"})
    nothing = {"type": "Feature", "geometry": None, "properties": {"class": "crop"}}
    fc = pixel_collection(a, b, nothing)
    with pytest.raises(MaskImportError, match="features of 2 images .*name the image"):
        features_to_mask(fc, shape=(4, 4))
    only_b = features_to_mask(fc, shape=(4, 4), image="plot-b", fill=0)
    assert np.count_nonzero(only_b == 2) == 4 and np.count_nonzero(only_b == 1) == 0
    with pytest.raises(MaskImportError, match="no feature belongs to image 'plot-z'"):
        features_to_mask(fc, shape=(4, 4), image="plot-z")
    empty = {"type": "FeatureCollection", "features": []}
    assert (features_to_mask(empty, shape=(2, 3), transform=T_UTM, crs=UTM31) == 255).all()


# -- GeoJSON errors --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("collection", "match"),
    [
        ({"type": "GeometryCollection"}, "expected a GeoJSON FeatureCollection or Feature"),
        ({"type": "FeatureCollection"}, "without a 'features' list"),
        (pixel_collection({"type": "Polygon"}), "feature 0: expected an object of type 'Feature'"),
        (pixel_collection(square_feature(0, 0, 2, 2, **{"class": "tree"})),
         "unknown class 'tree'; known classes: soil, crop, weed, symptom"),
        (pixel_collection(square_feature(0, 0, 2, 2, class_index=9)),
         "unknown class_index 9; known indices: 0 \\(soil\\)"),
        (pixel_collection(square_feature(0, 0, 2, 2, class_index=1.5)),
         "class_index must be an integer"),
        (pixel_collection(square_feature(0, 0, 2, 2, **{"class": "crop", "class_index": 2})),
         "class 'crop' \\(index 1\\) contradicts class_index 2"),
        (pixel_collection(square_feature(0, 0, 2, 2)), "no 'class' or 'class_index' property"),
        (pixel_collection(square_feature(0, 0, 9, 2, **{"class": "crop"})),
         "feature 0: lies outside the image .*columns 0.0..9.0"),
        (pixel_collection({"type": "Feature", "properties": {"class": "crop"},
                           "geometry": {"type": "Point", "coordinates": [1, 1]}}),
         "expected geometry type Polygon or MultiPolygon, got 'Point'"),
        (pixel_collection({"type": "Feature", "properties": {"class": "crop"}, "geometry": {
            "type": "Polygon", "coordinates": [[[0, 0], [2, 0], [2, 2], [0, 2]]]}}),
         "feature 0, ring 0: ring is not closed"),
        (pixel_collection({"type": "Feature", "id": "bow", "properties": {"class": "crop"},
                           "geometry": {"type": "Polygon", "coordinates": [
                               [[0, 0], [2, 2], [2, 0], [0, 2], [0, 0]]]}}),
         "feature 0 \\(id 'bow'\\): invalid polygon \\(Self-intersection"),
    ],
)
def test_geojson_errors(collection, match):
    with pytest.raises(MaskImportError, match=match):
        features_to_mask(collection, shape=(4, 4))


def test_lonlat_errors():
    fc = export(zoo_ring())
    with pytest.raises(MaskImportError, match="image has no georeferencing"):
        features_to_mask(fc, shape=(10, 10))
    with pytest.raises(MaskImportError, match="lies outside the image"):
        # the same file against an image 1 m further east
        features_to_mask(fc, shape=(10, 10), transform=T_UTM @ Affine.translation(50, 0),
                         crs=UTM31)
    wrong = dict(fc, crs={"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::3857"}})
    with pytest.raises(MaskImportError, match="wrong CRS: the file names 'urn:ogc:def:crs:EPSG::"):
        features_to_mask(wrong, shape=(10, 10), transform=T_UTM, crs=UTM31)
    old_style = dict(fc, crs={"type": "name",
                              "properties": {"name": "urn:ogc:def:crs:OGC:1.3:CRS84"}})
    assert (features_to_mask(old_style, shape=(10, 10), transform=T_UTM, crs=UTM31)
            == features_to_mask(fc, shape=(10, 10), transform=T_UTM, crs=UTM31)).all()
    metres = {"type": "FeatureCollection", "features": [
        square_feature(431_250.0, 4_582_099.0, 431_250.1, 4_582_099.1, **{"class": "crop"})]}
    with pytest.raises(MaskImportError, match="outside longitude -180..180"):
        features_to_mask(metres, shape=(10, 10), transform=T_UTM, crs=UTM31)


def test_file_errors_name_the_file(tmp_path):
    bad = tmp_path / "plot-a.geojson"
    bad.write_text("{broken")
    with pytest.raises(MaskImportError, match="plot-a.geojson: not valid JSON"):
        read_geojson_mask(bad, shape=(4, 4))
    with pytest.raises(MaskImportError, match="missing.geojson: no such file"):
        read_geojson_mask(tmp_path / "missing.geojson", shape=(4, 4))
    bad.write_text(json.dumps(pixel_collection(square_feature(0, 0, 2, 2, **{"class": "x"}))))
    with pytest.raises(MaskImportError, match="plot-a.geojson: feature 0: unknown class 'x'"):
        read_geojson_mask(bad, shape=(4, 4))
    with pytest.raises(MaskImportError, match="fill: expected 255"):
        read_geojson_mask(bad, shape=(4, 4), fill=7)


# -- PNG masks ---------------------------------------------------------------------------


def png_header_only(width, height, *, depth=8, colour_type=0):
    """A PNG signature and IHDR chunk (PNG specification 11.2.2), with an empty IDAT and IEND."""
    import struct
    import zlib

    def chunk(kind, body):
        return (struct.pack(">I", len(body)) + kind + body
                + struct.pack(">I", zlib.crc32(kind + body)))

    ihdr = struct.pack(">IIBBBBB", width, height, depth, colour_type, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", b"") + chunk(b"IEND", b"")


def save(path, array, mode=None):
    Image.fromarray(array, mode=mode).save(path, format="PNG") if mode else Image.fromarray(
        array).save(path, format="PNG")
    return path


def test_grey_png_mask_reads_back(tmp_path):
    m = zoo_four_classes()
    m[0, 0] = 255
    path = save(tmp_path / "plot-a.png", m)
    np.testing.assert_array_equal(read_png_mask(path, shape=m.shape), m)
    np.testing.assert_array_equal(read_mask_file(path, shape=m.shape), m)


def test_png_errors(tmp_path):
    m = zoo_four_classes()
    path = save(tmp_path / "m.png", m)
    with pytest.raises(MaskImportError, match=r"m.png: mask is 8 x 8 pixels .* image is 8 x 9"):
        read_png_mask(path, shape=(8, 9))
    save(path, np.full((4, 4), 7, np.uint8))
    with pytest.raises(MaskImportError, match=r"holds values \[7\] that are not class indices"):
        read_png_mask(path, shape=(4, 4))
    rgb = np.zeros((4, 4, 3), np.uint8)
    rgb[0, 0] = (0, 0, 255)
    save(path, rgb)
    with pytest.raises(MaskImportError, match="an RGB mask needs a colour table"):
        read_png_mask(path, shape=(4, 4))
    unknown_blue = r"1 colour\(s\) are not in the colour table: \(0, 0, 255\)"
    with pytest.raises(MaskImportError, match=unknown_blue):
        read_png_mask(path, shape=(4, 4), colours={(0, 0, 0): 0})
    with pytest.raises(MaskImportError, match="colours table maps .* to 9"):
        read_png_mask(path, shape=(4, 4), colours={(0, 0, 0): 9})
    rgba = np.zeros((4, 4, 4), np.uint8)
    rgba[..., 3] = 255
    rgba[1, 1, 3] = 0
    save(path, rgba)
    with pytest.raises(MaskImportError, match="transparent pixels"):
        read_png_mask(path, shape=(4, 4), colours={(0, 0, 0): 0})
    save(path, np.zeros((4, 4), bool))  # 1-bit
    with pytest.raises(MaskImportError, match="a 1-bit grey PNG is not a class mask"):
        read_png_mask(path, shape=(4, 4))
    Image.fromarray(np.zeros((4, 4), np.uint8)).save(tmp_path / "m.jpg.png", format="JPEG")
    with pytest.raises(MaskImportError, match=r"m.jpg.png: not a PNG file \(no PNG signature\)"):
        read_png_mask(tmp_path / "m.jpg.png", shape=(4, 4))
    (tmp_path / "cut.png").write_bytes(path.read_bytes()[:30])
    with pytest.raises(MaskImportError, match=r"cut.png: damaged PNG \(no complete IHDR"):
        read_png_mask(tmp_path / "cut.png", shape=(4, 4))
    with pytest.raises(MaskImportError, match="nothing.png: no such file"):
        read_png_mask(tmp_path / "nothing.png", shape=(4, 4))
    with pytest.raises(MaskImportError, match="expected a .png, .geojson or .json mask file"):
        read_mask_file(tmp_path / "m.tif", shape=(4, 4))


def test_sixteen_bit_palette_and_alpha_pngs(tmp_path):
    m = zoo_four_classes()
    wide = save(tmp_path / "wide.png", m.astype(np.uint16))
    np.testing.assert_array_equal(read_png_mask(wide, shape=m.shape), m)
    big = m.astype(np.uint16)
    big[0, 0] = 1000
    save(wide, big)
    with pytest.raises(MaskImportError, match="16-bit grey mask holds values up to 1000"):
        read_png_mask(wide, shape=m.shape)
    np.testing.assert_array_equal(
        read_png_mask(wide, shape=m.shape, values={0: 0, 1: 1, 2: 2, 3: 3, 1000: 255})[0, 0], 255
    )
    pal = Image.fromarray(m, mode="L").convert("P")
    pal.putpalette([0, 0, 0, 0, 114, 178, 230, 159, 0, 204, 121, 167] + [0] * 744)
    pal.save(tmp_path / "pal.png")
    np.testing.assert_array_equal(read_png_mask(tmp_path / "pal.png", shape=m.shape), m)
    by_colour = read_png_mask(
        tmp_path / "pal.png", shape=m.shape,
        colours={(0, 0, 0): 0, (0, 114, 178): 3, (230, 159, 0): 2, (204, 121, 167): 1},
    )
    np.testing.assert_array_equal(by_colour, np.array([0, 3, 2, 1], np.uint8)[m])
    la = np.stack([m, np.full_like(m, 255)], axis=2)
    Image.fromarray(la, mode="LA").save(tmp_path / "la.png")
    np.testing.assert_array_equal(read_png_mask(tmp_path / "la.png", shape=m.shape), m)


@pytest.mark.dataset
def test_peanut_rgb_label_reads_with_the_published_counts():
    # Tran & Phan, "Dense Multi-Scale Convolutional Network for Plant Segmentation",
    # IEEE Access 11, 2023 (CC BY-SA 4.0); spot counts of label 0005 from SOURCE.md
    folder = require_dataset(PEANUT)
    path = folder / "labels" / "0005.png"
    m = read_png_mask(path, shape=(720, 960), colours=PEANUT_COLOURS)
    counts = np.bincount(m.ravel(), minlength=3)
    assert counts.tolist() == [657_976, 21_626, 11_598]
    with pytest.raises(MaskImportError, match="0005.png: mask is 720 x 960 pixels .* 960 x 720"):
        read_png_mask(path, shape=(960, 720), colours=PEANUT_COLOURS)
    with pytest.raises(MaskImportError, match=r"not in the colour table: \(255, 0, 0\)"):
        read_png_mask(path, shape=(720, 960), colours={(0, 0, 0): 0, (0, 255, 0): 1})


@pytest.mark.dataset
def test_peanut_label_round_trips_through_geojson():
    # real plant outlines: Tran & Phan, IEEE Access 11, 2023 (CC BY-SA 4.0), label 0005
    folder = require_dataset(PEANUT)
    m = read_png_mask(folder / "labels" / "0005.png", shape=(720, 960), colours=PEANUT_COLOURS)
    fc = export(m, min_area_px=8)
    back = features_to_mask(fc, shape=m.shape, transform=T_UTM, crs=UTM31, fill=0)
    ref = keep_large(m, 8)
    for cls in (1, 2):
        assert iou(ref == cls, back == cls) >= 0.99


@pytest.mark.dataset
def test_soybean_vote_mask_needs_a_values_table():
    # Prograf-UFF/asrdnet_dataset (commit 1c86885, MIT badge; "ASRDNet: A new
    # image-segmentation neural network model for detecting Asian rust on soybean
    # leaves"); image58 counts from SOURCE.md: 1 vote 4 384 px, 2 votes 4 984, 3 votes 0
    folder = require_dataset(SOYBEAN)
    path = folder / "probabilistic_mask" / "image58.png"
    with pytest.raises(MaskImportError, match=r"holds values \[85, 170\]"):
        read_png_mask(path, shape=(960, 1280))
    m = read_png_mask(path, shape=(960, 1280), values={0: 0, 85: 255, 170: 3, 255: 3})
    assert np.count_nonzero(m == 3) == 4_984
    assert np.count_nonzero(m == 255) == 4_384
    consensus = read_png_mask(folder / "binary_mask" / "image58.png", shape=(960, 1280),
                              values={0: 0, 255: 3})
    np.testing.assert_array_equal(consensus, np.where(m == 255, 0, m))


# -- names ---------------------------------------------------------------------------


def test_match_mask_to_image():
    stems = ["north-01", "north-02", "south-01"]
    assert match_mask_to_image("masks/north-01.png", stems) == "north-01"
    assert match_mask_to_image("north-02_mask.png", stems) == "north-02"
    assert match_mask_to_image("south-01_annotation.PNG", stems) == "south-01"
    assert match_mask_to_image("south-01.geojson", stems) == "south-01"
    with pytest.raises(MaskImportError, match="fits several images \\(a_mask, a\\)"):
        match_mask_to_image("a_mask.png", ["a", "a_mask"])
    with pytest.raises(MaskImportError, match="no image of the project is called 'north-1'.*"
                                              "similar image names: north-01"):
        match_mask_to_image("north-1.png", stems)
    with pytest.raises(MaskImportError, match="expected a mask file ending in .png"):
        match_mask_to_image("north-01.tif", stems)



def test_more_png_and_table_errors(tmp_path):
    m = zoo_four_classes()
    rgba = np.concatenate([np.zeros((8, 8, 3), np.uint8), np.full((8, 8, 1), 255, np.uint8)],
                          axis=2)
    path = save(tmp_path / "rgba.png", rgba)
    with pytest.raises(MaskImportError, match="an RGBA mask needs a colour table"):
        read_png_mask(path, shape=(8, 8))
    assert (read_png_mask(path, shape=(8, 8), colours={(0, 0, 0): 2}) == 2).all()
    grey = save(tmp_path / "grey.png", m)
    with pytest.raises(MaskImportError, match="values table key -1 is not a grey value"):
        read_png_mask(grey, shape=(8, 8), values={-1: 0})
    with pytest.raises(MaskImportError, match="values table maps 3 to 8"):
        read_png_mask(grey, shape=(8, 8), values={0: 0, 1: 1, 2: 2, 3: 8})
    with pytest.raises(MaskImportError, match="grey values 3 \\(16 px\\) are not in the given"):
        read_png_mask(grey, shape=(8, 8), values={0: 0, 1: 1, 2: 2})
    la = np.stack([m, np.full_like(m, 255)], axis=2)
    la[0, 0, 1] = 10
    Image.fromarray(la, mode="LA").save(tmp_path / "la.png")
    with pytest.raises(MaskImportError, match="transparent pixels"):
        read_png_mask(tmp_path / "la.png", shape=(8, 8))
    with pytest.raises(MaskImportError, match="colours table key \\(0, 0\\) is not an"):
        read_png_mask(path, shape=(8, 8), colours={(0, 0): 1})
    with pytest.raises(MaskImportError, match="<collection>: not a GeoJSON object"):
        features_to_mask([1, 2], shape=(4, 4))


def test_oversized_png_is_refused_from_its_header(tmp_path):
    # a 57-byte file declaring 200000 x 200000 pixels: refused by the size check against
    # its image before any pixel is decoded (no decompression-bomb guard is needed)
    path = tmp_path / "bomb.png"
    path.write_bytes(png_header_only(200_000, 200_000))
    with pytest.raises(MaskImportError, match=r"bomb.png: mask is 200000 x 200000 pixels .* "
                                              r"image is 8 x 8"):
        read_png_mask(path, shape=(8, 8))
    # the same header with the image's size: the missing pixel data is one clear error
    path.write_bytes(png_header_only(8, 8))
    with pytest.raises(MaskImportError, match=r"bomb.png: damaged or truncated PNG: rows 0..7"):
        read_png_mask(path, shape=(8, 8))
