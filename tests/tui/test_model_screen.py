"""The model screen: versions with validation IoU per class and the mIoU trend line."""

from textual.widgets import DataTable, Sparkline

from labeler.tui.app import QueueApp
from labeler.tui.figures import model_columns
from labeler.tui.queue_screen import QueueScreen
from tests.tui.helpers import SIZE, idle, svg_text


async def test_model_versions_and_trend(project, artefacts):
    store = project.store
    store.add_model_version(
        kind="cold_start", name="cold-start exg-exr 1.4 zero min24",
        details={"exr_coefficient": 1.4, "threshold": "zero", "min_object_px": 24},
    )
    figures = [
        ("head-1", {"soil": 0.91, "crop": 0.62, "weed": 0.21, "symptom": None}, 0.58),
        ("head-2", {"soil": 0.93, "crop": 0.71, "weed": 0.35, "symptom": 0.12}, 0.5275),
        ("head-3", {"soil": 0.94, "crop": 0.78, "weed": 0.47, "symptom": 0.29}, 0.62),
    ]
    for name, iou, miou in figures:
        store.add_model_version(kind="head", name=name, n_train_tiles=4, val_iou=iou, miou=miou)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("m")
        await idle(pilot)
        screen = app.screen
        table = screen.query_one("#model-table", DataTable)
        rows = [[str(c) for c in table.get_row_at(i)] for i in range(table.row_count)]
        # a short name in the table, the rule's settings under it for the highlighted row
        assert [r[0] for r in rows] == ["colour rule", "head-1", "head-2", "head-3"]
        assert str(screen.query_one("#model-details").render()) == (
            "colour rule: vegetation colour index ExG - ExR (ExR weight 1.4), threshold zero, "
            "objects from 24 px; no training (stored as 'cold-start exg-exr 1.4 zero min24')"
        )
        await pilot.press("down")
        await idle(pilot)
        assert str(screen.query_one("#model-details").render()).startswith(
            "head-1: trained on 4 tiles"
        )
        assert rows[0][4:] == ["-"] * 5
        assert rows[1][4:] == ["0.910", "0.620", "0.210", "-", "0.580"]
        assert rows[3][4:] == ["0.940", "0.780", "0.470", "0.290", "0.620"]
        assert screen.query_one("#miou-trend", Sparkline).data == [0.58, 0.5275, 0.62]
        caption = str(screen.query_one("#miou-caption").render())
        assert caption == ("3 version(s) with figures: first 0.580, latest 0.620, best 0.620")
        path = app.save_screenshot(filename="models.svg", path=str(artefacts))
        await pilot.press("escape")
        await idle(pilot)
        assert isinstance(app.screen, QueueScreen)
    svg = svg_text(path)
    for label in (*model_columns(project.settings.classes), "Model versions",
                  "Validation mIoU over versions", "head-3"):
        assert label in svg, label


async def test_effort_per_model_version(project):
    # the hand-made saves of the workflow's effort test (common practice, no source)
    from tests.workflow.test_effort import record_saves

    ids = record_saves(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("m")
        await idle(pilot)
        table = app.screen.query_one("#effort-table", DataTable)
        rows = [[str(c) for c in table.get_row_at(i)] for i in range(table.row_count)]
        assert rows == [["cold-start", "3", "4", "30.0", "33 %"],
                        ["head-1", "2", "1", "2.5", "50 %"]]
        assert [str(k.value) for k in table.rows] == [str(ids["cold-start"]), str(ids["head-1"])]
