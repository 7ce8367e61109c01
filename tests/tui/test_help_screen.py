"""The help screen lists every key; the footer shows the bindings."""

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
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, QueueScreen)
    svg = svg_text(path)
    assert "Keys of the labeler queue" in svg
    assert "licensed agronomic advice" in svg
    for k in APP_KEYS + QUEUE_KEYS + AGREEMENT_KEYS + SUBSCREEN_KEYS:
        # the first words of each sentence (long ones wrap inside the box)
        assert " ".join(k.explain.split()[:3]) in svg, k.key
