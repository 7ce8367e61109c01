"""The model screen: every model version with its validation IoU, the mIoU trend, and the
annotation effort per version (median actions and seconds per saved tile, share accepted
unchanged: :func:`labeler.workflow.effort_by_model`)."""

from __future__ import annotations

from textual import work
from textual.app import ComposeResult
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Header, Label, Sparkline, Static
from textual.worker import get_current_worker

import labeler.workflow as workflow
from labeler.tui.figures import miou_series, model_cells, model_columns
from labeler.tui.keys import HEADER_ICON, SUBSCREEN_KEYS, bindings
from labeler.workflow.naming import model_details, model_labels

__all__ = ["ModelScreen", "EFFORT_COLUMNS", "effort_cells"]

#: Columns of the effort table.
EFFORT_COLUMNS = ("model", "saves", "median actions", "median seconds", "accepted unchanged")


def effort_cells(e) -> tuple[str, ...]:
    """One row of the effort table.

    Parameters
    ----------
    e : labeler.workflow.VersionEffort
        The effort of one model version.

    Returns
    -------
    cells : tuple of str
        Model, saves, median actions, median seconds (one decimal), share accepted
        unchanged (whole per cent), in the order of :data:`EFFORT_COLUMNS`.
    """
    return (e.model, str(e.saves), f"{e.median_actions:g}", f"{e.median_seconds:.1f}",
            f"{100 * e.accepted_share:.0f} %")


class ModelScreen(Screen):
    """Model versions, oldest first, and how their validation mIoU moved."""

    BINDINGS = bindings(SUBSCREEN_KEYS)

    def __init__(self) -> None:
        super().__init__()
        self.loads = 0
        self.series: list[float] = []
        self.details: dict[str, str] = {}

    def compose(self) -> ComposeResult:
        yield Header(icon=HEADER_ICON)
        yield Label("Model versions, oldest first (validation IoU per class)", classes="title")
        yield DataTable(id="model-table", cursor_type="row", zebra_stripes=True)
        yield Static("", id="model-details")
        yield Label("Validation mIoU over versions", classes="title")
        yield Sparkline([], id="miou-trend")
        yield Static("", id="miou-caption")
        yield Label("Effort per model version (saves started from its proposals)",
                    classes="title")
        yield DataTable(id="effort-table", cursor_type="row", zebra_stripes=True)
        yield Footer()

    def on_mount(self) -> None:
        schema = self.app.project.settings.classes
        self.query_one("#model-table", DataTable).add_columns(*model_columns(schema))
        self.query_one("#effort-table", DataTable).add_columns(*EFFORT_COLUMNS)
        self._load()

    @work(thread=True, exclusive=True, group="models", exit_on_error=False)
    def _load(self) -> None:
        worker = get_current_worker()
        try:
            versions = workflow.model_versions(self.app.project)
            effort = workflow.effort_by_model(self.app.project)
        except Exception as exc:  # noqa: BLE001 - shown to the user
            self.app.call_from_thread(self.app.report_error, exc, doing="reading model versions")
            return
        if not worker.is_cancelled:
            self.app.call_from_thread(self._apply, versions, effort)

    def _apply(self, versions, effort=()) -> None:
        schema = self.app.project.settings.classes
        table = self.query_one("#model-table", DataTable)
        table.clear()
        labels = model_labels(versions)
        self.details = {
            str(v.id): f"{labels[v.id]}: {model_details(v)} (stored as {v.name!r})"
            for v in versions
        }
        for v in versions:
            table.add_row(*model_cells(v, schema=schema, label=labels[v.id]), key=str(v.id))
        self.series = miou_series(versions)
        self.query_one("#miou-trend", Sparkline).data = self.series
        caption = self.query_one("#miou-caption", Static)
        if not versions:
            caption.update("no model version yet: propose or retrain first")
        elif not self.series:
            caption.update("no version has validation figures yet (cold start only)")
        else:
            caption.update(
                f"{len(self.series)} version(s) with figures: first {self.series[0]:.3f}, "
                f"latest {self.series[-1]:.3f}, best {max(self.series):.3f}"
            )
        effort_table = self.query_one("#effort-table", DataTable)
        effort_table.clear()
        for e in effort:
            effort_table.add_row(*effort_cells(e), key=str(e.model_version_id))
        self.loads += 1

    def on_data_table_row_highlighted(self, event: DataTable.RowHighlighted) -> None:
        """Spell out the highlighted version under the table.

        Parameters
        ----------
        event : DataTable.RowHighlighted
            The row the cursor moved to.
        """
        key = event.row_key.value if event.row_key is not None else None
        self.query_one("#model-details", Static).update(self.details.get(key, ""))

    def action_back(self) -> None:
        self.app.pop_screen()
