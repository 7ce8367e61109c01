"""Label schema and palette (labeler/classes.py)."""

import numpy as np
import pytest

from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass, hex_to_rgb


def test_default_schema_and_okabe_ito_colours():
    # Okabe & Ito (2008) palette: blue #0072B2, orange #E69F00, reddish purple #CC79A7
    assert DEFAULT_SCHEMA.names == ("soil", "crop", "weed", "symptom")
    assert DEFAULT_SCHEMA.by_name("crop").rgb == (0, 114, 178)
    assert DEFAULT_SCHEMA.by_name("weed").rgb == (230, 159, 0)
    assert DEFAULT_SCHEMA.by_name("symptom").rgb == (204, 121, 167)
    assert DEFAULT_SCHEMA.by_name("soil").rgb is None
    colours, has = DEFAULT_SCHEMA.lut_rgb()
    assert has.tolist()[:5] == [False, True, True, True, False] and not has[255]
    assert colours[2].tolist() == [230, 159, 0]


def test_check_mask():
    m = np.array([[0, 1], [3, 255]], np.uint8)
    DEFAULT_SCHEMA.check_mask(m)
    with pytest.raises(ValueError, match=r"holds values \[255\]"):
        DEFAULT_SCHEMA.check_mask(m, allow_unlabelled=False)
    with pytest.raises(ValueError, match="2-D uint8"):
        DEFAULT_SCHEMA.check_mask(m.astype(np.int32))


@pytest.mark.parametrize(
    ("classes", "match"),
    [
        ([], "at least one class"),
        ([LabelClass(1, "crop", None)], "index 0"),
        ([LabelClass(0, "soil", None), LabelClass(255, "x", None)], "0..254"),
        ([LabelClass(0, "soil", None), LabelClass(1, "soil", None)], "name 'soil' is used twice"),
        ([LabelClass(0, "soil", "blue")], "#RRGGBB"),
    ],
)
def test_schema_errors(classes, match):
    with pytest.raises(ValueError, match=match):
        ClassSchema(classes)


def test_lookup_errors():
    with pytest.raises(KeyError, match="known classes: soil, crop, weed, symptom"):
        DEFAULT_SCHEMA.by_name("grass")
    with pytest.raises(KeyError, match="known indices"):
        DEFAULT_SCHEMA.by_index(9)
    with pytest.raises(ValueError, match="hexadecimal"):
        hex_to_rgb("#GG0000")
