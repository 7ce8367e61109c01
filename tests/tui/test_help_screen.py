"""The help screen lists every key; the footer shows the bindings."""

from labeler.keymap import KEYMAP
from labeler.tui.app import QueueApp
from labeler.tui.help_screen import HelpScreen
from labeler.tui.keys import AGREEMENT_KEYS, APP_KEYS, QUEUE_KEYS, SUBSCREEN_KEYS
from labeler.tui.queue_screen import QueueScreen
from tests.tui.helpers import SIZE, idle, svg_text


def test_keys_are_unique_per_screen():
    for keys in (APP_KEYS + QUEUE_KEYS, APP_KEYS + AGREEMENT_KEYS + SUBSCREEN_KEYS):
        assert len({k.key for k in keys}) == len(keys)


async def test_help_lists_every_key_and_closes(project, artefacts):
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("question_mark")
        await pilot.pause()
        assert isinstance(app.screen, HelpScreen)
        path = app.save_screenshot(filename="help.svg", path=str(artefacts))
        table = app.screen.query_one("#help-keys").content
        caution = str(app.screen.query_one("#help-caution").content)
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, QueueScreen)
    svg = svg_text(path)
    assert "Keys of the labeler queue and editor" in svg
    assert "in the editor window" in svg
    # the table shown is the shared key map, row for row (it scrolls in its box)
    cells = [list(c.cells) for c in table.columns]
    assert cells[0] == ["0-9", *(r.key for r in KEYMAP)]
    assert cells[1][1:] == [r.queue for r in KEYMAP]
    assert cells[2][1:] == [r.editor for r in KEYMAP]
    assert "2 weed" in cells[2][0]
    assert "licensed agronomic advice" in caution
