"""The queue screen: tiles in picker order, filters, the preview and the annotator's keys.

Every store or model call runs in a worker thread; results come back to the interface
through ``App.call_from_thread``. The screen decides nothing itself: accepting, parking,
the next tile, the queue order and retraining are :mod:`labeler.workflow` functions.

Holds are shown live: every :attr:`QueueScreen.holds_every` seconds the screen reads who
holds which tile (:func:`labeler.workflow.views.holders`, one light query) and, when that
differs from the rows shown, reads the rows again, so a tile another annotator opens (or
saves, or gives back) changes its state and "who" cells within that time.
"""

from __future__ import annotations

from collections.abc import Sequence

from textual import on, work
from textual.app import ComposeResult
from textual.containers import Horizontal, Vertical
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Header, Input, Label, Select, Static
from textual.worker import get_current_worker

import labeler.workflow as workflow
from labeler.metrics import format_iou
from labeler.states import PARKED, STATES
from labeler.tui.keys import HEADER_ICON, QUEUE_KEYS, bindings
from labeler.tui.park_prompt import ParkPrompt
from labeler.tui.preview import overlay
from labeler.tui.rows import (
    NOBODY,
    QUEUE_COLUMNS,
    RowFilter,
    filter_rows,
    fit_columns,
    preview_caption,
    queue_cells,
    ranking_notes,
)
from labeler.tui.widgets import TilePreview, WorkBar, palette_legend
from labeler.workflow.annotating import QueueRow
from labeler.workflow.views import holders

__all__ = ["QueueScreen"]


class QueueScreen(Screen):
    """Annotators work through the tiles here; managers watch the states change."""

    BINDINGS = bindings(QUEUE_KEYS)

    #: Seconds between reads of the holds (the live "who" and state cells).
    holds_every: float = 2.0

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[QueueRow] = []
        #: The columns shown now (those of QUEUE_COLUMNS that fit the table's width).
        self.columns: tuple[str, ...] = tuple(QUEUE_COLUMNS)
        self.shown_rows: list[QueueRow] = []
        self.row_filter = RowFilter()
        self.long_work: str | None = None
        self.loads = 0  # completed row loads (tests and the status line use it)
        self._preview_tile: int | None = None
        self._annotators: tuple[str, ...] = ()
        self._saving: set[int] = set()  # tiles with a save or park still in flight
        self.hold_checks = 0  # completed reads of the holds (tests wait on it)
        self._holds_timer = None

    # -- layout -------------------------------------------------------------------------
    @property
    def project(self):
        return self.app.project

    @property
    def schema(self):
        return self.app.project.settings.classes

    def compose(self) -> ComposeResult:
        yield Header(icon=HEADER_ICON)
        with Horizontal(id="filters"):
            yield Select(
                [(s, s) for s in STATES], prompt="every state", id="state-filter"
            )
            yield Select(
                [(c.name, c.name) for c in self.schema if c.index != 0],
                prompt="any class",
                id="class-filter",
            )
            yield Select([(NOBODY, NOBODY)], prompt="anyone", id="person-filter")
            yield Input(placeholder="tile id, Enter", type="integer", id="tile-search")
        with Horizontal(id="body"):
            yield DataTable(id="queue", cursor_type="row", zebra_stripes=True)
            with Vertical(id="side"):
                yield Label("", id="preview-caption")
                yield TilePreview(id="preview")
                yield Static(palette_legend(self.schema), id="legend")
        yield WorkBar(id="work")
        yield Static("", id="status")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#queue", DataTable)
        table.add_columns(*QUEUE_COLUMNS)
        self.columns = tuple(QUEUE_COLUMNS)
        table.focus()
        note = self.query_one(TilePreview).pick_graphics(self.project.settings.preview.graphics)
        self.query_one("#side").border_title = note
        self.reload()
        self._holds_timer = self.set_interval(self.holds_every, self._check_holds, name="holds")

    def on_resize(self) -> None:
        """Fit the columns to the new width."""
        if self.loads:
            self.call_after_refresh(self._refit)

    def _refit(self) -> None:
        table = self.query_one("#queue", DataTable)
        keep = fit_columns(self._cells(), width=table.size.width - 2)
        if tuple(QUEUE_COLUMNS[k] for k in keep) != self.columns:
            self._refill()

    def on_screen_suspend(self) -> None:
        # another screen on top: no need to watch the holds until the queue shows again
        if self._holds_timer is not None:
            self._holds_timer.pause()
        self.query_one(TilePreview).refresh()  # half blocks under a dialog

    def on_screen_resume(self) -> None:
        if self._holds_timer is not None:
            self._holds_timer.resume()
        self.query_one(TilePreview).refresh()  # the picture again, if a protocol draws it
        # back from the agreement or model screen: a reviewer may have settled tiles there
        if self.loads:
            self.reload()

    # -- rows ---------------------------------------------------------------------------
    def selected_tile(self) -> int | None:
        """The tile under the table cursor.

        Returns
        -------
        int or None
            Its id; None when the table is empty.
        """
        table = self.query_one("#queue", DataTable)
        if table.row_count == 0:
            return None
        row_key, _ = table.coordinate_to_cell_key(table.cursor_coordinate)
        return int(row_key.value)

    def table_order(self) -> list[int]:
        """The tiles in the order the table shows them.

        Returns
        -------
        list of int
            Tile ids, top row first (the filters applied).
        """
        table = self.query_one("#queue", DataTable)
        return [int(r.key.value) for r in table.ordered_rows]

    def reload(self, *, select: int | None = None) -> None:
        """Read the queue from the store again (in a worker) and redraw the table.

        Parameters
        ----------
        select : int, optional
            Tile to put the cursor on afterwards (default: the tile under it now).
        """
        self._load_rows(select)

    @work(thread=True, exclusive=True, group="rows", exit_on_error=False)
    def _load_rows(self, select: int | None) -> None:
        worker = get_current_worker()
        try:
            rows = workflow.queue_rows(self.project)
            people = tuple(workflow.annotators(self.project))
        except Exception as exc:  # noqa: BLE001 - shown to the user, the queue keeps running
            self.app.call_from_thread(self.app.report_error, exc, doing="reading the queue")
            return
        if not worker.is_cancelled:
            self.app.call_from_thread(self._apply_rows, rows, people, select)

    def _apply_rows(
        self, rows: list[QueueRow], people: Sequence[str], select: int | None
    ) -> None:
        self.rows = rows
        if tuple(people) != self._annotators:
            self._annotators = tuple(people)
            person = self.query_one("#person-filter", Select)
            current = person.value
            options = [(p, p) for p in people] + [(NOBODY, NOBODY)]
            person.set_options(options)
            if current is not Select.NULL and current in dict(options):
                person.value = current
        self.loads += 1
        self._refill(select=select, force_preview=True)

    def _cells(self) -> list[tuple[str, ...]]:
        """Cell texts of the shown rows ("ranked by" judged on the whole queue)."""
        notes = ranking_notes(self.rows)
        return [
            queue_cells(r, schema=self.schema, ranked_by=notes.get(r.tile_id))
            for r in self.shown_rows
        ]

    def _refill(self, *, select: int | None = None, force_preview: bool = False) -> None:
        table = self.query_one("#queue", DataTable)
        keep = select if select is not None else self.selected_tile()
        self.shown_rows = filter_rows(self.rows, self.row_filter, schema=self.schema)
        cells = self._cells()
        shown = fit_columns(cells, width=table.size.width - 2)  # less the scroll bar
        columns = tuple(QUEUE_COLUMNS[k] for k in shown)
        if columns != self.columns:  # narrower or wider than before: other columns
            table.clear(columns=True)
            table.add_columns(*columns)
            self.columns = columns
        else:
            table.clear()
        for r, c in zip(self.shown_rows, cells, strict=True):
            table.add_row(*(c[k] for k in shown), key=str(r.tile_id))
        ids = [r.tile_id for r in self.shown_rows]
        if keep in ids:
            table.move_cursor(row=ids.index(keep), animate=False)
        self._update_status()
        tile = self.selected_tile()
        if tile is None:
            self._preview_tile = None
            self.query_one("#preview-caption", Label).update("")
            self.query_one(TilePreview).show_message(
                "no tile matches the filters" if self.rows else "the project has no tiles yet"
            )
        elif force_preview or tile != self._preview_tile:
            self._show_preview(tile)

    # -- holds, live ----------------------------------------------------------------------
    def shown_holds(self) -> dict[int, str]:
        """Who holds which tile according to the rows read last.

        Returns
        -------
        dict of int to str
            Tile id -> holder, for the tiles the rows say are held.
        """
        return {r.tile_id: r.held_by for r in self.rows if r.held_by}

    def _check_holds(self) -> None:
        if self.loads and self.app.is_running:
            self._read_holds()

    @work(thread=True, exclusive=True, group="holds", exit_on_error=False)
    def _read_holds(self) -> None:
        worker = get_current_worker()
        try:
            now = holders(self.project)
        except Exception as exc:  # noqa: BLE001 - a busy or gone database: try next time
            self.app.call_from_thread(self._holds_read, None, repr(exc))
            return
        if not worker.is_cancelled:
            self.app.call_from_thread(self._holds_read, now, "")

    def _holds_read(self, now: dict[int, str] | None, problem: str) -> None:
        self.hold_checks += 1
        if now is None:
            self.log.warning(f"reading the holds failed: {problem}")
            return
        if now != self.shown_holds():
            self.reload()

    def _update_status(self) -> None:
        counts: dict[str, int] = {}
        for r in self.rows:
            counts[r.state] = counts.get(r.state, 0) + 1
        states = "  ".join(f"{s} {counts[s]}" for s in STATES if counts.get(s))
        who = self.app.annotator
        self.query_one("#status", Static).update(
            f"{len(self.shown_rows)} of {len(self.rows)} tiles shown · {states or 'no tiles'}"
            f" · working as {who}"
        )

    # -- filters and search ---------------------------------------------------------------
    @on(Select.Changed)
    def _filter_changed(self, event: Select.Changed) -> None:
        def value(widget_id: str) -> str | None:
            v = self.query_one(widget_id, Select).value
            return None if v is Select.NULL else str(v)

        self.row_filter = RowFilter(
            state=value("#state-filter"),
            class_name=value("#class-filter"),
            annotator=value("#person-filter"),
        )
        self._refill()

    def clear_filters(self) -> None:
        """Show every tile again."""
        for widget_id in ("#state-filter", "#class-filter", "#person-filter"):
            self.query_one(widget_id, Select).clear()
        self.row_filter = RowFilter()

    def select_tile(self, tile_id: int) -> bool:
        """Move the cursor to ``tile_id``, clearing the filters if they hide it.

        Parameters
        ----------
        tile_id : int
            The tile to show.

        Returns
        -------
        bool
            True when the cursor is on the tile; False (and the app says so) when the
            project has no such tile.
        """
        if tile_id not in {r.tile_id for r in self.rows}:
            self.app.tell(
                f"tile {tile_id} is not in this project; tile ids are in the 'tile' column",
                severity="warning",
            )
            return False
        if tile_id not in {r.tile_id for r in self.shown_rows}:
            self.clear_filters()
        self._refill(select=tile_id)
        self.query_one("#queue", DataTable).focus()
        return True

    @on(Input.Submitted, "#tile-search")
    def _search(self, event: Input.Submitted) -> None:
        text = event.value.strip()
        if not text:
            return
        try:
            tile_id = int(text)
        except ValueError:
            self.app.tell(f"tile id: expected a whole number, got {text!r}", severity="warning")
            return
        if self.select_tile(tile_id):
            event.input.clear()

    def action_find(self) -> None:
        self.query_one("#tile-search", Input).focus()

    # -- preview ------------------------------------------------------------------------
    @on(DataTable.RowHighlighted, "#queue")
    def _highlighted(self, event: DataTable.RowHighlighted) -> None:
        tile = int(event.row_key.value)
        if tile != self._preview_tile:
            self._show_preview(tile)

    def _show_preview(self, tile_id: int) -> None:
        self._preview_tile = tile_id
        self.query_one("#preview-caption", Label).update(f"tile {tile_id}: reading ...")
        self._load_preview(tile_id)

    @work(thread=True, exclusive=True, group="preview", exit_on_error=False)
    def _load_preview(self, tile_id: int) -> None:
        worker = get_current_worker()
        try:
            view = workflow.tile_view(self.project, tile_id, annotator=self.app.annotator)
            caption = preview_caption(view)
            picture = overlay(
                view.rgb, view.mask, schema=self.schema, opacity=self.project.settings.editor.opacity
            )
        except Exception as exc:  # noqa: BLE001 - shown in the preview, not fatal
            if not worker.is_cancelled:
                self.app.call_from_thread(self._preview_failed, tile_id, str(exc))
            return
        if not worker.is_cancelled:
            self.app.call_from_thread(self._preview_ready, tile_id, picture, caption)

    # -- zoom -----------------------------------------------------------------------------
    def action_zoom_in(self) -> None:
        self.query_one(TilePreview).zoom_by(+1)

    def action_zoom_out(self) -> None:
        self.query_one(TilePreview).zoom_by(-1)

    def action_whole(self) -> None:
        self.query_one(TilePreview).set_zoom(1)

    @on(TilePreview.Zoomed)
    def _zoomed(self) -> None:
        self.query_one("#side").border_subtitle = self.query_one(TilePreview).zoom_note

    def _preview_ready(self, tile_id: int, picture, caption: str) -> None:
        if tile_id != self._preview_tile:
            return
        self.query_one("#preview-caption", Label).update(caption)
        preview = self.query_one(TilePreview)
        preview.show(tile_id, picture)
        if preview.zoom != 1:
            preview.set_zoom(preview.zoom)  # the new tile's middle, and its note

    def _preview_failed(self, tile_id: int, message: str) -> None:
        if tile_id != self._preview_tile:
            return
        self.query_one("#preview-caption", Label).update(f"tile {tile_id}")
        self.query_one(TilePreview).show_message(message, tile_id=tile_id)

    # -- the annotator's keys -------------------------------------------------------------
    def _tile_or_say(self) -> int | None:
        tile = self.selected_tile()
        if tile is None:
            self.app.tell("no tile is selected; clear the filters or re-pick", severity="warning")
        return tile

    def _claim(self, tile_id: int) -> bool:
        """Mark a save of ``tile_id`` as in flight; False (and a word) if one already is."""
        if tile_id in self._saving:
            self.app.tell(f"tile {tile_id} is still being saved; wait a moment",
                          severity="warning")
            return False
        self._saving.add(tile_id)
        return True

    def action_accept(self) -> None:
        tile = self._tile_or_say()
        if tile is not None and self._claim(tile):
            self._accept(tile)

    @work(thread=True, group="saves", exit_on_error=False)
    def _accept(self, tile_id: int) -> None:
        who = self.app.annotator
        try:
            rec = workflow.accept_tile(self.project, tile_id, who)
        except Exception as exc:  # noqa: BLE001
            self.app.call_from_thread(self._save_failed, tile_id, exc, f"accepting tile {tile_id}")
            return
        try:  # accept moves on to the next tile this annotator may take
            after = workflow.next_tile(self.project, who)
        except Exception:  # noqa: BLE001 - nothing left (or unreadable): stay on the tile
            after = tile_id
        self.app.call_from_thread(
            self._saved, tile_id, f"tile {tile_id}: proposal kept as {who}'s mask "
            f"(version {rec.version}, {rec.state})", select=after,
        )

    def action_park(self) -> None:
        """Park the selected tile (asking for an optional reason), or bring a parked one back."""
        tile = self._tile_or_say()
        if tile is None:
            return
        state = next((r.state for r in self.rows if r.tile_id == tile), None)
        if state == PARKED:
            if self._claim(tile):
                self._park(tile, None, back=True)
            return

        def answered(reason: str | None) -> None:
            if reason is not None and self._claim(tile):
                self._park(tile, reason, back=False)

        self.app.push_screen(ParkPrompt(tile), answered)

    @work(thread=True, group="saves", exit_on_error=False)
    def _park(self, tile_id: int, reason: str | None, *, back: bool) -> None:
        who = self.app.annotator
        try:
            if back:
                state = workflow.unpark_tile(self.project, tile_id, who)
            else:
                workflow.park_tile(self.project, tile_id, who, reason=reason)
        except Exception as exc:  # noqa: BLE001
            doing = f"{'un-parking' if back else 'parking'} tile {tile_id}"
            self.app.call_from_thread(self._save_failed, tile_id, exc, doing)
            return
        if back:
            message = f"tile {tile_id} is back in the queue ({state})"
        else:
            message = f"tile {tile_id} parked" + (f": {reason}" if reason else "")
        self.app.call_from_thread(self._saved, tile_id, message)

    def _saved(self, tile_id: int, message: str, *, select: int | None = None) -> None:
        self._saving.discard(tile_id)
        self.app.tell(message)
        self.reload(select=tile_id if select is None else select)

    def _save_failed(self, tile_id: int, exc: BaseException, doing: str) -> None:
        self._saving.discard(tile_id)
        self.app.report_error(exc, doing=doing)

    def action_next(self) -> None:
        self._next()

    @work(thread=True, group="saves", exit_on_error=False)
    def _next(self) -> None:
        try:
            tile_id = workflow.next_tile(self.project, self.app.annotator)
        except Exception as exc:  # noqa: BLE001
            self.app.call_from_thread(self.app.report_error, exc, doing="finding the next tile")
            return
        self.app.call_from_thread(self.select_tile, tile_id)

    def action_edit(self) -> None:
        tile = self._tile_or_say()
        if tile is not None:
            self.app.open_editor(tile, on_done=lambda: self.reload(select=tile))

    # -- long work ------------------------------------------------------------------------
    def _begin(self, label: str) -> bool:
        if self.long_work is not None:
            self.app.tell(
                f"{self.long_work} is still running; wait for it to finish", severity="warning"
            )
            return False
        self.long_work = label
        self.query_one(WorkBar).start(label)
        return True

    def _end(self) -> None:
        self.long_work = None
        self.query_one(WorkBar).stop()

    def _progress(self, done: int, total: int, label: str = "") -> None:
        """Progress callback for the workflow; called from the worker thread."""
        self.app.call_from_thread(self._step, done, total, label)

    def _step(self, done: int, total: int, label: str) -> None:
        self.query_one(WorkBar).step(done, total, label)

    def _failed(self, exc: BaseException, doing: str) -> None:
        self._end()
        self.app.report_error(exc, doing=doing)

    def action_repick(self) -> None:
        if self._begin("re-picking the queue"):
            self._repick()

    @work(thread=True, group="long", exit_on_error=False)
    def _repick(self) -> None:
        try:
            result = workflow.pick_tiles(self.project, progress=self._progress)
        except Exception as exc:  # noqa: BLE001
            self.app.call_from_thread(self._failed, exc, "re-picking")
            return
        self.app.call_from_thread(self._repicked, result)

    def _repicked(self, result) -> None:
        self._end()
        batch = sum(1 for i in result.items if i.in_batch)
        message = (
            f"queue re-picked ({result.strategy}): {len(result.items)} tiles, the first "
            f"{batch} form the batch"
        )
        if result.without_proposal:
            message += f"; {result.without_proposal} without a proposal stay at the end"
        if result.note:
            message += f". {result.note}"
        self.app.tell(message)
        first = result.items[0].tile_id if result.items else None
        self.reload(select=first)

    def action_retrain(self) -> None:
        if self._begin("retraining the model"):
            self._retrain()

    @work(thread=True, group="long", exit_on_error=False)
    def _retrain(self) -> None:
        # a worker thread of its own: lowered priority, torch on the free cores less one
        with workflow.background_work():
            try:
                result = workflow.retrain(self.project, progress=self._progress)
            except Exception as exc:  # noqa: BLE001
                self.app.call_from_thread(self._failed, exc, "retraining")
                return
            self.app.call_from_thread(self._retrained, result)
            try:
                renewed = workflow.renew_proposals(self.project, progress=self._renewing)
            except Exception as exc:  # noqa: BLE001
                self.app.call_from_thread(self._failed, exc, "renewing the proposals")
                return
        self.app.call_from_thread(self._renewed, renewed)

    def _renewing(self, done: int, total: int, label: str = "") -> None:
        """Renewal progress; the rows follow each image's proposals as they land."""
        self._progress(done, total, label)
        if label.endswith(": proposed"):
            self.app.call_from_thread(self.reload)

    def _renewed(self, renewed) -> None:
        self._end()
        p = renewed.proposals
        message = f"proposals renewed on {p.proposed} tiles"
        if p.left_alone:
            message += f"; {p.left_alone} saved or held tiles keep theirs"
        self.app.tell(message + ("; queue re-picked" if renewed.picked is not None else ""))
        self.reload()

    def _retrained(self, result) -> None:
        self.query_one(WorkBar).start("renewing the proposals")
        mv = result.model_version
        miou = "-" if mv.miou is None else f"{mv.miou:.3f}"
        self.app.tell(
            f"model {mv.name} trained on {mv.n_train_tiles} tiles. Validation IoU: "
            f"{format_iou(mv.val_iou, names=self.schema.names)} · mIoU {miou}",
            title="retrained",
            timeout=30,
        )
