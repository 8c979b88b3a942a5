"""The board: one row per factor, with the market regime and the store's state on top.

Rows are keyed by factor id. A new board from the live worker updates only the cells
that changed (``DataTable.update_cell``), adds or removes rows by key, and re-sorts
only when the order really changed, so the cursor stays on its factor and the view
does not scroll. The table is rebuilt only when the user changes what the columns are
(terminal width crossing the wide layout, or the t / P(>0) toggle).
"""

from __future__ import annotations

from rich.text import Text
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Input, Static

from tracker.service.report import ordered_codes, severity_of
from tracker.service.views import Board, BoardRow, mark_reviewed
from tracker.ui import formatting as fmt
from tracker.ui.board_rows import (
    SORTS,
    Layout,
    cell_text,
    choose_layout,
    market_text,
    plain,
    row_matches,
    row_summary,
    sort_rows,
    store_text,
)
from tracker.ui.messages import ReviewMarked
from tracker.ui.widgets import ActivityLine, CautionLine

# ------------------------------------------------------------------------- the screen

class BoardTable(DataTable):
    """The board's table; Enter opens the highlighted factor (and says so in the footer)."""

    BINDINGS = [Binding("enter", "select_cursor", "Detail", tooltip="Open the highlighted factor: charts, regimes, warnings, fit diagnostics")]


class BoardScreen(Screen):
    """Every tracked factor, updated in place as new data and estimates arrive."""

    CSS_PATH = "board.tcss"
    BINDINGS = [
        Binding("enter", "open_detail", "Detail", show=False, tooltip="Open the highlighted factor: charts, regimes, warnings, fit diagnostics"),
        Binding("slash", "filter", "Filter", tooltip="Filter by part of a factor id, name, regime or warning code; Enter keeps it, Esc clears it"),
        Binding("s", "sort", "Sort", tooltip="Sort by the next measure: factor id, premium, t-stat, P(>0), regime probability, warning severity, changed, last date"),
        Binding("o", "reverse", "Reverse order", show=False, tooltip="Reverse the sort order"),
        Binding("w", "only_warnings", "Cautions only", show=False, tooltip="Show only factors with a caution or an alert (toggle)"),
        Binding("c", "only_changed", "Changed only", show=False, tooltip="Show only factors with a material change (*) since the last review (toggle)"),
        Binding("t", "toggle_stat", "t or P(>0)", show=False, tooltip="Narrow board: show the t-stat or P(premium > 0) (the wide board shows both)"),
        Binding("m", "mark_reviewed", "Reviewed", tooltip="Mark the board reviewed (asks first); * then marks what changes after this moment"),
        Binding("r", "refit", "Refit", tooltip="Refit every factor's models in the background (asks first)"),
        # priority: Escape must reach the screen even while the filter box has the focus
        Binding("escape", "clear_filter", "Clear filter", show=False, priority=True,
                tooltip="Clear the filter and the toggles"),
    ]

    def __init__(self) -> None:
        super().__init__()
        self.board: Board | None = None
        self.sort = SORTS[0]
        self.reverse = False
        self.query_text = ""
        self.only_warnings = False
        self.only_changed = False
        self.stat = "t"
        self.columns_layout: Layout | None = None
        self._shown: dict[str, dict[str, object]] = {}

    def compose(self) -> ComposeResult:
        yield Static("Market regime: loading…", id="market")
        yield Static("Reading the store…", id="store-line")
        with Horizontal(id="viewbar"):
            yield Static("", id="view")
            yield ActivityLine(id="activity")
        yield BoardTable(id="board", cursor_type="row", zebra_stripes=True)
        yield Static("", id="row-info")
        yield Input(placeholder="filter: factor, name, regime or warning code (Esc clears)", id="filter")
        yield CautionLine(id="caution")
        yield Footer(compact=True)

    @property
    def table(self) -> DataTable:
        return self.query_one("#board", DataTable)

    def on_mount(self) -> None:
        self.query_one("#filter", Input).display = False
        self.table.focus()
        board = getattr(self.app, "board", None)
        if board is not None:
            self.show_board(board)
        else:
            self._update_view_line()

    # ---------------------------------------------------------------- data in

    def show_board(self, board: Board) -> None:
        self.board = board
        width = self.app.size.width
        self.query_one("#market", Static).update(market_text(board, width - 2))
        self.query_one("#store-line", Static).update(store_text(board, width - 2))
        layout = choose_layout(width, list(board.rows), self.stat)
        if self.columns_layout is None or (layout.wide, layout.columns) != (self.columns_layout.wide, self.columns_layout.columns):
            self._rebuild(layout)
        else:
            self.columns_layout = layout
            self._sync()
        self._update_view_line()
        self._update_row_info()

    def on_resize(self) -> None:
        if self.board is not None:
            self.show_board(self.board)

    def visible_rows(self) -> list[BoardRow]:
        if self.board is None:
            return []
        rows = [r for r in self.board.rows if row_matches(r, self.query_text)]
        if self.only_warnings:
            rows = [r for r in rows if r.worst >= 2]
        if self.only_changed:
            rows = [r for r in rows if fmt.material_changes(r.changes)]
        return sort_rows(rows, self.sort, self.reverse)

    def _cells(self, r: BoardRow) -> dict[str, object]:
        return {key: cell_text(r, key, self.columns_layout) for key, _ in self.columns_layout.columns}

    def _rebuild(self, layout: Layout) -> None:
        table = self.table
        keep, scroll_y = self.cursor_key(), table.scroll_y
        table.clear(columns=True)
        self.columns_layout = layout
        for key, head in layout.columns:
            width = layout.warn_width if key == "warn" else (layout.changes_width if key == "changes" else None)
            table.add_column(Text(head, justify="right") if key in ("prem", "band", "t", "ppos", "sharpe") else head,
                             key=key, width=width)
        self._shown = {}
        self._sync()
        if keep is not None and keep in table.rows:
            table.move_cursor(row=table.get_row_index(keep), scroll=False)
        table.scroll_to(y=scroll_y, animate=False)

    def _sync(self) -> None:
        """Make the table show ``visible_rows()`` touching only what changed."""
        table = self.table
        rows = self.visible_rows()
        desired = [r.factor_id for r in rows]
        keep = self.cursor_key()
        for key in [rk.value for rk in list(table.rows)]:
            if key not in desired:
                table.remove_row(key)
                self._shown.pop(key, None)
        for r in rows:
            cells = self._cells(r)
            old = self._shown.get(r.factor_id)
            if old is None:
                table.add_row(*cells.values(), key=r.factor_id)
            else:
                for col, value in cells.items():
                    if old.get(col) != value:
                        table.update_cell(r.factor_id, col, value, update_width=True)
            self._shown[r.factor_id] = cells
        if [row.key.value for row in table.ordered_rows] != desired:
            order = {k: i for i, k in enumerate(desired)}
            table.sort("factor", key=lambda cell: order.get(plain(cell)[1:], len(order)))
        if keep is not None and keep in table.rows:
            index = table.get_row_index(keep)
            if index != table.cursor_row:
                table.move_cursor(row=index, scroll=False)

    def cursor_key(self) -> str | None:
        table = self.table
        if table.row_count == 0:
            return None
        try:
            return table.coordinate_to_cell_key(table.cursor_coordinate).row_key.value
        except Exception:  # cursor outside the rows while the table is rebuilt
            return None

    def _update_view_line(self) -> None:
        n_all = len(self.board.rows) if self.board else 0
        shown = len(self.table.rows)
        arrow = "▼" if self.sort.descending != self.reverse else "▲"
        parts = [f"{shown}/{n_all} factors", f"sort {self.sort.title} {arrow}"]
        filters = []
        if self.query_text.strip():
            filters.append(f"'{self.query_text.strip()}'")
        if self.only_warnings:
            filters.append("cautions+")
        if self.only_changed:
            filters.append("changed")
        parts.append(("filter " + ", ".join(filters)) if filters else "no filter")
        self.query_one("#view", Static).update(" · ".join(parts))

    def _update_row_info(self) -> None:
        info = self.query_one("#row-info", Static)
        key = self.cursor_key()
        if self.board is None:
            info.update("")
            return
        row = next((r for r in self.board.rows if r.factor_id == key), None)
        if row is None:
            info.update("No factor matches the filter (Esc clears it)." if self.board.rows else
                        "No factors in the store yet: drop files declaring factors go into the inbox.")
            return
        lines = row_summary(row, self.board)
        text = Text()
        for i, line in enumerate(lines):
            if i:
                text.append("\n")
            style = fmt.SEVERITY_STYLES.get(severity_of(ordered_codes(row.codes)[0]), "") if i == 1 and row.codes else ""
            text.append(line, style=style)
        info.update(text)

    @on(DataTable.RowHighlighted, "#board")
    def _highlighted(self, _event: DataTable.RowHighlighted) -> None:
        self._update_row_info()

    @on(DataTable.RowSelected, "#board")
    def _selected(self, event: DataTable.RowSelected) -> None:
        event.stop()
        self.open_detail(event.row_key.value)

    # ---------------------------------------------------------------- actions

    def action_open_detail(self) -> None:
        key = self.cursor_key()
        if key is not None:
            self.open_detail(key)

    def open_detail(self, factor_id: str) -> None:
        from tracker.ui.detail import DetailScreen

        order = [r.factor_id for r in self.visible_rows()]
        self.app.push_screen(DetailScreen(factor_id, order=order))

    def action_sort(self) -> None:
        i = next(i for i, s in enumerate(SORTS) if s.key == self.sort.key)
        self.set_sort(SORTS[(i + 1) % len(SORTS)].key)

    def set_sort(self, key: str, reverse: bool = False) -> None:
        self.sort = next(s for s in SORTS if s.key == key)
        self.reverse = reverse
        self._refresh_rows()

    def action_reverse(self) -> None:
        self.reverse = not self.reverse
        self._refresh_rows()

    def action_only_warnings(self) -> None:
        self.only_warnings = not self.only_warnings
        self._refresh_rows()

    def action_only_changed(self) -> None:
        self.only_changed = not self.only_changed
        self._refresh_rows()

    def action_toggle_stat(self) -> None:
        self.stat = "ppos" if self.stat == "t" else "t"
        if self.board is not None:
            self.show_board(self.board)

    def _refresh_rows(self) -> None:
        if self.columns_layout is not None:
            self._sync()
        self._update_view_line()
        self._update_row_info()

    def action_filter(self) -> None:
        box = self.query_one("#filter", Input)
        box.display = True
        box.focus()

    @on(Input.Changed, "#filter")
    def _filter_changed(self, event: Input.Changed) -> None:
        self.query_text = event.value
        self._refresh_rows()

    @on(Input.Submitted, "#filter")
    def _filter_done(self, _event: Input.Submitted) -> None:
        box = self.query_one("#filter", Input)
        if not box.value.strip():
            box.display = False
        self.table.focus()

    def action_clear_filter(self) -> None:
        box = self.query_one("#filter", Input)
        changed = bool(self.query_text or self.only_warnings or self.only_changed)
        box.value = ""
        box.display = False
        self.query_text = ""
        self.only_warnings = self.only_changed = False
        self.table.focus()
        if changed:
            self._refresh_rows()

    def action_mark_reviewed(self) -> None:
        from tracker.ui.confirm import ConfirmScreen

        question = ("Mark the board reviewed now? The '*' marks restart from this moment: "
                    "the next changes are shown against today's board.")
        self.app.push_screen(ConfirmScreen("Mark reviewed", question), self._confirmed_review)

    def _confirmed_review(self, yes: bool | None) -> None:
        if yes:
            self._mark_reviewed()

    @work(thread=True, group="review", exit_on_error=False)
    def _mark_reviewed(self) -> None:
        try:
            when = mark_reviewed(self.app.store, self.app.config)
        except Exception as exc:
            self.post_message(ReviewMarked(None, f"{type(exc).__name__}: {exc}"))
            return
        self.post_message(ReviewMarked(when))

    def on_review_marked(self, message: ReviewMarked) -> None:
        if message.error:
            self.notify(f"Could not mark reviewed: {message.error}", severity="error")
            return
        self.notify(f"Board marked reviewed at {fmt.stamp(message.when)}.")
        self.app.action_check_now()

    def action_refit(self) -> None:
        from tracker.ui.confirm import ConfirmScreen

        question = ("Refit every factor's models now? Parameters are re-estimated on the whole "
                    "history in the background (under a minute on the demo store); stored past "
                    "estimates are kept as they were known. The board stays usable meanwhile.")
        self.app.push_screen(ConfirmScreen("Refit all factors", question), self._confirmed_refit)

    def _confirmed_refit(self, yes: bool | None) -> None:
        if yes:
            self.app.request_refit(None)

    def palette_commands(self):
        """(title, help, callback) for the command palette, on top of the app's own."""
        yield "Open the selected factor", "Charts, regimes, warnings and fit diagnostics", self.action_open_detail
        yield "Filter the board", "Type part of a factor id, name, regime or warning code", self.action_filter
        yield "Clear the filter", "Show every factor again", self.action_clear_filter
        for s in SORTS:
            yield (f"Sort by {s.title}", f"{'Highest' if s.descending else 'Lowest'} first",
                   lambda key=s.key: self.set_sort(key))
        yield "Reverse the sort order", "", self.action_reverse
        yield "Show only factors with cautions or alerts", "Toggle", self.action_only_warnings
        yield "Show only factors changed since the review", "Toggle", self.action_only_changed
        yield "Switch between t-stat and P(>0)", "On the narrow board", self.action_toggle_stat
        yield "Mark the board reviewed", "Changes are then shown against this moment", self.action_mark_reviewed
        yield "Refit all factors", "Re-estimate model parameters in the background", self.action_refit
        if self.board is not None:
            for r in self.board.rows:
                yield (f"Open factor {r.factor_id}", r.label, lambda fid=r.factor_id: self.open_detail(fid))
