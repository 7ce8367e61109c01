"""The editor's keys and mouse: from the shared key map, for the window and the help overlay."""

from __future__ import annotations

from pathlib import Path

from labeler.classes import DEFAULT_SCHEMA
from labeler.editor.keys import (
    BINDINGS,
    MOUSE,
    TOOLS,
    class_for,
    command_for,
    help_rows,
    keys_markdown,
)


def test_key_table_binds_every_tool_and_digits_pick_classes():
    for tool in TOOLS:
        assert command_for(ord(tool.key)) == f"tool:{tool.name}"
    assert command_for(13) == "save" and command_for(27) == "leave" and command_for(65505) is None
    assert command_for(0xFF0D) == "save"  # Enter as an X keysym (the Qt build reports it)
    codes = [c for b in BINDINGS for c in b.codes]
    assert len(codes) == len(set(codes))  # no key does two things
    assert class_for(ord("2")) == 2 and class_for(ord("7")) is None and class_for(ord("x")) is None


def test_help_rows_list_classes_keys_and_mouse():
    rows = help_rows(DEFAULT_SCHEMA)
    assert rows[0] == ("0-9", "active class (0 soil, 1 crop, 2 weed, 3 symptom)")
    assert len(rows) == 1 + len(BINDINGS) + len(MOUSE)
    assert ("?", "show the keys: on / off") in rows


def test_readme_mouse_table_comes_from_the_key_table():
    table = keys_markdown(DEFAULT_SCHEMA)
    for needle in ("`Enter`", "`Esc`", "`+` or `=`", "right or middle drag", "2 weed"):
        assert needle in table
    assert "licensed agronomic advice" in keys_markdown()
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    mouse = table[table.index("| mouse | does |"):]
    assert mouse in readme  # the README's mouse table and cautions, word for word
