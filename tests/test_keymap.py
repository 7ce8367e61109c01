"""The key map shared by the queue and the editor: one meaning per key, everywhere."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from labeler.classes import DEFAULT_SCHEMA
from labeler.keymap import (
    ANSWER_NO,
    ANSWER_YES,
    KEYMAP,
    KeyRow,
    Place,
    check_keymap,
    keymap_markdown,
    row_for_key,
    rows_for,
)

# the keys the queue and the editor gave two meanings before they shared one map
FORMER_CLASHES = ("a", "p", "n", "r", "t", "m")


def test_every_key_has_one_row_and_the_former_clashes_one_meaning():
    check_keymap()
    keys = [r.key for r in KEYMAP]
    assert len(keys) == len(set(keys))
    for key in FORMER_CLASHES:
        row = row_for_key(key)
        assert not (row.queue and row.editor), key  # now in one of the two only
    both = {r.key for r in KEYMAP if r.queue and r.editor}
    assert both == {"Esc", "?", "+ or =", "-", "w"}  # leave, the keys, zoom: the same
    assert row_for_key("a").queue.startswith("accept") and not row_for_key("a").editor
    with pytest.raises(KeyError, match="key: expected one of"):
        row_for_key("F13")
    with pytest.raises(ValueError, match="where: expected 'queue' or 'editor'"):
        rows_for("elsewhere")


def test_the_check_refuses_a_key_with_two_rows_or_a_taken_code():
    extra = KeyRow("a", editor="redo", command="redo2")
    with pytest.raises(ValueError, match="key 'a' has 2 rows"):
        check_keymap((*KEYMAP, extra))
    taken = KeyRow("Y", editor="yes man", command="yes")
    with pytest.raises(ValueError, match="key code 89 of 'Y' is taken"):
        check_keymap((*KEYMAP, taken))
    lonely = KeyRow("z")
    with pytest.raises(ValueError, match="key 'z' does nothing"):
        check_keymap((*KEYMAP, lonely))
    bad = KeyRow("z", queue="x", places=(Place("nowhere", "x", "x"),))
    with pytest.raises(ValueError, match="unknown screen 'nowhere'"):
        check_keymap((*KEYMAP, bad))
    twice = replace(row_for_key("g"), key="G", places=(Place("app", "a", "a"),) * 2,
                    textual="G")
    with pytest.raises(ValueError, match="bound twice on one screen"):
        check_keymap((*KEYMAP, twice))
    assert ord("y") in ANSWER_YES and 27 in ANSWER_NO


def test_queue_and_editor_bindings_are_generated_from_the_map():
    from labeler.editor.keys import BINDINGS, command_for
    from labeler.tui.keys import AGREEMENT_KEYS, APP_KEYS, QUEUE_KEYS, SUBSCREEN_KEYS

    editor_rows = rows_for("editor")
    assert [(b.label, b.summary) for b in BINDINGS] == [(r.key, r.editor) for r in editor_rows]
    for r in editor_rows:
        assert all(command_for(c) == r.command for c in r.key_codes)
    tui = {k.key: k.explain for k in APP_KEYS + QUEUE_KEYS + AGREEMENT_KEYS + SUBSCREEN_KEYS}
    assert tui == {r.textual_key: r.queue for r in rows_for("queue")}


def test_readme_key_table_is_the_generated_one():
    table = keymap_markdown(DEFAULT_SCHEMA)
    assert "| `a` | accept: keep the proposal" in table
    assert "(0 soil, 1 crop, 2 weed, 3 symptom)" in table
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    assert table in readme  # word for word
