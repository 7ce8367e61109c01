"""The headless screenshot tool behind docs/queue.png."""

from labeler.tui.rows import QUEUE_COLUMNS
from labeler.tui.snapshot import main, save_screenshot
from tests.tui.helpers import svg_text
from tests.workflow.conftest import fake_proposals


def test_save_screenshot_selects_the_tile(project, artefacts):
    fake_proposals(project)
    root = project.root
    project.close()  # the tool opens the project itself
    path = save_screenshot(root, artefacts / "snapshot-queue.svg", annotator="ines", tile=4)
    svg = svg_text(path)
    assert "tile 4 · east-block" in svg
    assert all(h in svg for h in QUEUE_COLUMNS)


def test_snapshot_command_errors(tmp_path, capsys):
    assert main([str(tmp_path / "nowhere"), str(tmp_path / "x.svg"), "--annotator", "ines"]) == 1
    assert "snapshot: error:" in capsys.readouterr().err
    assert not (tmp_path / "x.svg").exists()
