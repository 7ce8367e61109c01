"""The agreement screen shows the figures of labeler.agreement for seeded masks."""

import subprocess

import numpy as np
from sklearn.metrics import cohen_kappa_score
from textual.widgets import DataTable

from labeler.agreement import cohen_kappa, landis_koch_band
from labeler.metrics import confusion_matrix, iou_per_class, mean_iou
from labeler.tui.agreement_screen import AgreementScreen
from labeler.tui.app import QueueApp
from labeler.tui.figures import AGREEMENT_COLUMNS, CONTESTED_COLUMNS
from labeler.tui.queue_screen import QueueScreen
from labeler.workflow import save_tile_mask
from tests.tui.helpers import SIZE, idle, svg_text
from tests.workflow.conftest import fake_proposals


def _two_annotators(project, seed=11):
    """alice and bruno save seeded masks of the first (overlap) tile; bruno differs on ~60 %."""
    rng = np.random.default_rng(seed)
    tile = project.store.tiles()[0]
    assert tile.overlap
    a = rng.integers(0, 4, tile.shape).astype(np.uint8)
    b = a.copy()
    flip = rng.random(tile.shape) < 0.6
    b[flip] = rng.integers(0, 4, int(flip.sum()))
    save_tile_mask(project, tile.id, "alice", a, parent_version=None)
    save_tile_mask(project, tile.id, "bruno", b, parent_version=None)
    return tile, a, b


def _rows(table):
    return [tuple(str(c) for c in table.get_row_at(i)) for i in range(table.row_count)]


async def test_agreement_figures_and_screenshot(overlap_project, artefacts):
    project = overlap_project
    fake_proposals(project)
    tile, a, b = _two_annotators(project)
    app = QueueApp(project, annotator="rhea")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("g")
        await idle(pilot)
        screen = app.screen
        assert isinstance(screen, AgreementScreen) and screen.loads == 1
        rows = _rows(screen.query_one("#pair-table", DataTable))
        cm = confusion_matrix(a, b, n_classes=4)
        kappa = cohen_kappa(cm)
        # oracle beside the project's own metric: scikit-learn's cohen_kappa_score
        assert abs(kappa - cohen_kappa_score(a.ravel(), b.ravel())) < 1e-9
        iou = iou_per_class(cm)
        assert rows[0] == ("alice / bruno", "all", f"{kappa:.3f}", landis_koch_band(kappa),
                           f"{mean_iou(cm):.3f}", "1")
        assert rows[2][:2] == ("", "crop") and rows[2][4] == f"{iou[1]:.3f}"
        assert rows[5][:2] == ("all pairs", "all") and rows[5][2] == f"{kappa:.3f}"
        contested = _rows(screen.query_one("#contested-table", DataTable))
        assert [r[0] for r in contested] == [str(tile.id)]
        assert contested[0][4] == "alice bruno"
        await idle(pilot)  # the tables painted before the screenshot
        path = app.save_screenshot(filename="agreement.svg", path=str(artefacts))
        await pilot.press("escape")
        await idle(pilot)
        assert isinstance(app.screen, QueueScreen)
    svg = svg_text(path)
    for label in (*AGREEMENT_COLUMNS, *CONTESTED_COLUMNS, "Agreement between annotators",
                  "Contested tiles", "Settle the selected tile", "alice / bruno"):
        assert label in svg, label


async def test_settle_opens_the_editor_with_settle(overlap_project, monkeypatch):
    monkeypatch.setenv("DISPLAY", ":99")
    project = overlap_project
    fake_proposals(project)
    tile, _, _ = _two_annotators(project)
    commands = []

    def editor(cmd):
        commands.append(list(cmd))
        return subprocess.CompletedProcess(cmd, 0, "", "")

    app = QueueApp(project, annotator="rhea", editor_runner=editor)
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("g")
        await idle(pilot)
        await pilot.click("#settle")
        await idle(pilot)
        assert commands and commands[-1][3:] == [
            "edit", str(project.root), str(tile.id), "--annotator", "rhea", "--settle"
        ]
        assert app.screen.loads == 2  # figures read again after the editor closed
