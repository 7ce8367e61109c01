"""The editor's command line, the display check and failure messages."""

import sys
from pathlib import Path

import pytest

from labeler.tui.launch import (
    display_available,
    editor_command,
    failure_message,
    no_display_message,
)


def test_display_check():
    assert display_available({}, platform="linux") is False
    assert display_available({"DISPLAY": ""}, platform="linux") is False
    assert display_available({"DISPLAY": "  "}, platform="linux") is False
    assert display_available({"DISPLAY": ":99"}, platform="linux") is True
    # desktops without X variables
    assert display_available({}, platform="win32") is True
    assert display_available({}, platform="darwin") is True


def test_editor_command():
    cmd = editor_command(Path("fields/east"), 12, annotator="ana")
    assert cmd == [sys.executable, "-m", "labeler.cli", "edit", str(Path("fields/east")), "12",
                   "--annotator", "ana"]
    settle = editor_command("p", 3, annotator="rev", settle=True, python="py")
    assert settle == ["py", "-m", "labeler.cli", "edit", "p", "3", "--annotator", "rev",
                      "--settle"]
    with pytest.raises(ValueError, match="annotator: expected a name"):
        editor_command("p", 3, annotator="")


def test_messages():
    text = no_display_message(4)
    assert "No display here" in text and "tile 4" in text and "'a'" in text
    assert "Settling needs the editor" in no_display_message(4, settle=True)
    assert failure_message(5, 1, "Traceback\nlabeler: error: tile 5 is held by bo\n") == (
        "editor on tile 5 failed: tile 5 is held by bo"
    )
    assert failure_message(5, 3, "") == "editor on tile 5 failed: it stopped with exit code 3"
