"""``labeler edit --next`` moves on after a save until the annotator stops."""

from __future__ import annotations

import pytest

from labeler.cli import main
from labeler.editor.sequence import edit_in_turn
from labeler.errors import NotFoundError
from labeler.workflow import next_tile
from tests.editor.script import ScriptGui
from tests.workflow.conftest import fake_proposals, project  # noqa: F401 - fixture

ENTER, ESC = 13, 27


def _windows(monkeypatch, scripts):
    """Each window the command opens plays the next script."""
    monkeypatch.setenv("DISPLAY", ":script")
    given = iter(scripts)
    opened = []

    def window(title):
        opened.append(title)
        return ScriptGui(next(given))

    monkeypatch.setattr("labeler.editor.window.HighGuiWindow", window)
    return opened


def test_a_save_opens_the_next_tile_and_esc_stops(project, monkeypatch, capsys):  # noqa: F811
    fake_proposals(project)
    first = next_tile(project, "ines")
    opened = _windows(monkeypatch, [[ENTER], [ENTER], [ESC]])
    assert main(["edit", str(project.root), "--next", "--annotator", "ines"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert len(opened) == 3  # one command, three tiles
    assert out[0].startswith(f"tile {first}: saved as accepted (full mask)")
    assert "left without changes" in out[2]
    assert out[-1] == "2 of 3 tiles saved; stopped"
    states = [t.state for t in project.store.tiles()]
    assert states.count("accepted") == 2 and "held" not in states


def test_the_sequence_ends_when_nothing_is_left(project, monkeypatch):  # noqa: F811
    fake_proposals(project)
    n = len(project.store.tiles())
    seen = []
    done, exhausted = edit_in_turn(
        project, "ines", report=lambda t, o: seen.append(t),
        guis=iter(ScriptGui([ENTER]) for _ in range(n + 1)),
    )
    assert exhausted and len(done) == n and all(o.saved for _, o in done)
    assert seen == [t for t, _ in done] and len(set(seen)) == n  # each tile once
    with pytest.raises(NotFoundError):
        edit_in_turn(project, "ines", report=lambda t, o: None, guis=iter([ScriptGui([ESC])]))


def test_a_limit_stops_early(project):  # noqa: F811
    fake_proposals(project)
    done, exhausted = edit_in_turn(project, "ines", report=lambda t, o: None,
                                   guis=iter(ScriptGui([ENTER]) for _ in range(5)), limit=2)
    assert len(done) == 2 and not exhausted
