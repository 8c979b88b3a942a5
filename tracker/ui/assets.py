"""Assets: expected excess returns of the assets held, from their factor exposures.

The service function behind this screen is looked up at run time
(``tracker.service.assets_view.load_assets(store, config)``), because it is written
separately; until it exists the screen says so and shows nothing else. Whatever it
returns -- a list of dataclasses or dicts, or an object with such a ``rows`` list -- is
shown as a table of its fields.
"""

from __future__ import annotations

import dataclasses
import importlib
import importlib.util
import math

from rich.text import Text
from textual import work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from tracker.ui.messages import AssetsLoaded
from tracker.ui.widgets import ActivityLine, CautionLine

SERVICE_MODULE = "tracker.service.assets_view"
NOT_AVAILABLE = ("The asset view is not available yet: this installation has no asset service "
                 f"({SERVICE_MODULE}). Factor premia are on the board.")


def asset_loader():
    """The service function, or None when the asset view does not exist yet."""
    try:
        if importlib.util.find_spec(SERVICE_MODULE) is None:
            return None
        mod = importlib.import_module(SERVICE_MODULE)
    except ImportError:
        return None
    return getattr(mod, "load_assets", None)


def as_records(result) -> list[dict]:
    rows = getattr(result, "rows", result)
    out = []
    for r in rows or ():
        if dataclasses.is_dataclass(r):
            out.append({f.name: getattr(r, f.name) for f in dataclasses.fields(r)})
        elif isinstance(r, dict):
            out.append(dict(r))
    return out


def _cell(v) -> Text | str:
    if isinstance(v, float):
        return Text("-" if not math.isfinite(v) else f"{v:.4g}", justify="right")
    if isinstance(v, (tuple, list)):
        return " ".join(map(str, v))
    return "-" if v is None else str(v)


class AssetsScreen(Screen):
    CSS_PATH = "assets.tcss"
    BINDINGS = [Binding("escape", "back", "Back")]

    def compose(self) -> ComposeResult:
        yield Static("Assets", id="assets-title")
        yield ActivityLine(id="activity")
        yield Static("", id="assets-note")
        yield DataTable(id="assets", cursor_type="row", zebra_stripes=True)
        yield CautionLine(id="caution")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        table = self.query_one("#assets", DataTable)
        if asset_loader() is None:
            table.display = False
            self.query_one("#assets-note", Static).update(NOT_AVAILABLE)
            return
        table.focus()
        self._load()

    @work(thread=True, exclusive=True, group="assets", exit_on_error=False)
    def _load(self) -> None:
        try:
            records = as_records(asset_loader()(self.app.store, self.app.config))
        except Exception as exc:
            self.post_message(AssetsLoaded(error=f"{type(exc).__name__}: {exc}"))
            return
        cols = tuple(records[0]) if records else ()
        self.post_message(AssetsLoaded(cols, tuple(records)))

    def on_assets_loaded(self, message: AssetsLoaded) -> None:
        note = self.query_one("#assets-note", Static)
        table = self.query_one("#assets", DataTable)
        if message.error:
            note.update(Text(f"Cannot read the asset view: {message.error}", style="bold red"))
            return
        note.update(f"{len(message.rows)} asset(s)." if message.rows else "No assets in the store.")
        if not table.columns:
            for c in message.columns:
                table.add_column(c, key=c)
        for i, r in enumerate(message.rows):
            key = str(r.get(message.columns[0], i)) if message.columns else str(i)
            cells = [_cell(r.get(c)) for c in message.columns]
            if key in table.rows:
                for c, v in zip(message.columns, cells):
                    table.update_cell(key, c, v, update_width=True)
            else:
                table.add_row(*cells, key=key)

    def show_board(self, _board) -> None:
        if asset_loader() is not None:
            self._load()

    def action_back(self) -> None:
        self.app.pop_screen()

    def palette_commands(self):
        yield "Back to the board", "", self.action_back
