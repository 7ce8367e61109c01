"""The agreement screen: figures per annotator pair and class, and the contested tiles.

The figures are :func:`labeler.workflow.agreement_summary` (Cohen's kappa with its
Landis & Koch band, IoU, images compared); the contested list is
:func:`labeler.workflow.contested_tiles`. Settling opens the editor with ``--settle``.
"""

from __future__ import annotations

from textual import on, work
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.screen import Screen
from textual.widgets import Button, DataTable, Footer, Header, Label, Static
from textual.worker import get_current_worker

import labeler.workflow as workflow
from labeler.tui.figures import (
    AGREEMENT_COLUMNS,
    CONTESTED_COLUMNS,
    agreement_cells,
    contested_cells,
)
from labeler.tui.keys import AGREEMENT_KEYS, HEADER_ICON, SUBSCREEN_KEYS, bindings

__all__ = ["AgreementScreen"]


class AgreementScreen(Screen):
    """How far annotators agree on the tiles they share, and what a reviewer must settle."""

    BINDINGS = bindings(AGREEMENT_KEYS + SUBSCREEN_KEYS)

    def __init__(self) -> None:
        super().__init__()
        self.loads = 0
        self.summary = None
        self.contested = []

    def compose(self) -> ComposeResult:
        yield Header(icon=HEADER_ICON)
        yield Label("Agreement between annotators (pooled over shared tiles)", classes="title")
        yield DataTable(id="pair-table", cursor_type="none", zebra_stripes=True)
        yield Static("", id="agreement-note")
        yield Label("Contested tiles, least agreed first (a reviewer settles them)",
                    classes="title")
        yield DataTable(id="contested-table", cursor_type="row", zebra_stripes=True)
        with Horizontal(id="agreement-buttons"):
            yield Button("Settle the selected tile", id="settle", variant="primary")
            yield Button("Back to the queue", id="back")
        yield Footer()

    def on_mount(self) -> None:
        self.query_one("#pair-table", DataTable).add_columns(*AGREEMENT_COLUMNS)
        contested = self.query_one("#contested-table", DataTable)
        contested.add_columns(*CONTESTED_COLUMNS)
        contested.focus()
        self.query_one("#agreement-note", Static).update("computing ...")
        self.action_update()

    def action_update(self) -> None:
        """Compute the figures again from the store (in a worker)."""
        self._load()

    @work(thread=True, exclusive=True, group="agreement", exit_on_error=False)
    def _load(self) -> None:
        worker = get_current_worker()
        project = self.app.project
        try:
            summary = workflow.agreement_summary(project)
            contested = workflow.contested_tiles(project)
        except Exception as exc:  # noqa: BLE001 - shown to the user
            self.app.call_from_thread(self._failed, exc)
            return
        if not worker.is_cancelled:
            self.app.call_from_thread(self._apply, summary, contested)

    def _failed(self, exc: BaseException) -> None:
        self.query_one("#agreement-note", Static).update("the figures could not be computed")
        self.app.report_error(exc, doing="computing agreement")

    def _apply(self, summary, contested) -> None:
        schema = self.app.project.settings.classes
        self.summary, self.contested = summary, list(contested)
        _fill(self.query_one("#pair-table", DataTable), AGREEMENT_COLUMNS,
              list(agreement_cells(summary, schema=schema)))
        note = self.query_one("#agreement-note", Static)
        if summary.pairs:
            ov = summary.overall
            note.update(
                f"{len(summary.pairs)} pair(s), {ov.pixels_compared} pixels compared; kappa "
                "bands after Landis & Koch (1977), a convention for reading the numbers, "
                "not a verdict"
            )
        else:
            note.update(
                "no annotator pair yet: agreement needs two annotators' masks of the same "
                "tiles (overlap tiles)"
            )
        _fill(self.query_one("#contested-table", DataTable), CONTESTED_COLUMNS,
              [contested_cells(row) for row in self.contested],
              keys=[str(row.tile_id) for row in self.contested])
        self.loads += 1

    def selected_contested(self) -> int | None:
        """The contested tile under the table cursor.

        Returns
        -------
        int or None
            Its id; None when no tile is contested.
        """
        table = self.query_one("#contested-table", DataTable)
        if table.row_count == 0:
            return None
        key, _ = table.coordinate_to_cell_key(table.cursor_coordinate)
        return int(key.value)

    def action_settle(self) -> None:
        tile = self.selected_contested()
        if tile is None:
            self.app.tell("no contested tile to settle", severity="warning")
            return
        self.app.open_editor(tile, settle=True, on_done=self.action_update)

    def action_back(self) -> None:
        self.app.pop_screen()

    @on(Button.Pressed, "#settle")
    def _settle_pressed(self) -> None:
        self.action_settle()

    @on(Button.Pressed, "#back")
    def _back_pressed(self) -> None:
        self.action_back()


def _fill(table: DataTable, headers, rows, *, keys=None) -> None:
    """Put ``rows`` in ``table`` under ``headers`` with each column as wide as its widest
    cell: explicit widths, so a table filled from a worker never shows cells cut to the
    header's width while its automatic widths wait for an idle frame."""
    rows = [tuple(str(c) for c in r) for r in rows]
    widths = [max([len(str(h))] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]
    table.clear(columns=True)
    for header, width in zip(headers, widths, strict=True):
        table.add_column(header, width=width)
    for i, cells in enumerate(rows):
        table.add_row(*cells, key=None if keys is None else keys[i])
