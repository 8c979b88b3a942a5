"""The board: one row per factor."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from tracker.service.board import BoardRow, board_rows

COLUMNS = (("id", "Factor"), ("last", "Last date"), ("obs", "Obs"), ("mean", "Mean/yr"), ("vol", "Vol/yr"), ("sr", "Sharpe"))


def _pct(x: float) -> str:
    return "-" if x != x else f"{x * 100:.2f}%"


class BoardScreen(Screen):
    CSS_PATH = "board.tcss"

    def compose(self) -> ComposeResult:
        yield Static("", id="header-line")
        yield DataTable(id="board", cursor_type="row", zebra_stripes=True)
        yield Static("Statistical estimates, not investment advice.", id="caution")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one(DataTable)
        for key, label in COLUMNS:
            table.add_column(label, key=key)
        self.refresh_rows()

    def refresh_rows(self) -> None:
        rows = board_rows(self.app.store)
        table = self.query_one(DataTable)
        for row in rows:
            cells = self._cells(row)
            if row.factor_id in table.rows:
                for (key, _), value in zip(COLUMNS, cells):
                    table.update_cell(row.factor_id, key, value)
            else:
                table.add_row(*cells, key=row.factor_id)
        last = max((r.last_date for r in rows if r.last_date), default=None)
        self.query_one("#header-line", Static).update(f"{len(rows)} factors  data through {last or '-'}")

    @staticmethod
    def _cells(row: BoardRow) -> tuple[str, ...]:
        return (
            row.factor_id,
            str(row.last_date or "-"),
            str(row.n_obs),
            _pct(row.mean_ann),
            _pct(row.vol_ann),
            "-" if row.sharpe_ann != row.sharpe_ann else f"{row.sharpe_ann:.2f}",
        )
