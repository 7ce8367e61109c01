"""Picture protocols of the preview: kitty and sixel encoders, detection, fitting.

Sources of the expected bytes:
- kitty: "Terminal graphics protocol", https://sw.kovidgoyal.net/kitty/graphics-protocol/
  (APC ``ESC _ G keys ; base64 ESC \\``, f=24 raw RGB, s/v size, chunks of 4096 bytes
  with m=1 on all but the last, only the first carrying the other keys; "Unicode
  placeholders": U+10EEEE and the row/column diacritics table).
- sixel: DEC, "VT330/VT340 Programmer Reference Manual, Volume 2: Graphics Programming",
  chapter "Sixel Graphics" (DCS P1;P2;P3 q, raster attributes ``"Pan;Pad;Ph;Pv``,
  ``#Pc;2;R;G;B`` colours in percent, ``63 + bits`` with bit 0 the top of a six-row band,
  ``$`` graphics carriage return, ``-`` graphics new line, ``!Pn`` repeat, ST ``ESC \\``).
"""

import base64
import fcntl
import os
import struct
import termios
import unicodedata
import zlib
from fractions import Fraction

import numpy as np
import pytest

from labeler.tui.graphics import (
    GRAPHICS_MODES,
    cell_pixels,
    choose_graphics,
    detect_graphics,
    fit_cells,
    kitty_lines,
    resize_nearest,
    sixel_lines,
)
from labeler.tui.graphics_kitty import (
    DIACRITICS,
    PLACEHOLDER,
    id_colour,
    kitty_transmit,
    placeholder_cell,
)
from labeler.tui.graphics_sixel import median_cut, sixel_encode, sixel_percent, sixel_picture

RED, BLUE = (255, 0, 0), (0, 0, 255)


# -- kitty ---------------------------------------------------------------------------------
def test_kitty_transmit_one_chunk_exact():
    rgb = np.array([[RED, BLUE]], np.uint8)  # 1 row, 2 pixels: bytes ff0000 0000ff
    out = kitty_transmit(rgb, image_id=7, cols=1, rows=1, compress=False)
    # base64 of ff 00 00 00 00 ff is "/wAAAAD/" (RFC 4648 alphabet)
    assert out == "\x1b_Ga=T,U=1,f=24,s=2,v=1,i=7,c=1,r=1,q=2;/wAAAAD/\x1b\\"


def test_kitty_transmit_chunks_carry_m_and_only_the_first_the_keys():
    rgb = np.array([[RED, BLUE]], np.uint8)
    out = kitty_transmit(rgb, image_id=7, cols=3, rows=2, compress=False, chunk=4)
    assert out == (
        "\x1b_Ga=T,U=1,f=24,s=2,v=1,i=7,c=3,r=2,q=2,m=1;/wAA\x1b\\"
        "\x1b_Gm=0;AAD/\x1b\\"
    )


def test_kitty_transmit_compressed_and_chunked_decodes_to_the_pixels():
    rng = np.random.default_rng(5)
    rgb = rng.integers(0, 256, size=(64, 48, 3), dtype=np.uint8)  # noise: ~9 KB deflated
    out = kitty_transmit(rgb, image_id=0x4C6162, cols=10, rows=6)
    parts = out.split("\x1b\\")[:-1]
    assert all(p.startswith("\x1b_G") for p in parts) and len(parts) >= 3
    heads = [p[3:].split(";", 1)[0] for p in parts]
    assert heads[0] == "a=T,U=1,f=24,s=48,v=64,i=5005666,c=10,r=6,q=2,o=z,m=1"
    assert heads[1:] == ["m=1"] * (len(parts) - 2) + ["m=0"]
    payloads = [p.split(";", 1)[1] for p in parts]
    assert all(len(p) == 4096 for p in payloads[:-1]) and 0 < len(payloads[-1]) <= 4096
    # oracle: the standard library's base64 and zlib
    assert zlib.decompress(base64.b64decode("".join(payloads))) == rgb.tobytes()


def test_kitty_errors():
    rgb = np.zeros((2, 2, 3), np.uint8)
    with pytest.raises(ValueError, match="image_id: expected 1..16777215"):
        kitty_transmit(rgb, image_id=0, cols=1, rows=1)
    with pytest.raises(ValueError, match="cols, rows: expected 1..128"):
        kitty_transmit(rgb, image_id=1, cols=129, rows=1)
    with pytest.raises(ValueError, match="chunk: expected a positive multiple of 4"):
        kitty_transmit(rgb, image_id=1, cols=1, rows=1, chunk=4095)
    with pytest.raises(ValueError, match="rgb: expected a non-empty uint8"):
        kitty_transmit(rgb.astype(float), image_id=1, cols=1, rows=1)
    with pytest.raises(ValueError, match="row, col: expected 0..127"):
        placeholder_cell(128, 0)
    with pytest.raises(ValueError, match="image_id: expected 1..16777215"):
        id_colour(1 << 24)


def test_diacritics_follow_the_protocols_rule():
    # the protocol derives its table from UnicodeData.txt: general category Mn, combining
    # class 230, bidi NSM, no decomposition, less 19 listed characters; oracle: Python's
    # unicodedata over the same code points (none was added there after Unicode 6.0)
    left_out = {0x300, 0x301, 0x302, 0x303, 0x304, 0x306, 0x307, 0x308, 0x309, 0x30A,
                0x30B, 0x30C, 0x30F, 0x311, 0x313, 0x314, 0x342, 0x653, 0x654}
    rule = [
        chr(c) for c in range(0x300, ord(DIACRITICS[-1]) + 1)
        if unicodedata.category(chr(c)) == "Mn" and unicodedata.combining(chr(c)) == 230
        and unicodedata.bidirectional(chr(c)) == "NSM" and not unicodedata.decomposition(chr(c))
        and c not in left_out
    ]
    assert tuple(rule) == DIACRITICS and len(DIACRITICS) == 128
    # the protocol's examples: row 0 is U+0305, row 1 U+030D, row 2 U+030E
    assert placeholder_cell(2, 1) == "\U0010eeee\u030e\u030d"
    assert PLACEHOLDER == "\U0010eeee"


def test_kitty_lines_are_one_cell_per_placeholder_and_the_escape_ends_line_0():
    from rich.cells import cell_len

    rgb = np.zeros((4, 6, 3), np.uint8)
    lines = kitty_lines(rgb, image_id=0x010203, cells=(2, 3), width=5, height=3)
    assert len(lines) == 3
    for line in lines:
        cells = sum(cell_len(s.text) for s in line if not s.control)
        assert cells == 5
    first = lines[0]
    assert [s.text for s in first[:3]] == [placeholder_cell(0, x) for x in range(3)]
    assert first[0].style.color.triplet == (1, 2, 3)  # the id as a 24-bit colour
    assert first[-1].control and first[-1].text.startswith("\x1b_Ga=T,U=1,f=24,s=6,v=4,")
    assert not any(s.control for s in lines[1] + lines[2])
    assert lines[2][0].text == " " * 5  # below the picture: blank cells


# -- sixel ---------------------------------------------------------------------------------
def test_sixel_percent_rounds_half_up():
    for v in range(256):  # oracle: exact fractions
        exact = Fraction(v * 100, 255)
        assert sixel_percent(v) == int(exact + Fraction(1, 2))
    assert (sixel_percent(0), sixel_percent(51), sixel_percent(255)) == (0, 20, 100)


def test_sixel_two_pixels_exact():
    rgb = np.array([[RED, BLUE]], np.uint8)
    # palette in ascending (r, g, b): 0 = blue, 1 = red. Band 0, colour 0: columns
    # (0, bit 0) -> "?@"; colour 1: (bit 0) -> "@" (the trailing "?" dropped).
    assert sixel_picture(rgb) == (
        '\x1bP0;1;0q"1;1;2;1#0;2;0;0;100#1;2;100;0;0#0?@$#1@\x1b\\'
    )


def test_sixel_two_bands_and_repeats_exact():
    column = np.full((7, 1, 3), (51, 102, 153), np.uint8)  # 20 %, 40 %, 60 %
    # band 0: six rows set -> 63 + 63 = "~"; "-" next band; band 1: the top row -> "@"
    assert sixel_picture(column) == '\x1bP0;1;0q"1;1;1;7#0;2;20;40;60#0~-#0@\x1b\\'
    row = np.full((1, 5, 3), (255, 255, 255), np.uint8)
    assert sixel_picture(row) == '\x1bP0;1;0q"1;1;5;1#0;2;100;100;100#0!5@\x1b\\'
    three = np.full((1, 3, 3), (255, 255, 255), np.uint8)
    assert sixel_picture(three).endswith("#0@@@\x1b\\")  # runs under four written out


def _decode_sixel(data: str) -> tuple[np.ndarray, dict[int, tuple[int, int, int]]]:
    """Slow reference reader of the subset of sixel the encoder writes."""
    assert data.startswith("\x1bP0;1;0q\"") and data.endswith("\x1b\\")
    body = data[len("\x1bP0;1;0q\""):-2]
    head, _, rest = body.partition("#")
    _, _, w, h = (int(v) for v in head.split(";"))
    out = np.full((h, w), -1, np.int64)
    colours = {}
    rest = "#" + rest
    k, x, band, colour = 0, 0, 0, None
    while k < len(rest):
        ch = rest[k]
        if ch == "#":
            j = k + 1
            while j < len(rest) and (rest[j].isdigit() or rest[j] == ";"):
                j += 1
            nums = [int(v) for v in rest[k + 1:j].split(";")]
            if len(nums) == 5:
                colours[nums[0]] = tuple(nums[2:])
            colour, k = nums[0], j
            continue
        if ch == "$":
            x, k = 0, k + 1
            continue
        if ch == "-":
            x, band, k = 0, band + 1, k + 1
            continue
        run = 1
        if ch == "!":
            j = k + 1
            while rest[j].isdigit():
                j += 1
            run, ch, k = int(rest[k + 1:j]), rest[j], j
        bits = ord(ch) - 63
        for _ in range(run):
            for b in range(6):
                if bits >> b & 1:
                    out[band * 6 + b, x] = colour
            x += 1
        k += 1
    return out, colours


def test_sixel_round_trip_through_a_slow_reader():
    rng = np.random.default_rng(11)
    palette = rng.integers(0, 256, size=(5, 3), dtype=np.uint8)
    index = rng.integers(0, 5, size=(13, 9))
    index[:, 2:8] = 3  # long runs
    data = sixel_encode(index, palette)
    decoded, colours = _decode_sixel(data)
    np.testing.assert_array_equal(decoded, index)
    for c, rgb in colours.items():
        assert rgb == tuple(sixel_percent(v) for v in palette[c])


def _sixel_encode_loop(index, palette):
    """Slow reference of :func:`sixel_encode`: band by band, colour by colour, run by run."""
    h, w = index.shape
    parts = ["\x1bP0;1;0q", f'"1;1;{w};{h}']
    for c in sorted(set(index.ravel().tolist())):
        r, g, b = (sixel_percent(v) for v in palette[c])
        parts.append(f"#{c};2;{r};{g};{b}")
    for top in range(0, h, 6):
        band = index[top : top + 6]
        layers = []
        for c in sorted(set(band.ravel().tolist())):
            chars = [63 + sum(1 << y for y in range(len(band)) if band[y, x] == c)
                     for x in range(w)]
            while chars[-1] == 63:
                chars.pop()
            out, x = "", 0
            while x < len(chars):
                run = 1
                while x + run < len(chars) and chars[x + run] == chars[x]:
                    run += 1
                out += f"!{run}{chr(chars[x])}" if run >= 4 else chr(chars[x]) * run
                x += run
            layers.append(f"#{c}{out}")
        parts.append("$".join(layers))
        if top + 6 < h:
            parts.append("-")
    parts.append("\x1b\\")
    return "".join(parts)


@pytest.mark.parametrize(("shape", "n_colours", "seed"),
                         [((13, 7), 5, 0), ((1, 1), 1, 1), ((6, 1), 3, 2), ((7, 40), 256, 3),
                          ((12, 1203), 2, 4), ((5, 150), 4, 5)])
def test_sixel_encode_matches_a_slow_loop(shape, n_colours, seed):
    rng = np.random.default_rng(seed)
    palette = rng.integers(0, 256, (n_colours, 3)).astype(np.uint8)
    # runs of every length, long ones (1 203 wide: counts of four digits) among them
    index = np.repeat(rng.integers(0, n_colours, (shape[0], shape[1] // 3 + 1)),
                      rng.integers(1, 7), axis=1)[:, : shape[1]]
    if index.shape[1] < shape[1]:
        index = np.pad(index, ((0, 0), (0, shape[1] - index.shape[1])), mode="edge")
    if shape == (12, 1203):
        index[:, 100:1150] = 1  # one run of 1 050 per row
    assert sixel_encode(index, palette) == _sixel_encode_loop(index, palette)


def test_median_cut_keeps_few_colours_exactly():
    rng = np.random.default_rng(2)
    colours = rng.integers(0, 256, size=(7, 3), dtype=np.uint8)
    rgb = colours[rng.integers(0, 7, size=(10, 12))]
    palette, index = median_cut(rgb)
    np.testing.assert_array_equal(palette[index], rgb)
    assert len(palette) == len(np.unique(rgb.reshape(-1, 3), axis=0))


def test_median_cut_entries_are_the_means_of_their_pixels():
    rng = np.random.default_rng(4)
    rgb = rng.integers(0, 256, size=(24, 20, 3), dtype=np.uint8)  # ~480 colours
    palette, index = median_cut(rgb, colours=16)
    assert len(palette) == 16 and set(np.unique(index)) == set(range(16))
    for n in range(16):  # slow reference: each entry is its pixels' mean, half up
        px = rgb[index == n].astype(np.int64)
        mean = [int(Fraction(int(px[:, c].sum()), len(px)) + Fraction(1, 2)) for c in range(3)]
        assert tuple(palette[n]) == tuple(mean)
    with pytest.raises(ValueError, match="colours: expected 1..256"):
        median_cut(rgb, colours=0)


def test_sixel_errors():
    with pytest.raises(ValueError, match="index: expected entries 0..1"):
        sixel_encode(np.array([[0, 2]]), np.zeros((2, 3), np.uint8))
    with pytest.raises(ValueError, match=r"palette: expected \(n, 3\)"):
        sixel_encode(np.array([[0]]), np.zeros((0, 3), np.uint8))
    with pytest.raises(ValueError, match=r"index: expected a non-empty \(H, W\)"):
        sixel_encode(np.zeros((0, 2), np.int64), np.zeros((1, 3), np.uint8))


def test_sixel_lines_draw_each_band_at_its_own_line():
    rgb = np.zeros((5, 4, 3), np.uint8)
    rgb[3:] = 255
    lines = sixel_lines(rgb, origin=(10, 2), cell_px=(2, 3), width=3, height=3)
    assert [line[0].text for line in lines] == ["   "] * 3
    assert [len(line) for line in lines] == [2, 2, 1]  # 5 pixel rows: two lines of 3
    first, second = lines[0][1], lines[1][1]
    assert first.control and second.control
    # save cursor, move to screen row 3 (1-based) column 11, rows 0-2, restore cursor;
    # one palette for the picture (0 = black, 1 = white), each line defining its own
    black, white = "#0;2;0;0;0", "#1;2;100;100;100"
    assert first.text == '\x1b7\x1b[3;11H\x1bP0;1;0q"1;1;4;3' + black + "#0!4F\x1b\\\x1b8"
    # rows 0-2 black: bits 0-2 -> 63 + 7 = "F"; rows 3-4 white: bits 0-1 -> 63 + 3 = "B"
    assert second.text == '\x1b7\x1b[4;11H\x1bP0;1;0q"1;1;4;2' + white + "#1!4B\x1b\\\x1b8"


# -- choice, fitting -------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("environ", "expected"),
    [
        ({"TERM": "xterm-kitty"}, "kitty"),
        ({"TERM": "xterm-256color", "KITTY_WINDOW_ID": "3"}, "kitty"),
        ({"TERM": "xterm-ghostty"}, "kitty"),
        ({"TERM": "xterm-256color", "TERM_PROGRAM": "ghostty"}, "kitty"),
        ({"TERM": "foot"}, "sixel"),
        ({"TERM": "mlterm"}, "sixel"),
        ({"TERM": "xterm-256color", "TERM_PROGRAM": "WezTerm"}, "sixel"),
        ({"TERM": "xterm-256color"}, "off"),
        ({"TERM": "xterm-kitty", "TMUX": "/tmp/tmux-1/default,1,0"}, "off"),
        ({"TERM": "screen-256color", "KITTY_WINDOW_ID": "1"}, "off"),
        ({}, "off"),
    ],
)
def test_detect_graphics_from_the_environment(environ, expected):
    assert detect_graphics(environ) == expected


def test_choose_graphics():
    kitty = {"TERM": "xterm-kitty"}
    assert choose_graphics("auto", kitty, headless=False, cell_px=None)[0] == "kitty"
    # headless (Pilot) never gets pictures, whatever the setting and terminal say
    for setting in GRAPHICS_MODES:
        assert choose_graphics(setting, kitty, headless=True, cell_px=(10, 20)) == (
            "off", "half blocks (headless)")
    assert choose_graphics("off", kitty, headless=False, cell_px=None) == (
        "off", "half blocks (preview.graphics = off)")
    assert choose_graphics("sixel", {}, headless=False, cell_px=(9, 18))[0] == "sixel"
    mode, note = choose_graphics("auto", {"TERM": "foot"}, headless=False, cell_px=None)
    assert mode == "off" and "cell size" in note
    mode, note = choose_graphics("kitty", {}, headless=False, cell_px=None, truecolor=False)
    assert mode == "off" and "24-bit" in note
    with pytest.raises(ValueError, match="preview.graphics: expected one of auto, kitty"):
        choose_graphics("iterm", {}, headless=False, cell_px=None)


def test_cell_pixels_reads_the_kernels_window_size():
    main, other = os.openpty()
    try:
        assert cell_pixels(other) is None  # a new pty reports no pixels
        fcntl.ioctl(other, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 80, 800, 480))
        assert cell_pixels(other) == (10, 20)
    finally:
        os.close(main)
        os.close(other)
    with open(os.devnull, "rb") as f:
        assert cell_pixels(f.fileno()) is None  # not a terminal


def test_fit_cells_keeps_the_aspect_ratio():
    assert fit_cells((256, 256), cols=40, rows=30) == (20, 40)  # cells twice as tall
    assert fit_cells((256, 256), cols=40, rows=10) == (10, 20)
    assert fit_cells((256, 256), cols=40, rows=30, cell_px=(9, 18)) == (20, 40)
    assert fit_cells((100, 300), cols=30, rows=30, cell_px=(10, 20)) == (5, 30)
    assert fit_cells((256, 256), cols=500, rows=500) == (64, 128)  # capped at 128 marks


def test_resize_nearest_against_a_loop():
    rng = np.random.default_rng(8)
    rgb = rng.integers(0, 256, size=(5, 7, 3), dtype=np.uint8)
    for shape in ((5, 7), (10, 14), (3, 4), (12, 5)):
        got = resize_nearest(rgb, shape)
        want = np.empty((*shape, 3), np.uint8)
        for i in range(shape[0]):
            for j in range(shape[1]):
                want[i, j] = rgb[int((i + 0.5) * 5 / shape[0]), int((j + 0.5) * 7 / shape[1])]
        np.testing.assert_array_equal(got, want)
