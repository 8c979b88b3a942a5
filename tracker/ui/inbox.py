"""Recent drop files: outcome, rows, revisions, warnings and why a file was rejected."""

from __future__ import annotations

from rich.text import Text
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from tracker.service.status import pending_drop_files
from tracker.service.views import Board, DropEntry, load_drops
from tracker.ui import formatting as fmt
from tracker.ui.messages import DropsLoaded
from tracker.ui.widgets import ActivityLine

OUTCOME_MARKS = {"applied": ("ok", ""), "duplicate": ("=", "dim"), "rejected": ("x", "bold red")}
#: (key, heading, width): fixed widths, so the table fits 80 columns and never jumps as files arrive.
COLUMNS = (("id", "Drop", 4), ("file", "File", 20), ("outcome", "Outcome", 11), ("rows", "Rows", 5),
           ("rev", "Rev.", 4), ("warn", "Warn.", 5), ("at", "Processed", 16))
TABLE_SHORT = {"factor_returns": "factor", "asset_returns": "asset", "risk_free": "risk-free",
               "factors": "factor decl.", "assets": "asset decl."}


def _plain(x) -> str:
    return x.plain if isinstance(x, Text) else str(x)


def inbox_location(app) -> str:
    """Where upstream jobs write drop files (shown so a reader knows where to look)."""
    return str(app.config.inbox_path(app.store.folder))


def rows_total(e: DropEntry) -> int:
    total = 0
    for v in e.rows.values():
        try:
            total += int(v)
        except (TypeError, ValueError):
            pass
    return total


def drop_details(e: DropEntry) -> Text:
    out = Text()
    mark, style = OUTCOME_MARKS.get(e.outcome, ("?", ""))
    out.append(f"[{mark}] {e.file_name}", style="bold")
    out.append(f" · drop {e.drop_id} · {e.outcome} · processed {fmt.stamp(e.processed_at)}\n")
    if e.reason:
        out.append(f"Reason: {e.reason}\n", style=style or "bold")
    written = {t: n for t, n in e.rows.items() if n}
    if written:
        out.append("Rows written: " + ", ".join(f"{TABLE_SHORT.get(t, t)} {n}" for t, n in written.items())
                   + f"; {e.n_revisions} revision(s) of stored values\n")
    elif e.outcome == "applied":
        out.append(f"No rows written; {e.n_revisions} revision(s)\n")
    for w in e.warnings[:6]:
        if not isinstance(w, dict):
            out.append(f"  ! {w}\n")
            continue
        if w.get("code") == "more_warnings":
            out.append(f"  … and {w.get('count', '?')} more warning(s)\n", style="dim")
            continue
        where = " ".join(str(w[k]) for k in ("series_id", "date") if w.get(k))
        nums = []
        if w.get("value") is not None:
            nums.append(f"value {w['value']:.4g}" if isinstance(w["value"], (int, float)) else f"value {w['value']}")
        if w.get("threshold") is not None:
            nums.append(f"limit {w['threshold']}")
        line = f"  ! {w.get('code', '?')}: {w.get('message', '')}"
        if where:
            line += f" [{where}]"
        if nums:
            line += f" ({', '.join(nums)})"
        out.append(line + "\n", style="#d7af00")
    if len(e.warnings) > 6:
        out.append(f"  … {len(e.warnings) - 6} more listed in the receipt beside the file\n", style="dim")
    return out


class InboxScreen(Screen):
    """The drop files the store has seen, newest first, and those still waiting."""

    CSS_PATH = "inbox.tcss"
    BINDINGS = [Binding("escape", "back", "Back", tooltip="Back to the previous screen")]

    def __init__(self) -> None:
        super().__init__()
        self.entries: dict[int, DropEntry] = {}
        self._header_seen = None

    def compose(self) -> ComposeResult:
        yield Static("Drop files", id="inbox-title")
        yield ActivityLine(id="activity")
        yield DataTable(id="drops", cursor_type="row", zebra_stripes=True)
        yield Static("", id="drop-info")
        yield Footer(compact=True)

    @property
    def table(self) -> DataTable:
        return self.query_one("#drops", DataTable)

    def on_mount(self) -> None:
        t = self.table
        for key, head, width in COLUMNS:
            t.add_column(Text(head, justify="right") if key in ("id", "rows", "rev", "warn") else head,
                         key=key, width=width)
        t.focus()
        board = getattr(self.app, "board", None)
        self._header_seen = board.header if board else None
        self.reload()

    def reload(self) -> None:
        self._load()

    @work(thread=True, exclusive=True, group="inbox", exit_on_error=False)
    def _load(self) -> None:
        app = self.app
        try:
            entries = load_drops(app.store)
            pending = tuple(p.name for p in pending_drop_files(app.config.inbox_path(app.store.folder)))
        except Exception as exc:
            self.post_message(DropsLoaded(error=f"{type(exc).__name__}: {exc}"))
            return
        self.post_message(DropsLoaded(entries, pending))

    def on_drops_loaded(self, message: DropsLoaded) -> None:
        title = self.query_one("#inbox-title", Static)
        if message.error:
            title.update(Text(f"Cannot read the drop files: {message.error}", style="bold red"))
            return
        inbox = inbox_location(self.app)
        waiting = (f"{len(message.pending)} waiting: {', '.join(message.pending[:4])}"
                   + (" …" if len(message.pending) > 4 else "")) if message.pending else "none waiting"
        title.update(Text.assemble(("Drop files", "bold"), f" · {len(message.entries)} recorded · {waiting} · inbox {inbox}"))
        t = self.table
        keep = self._cursor_key()
        for e in message.entries:
            cells = self._cells(e)
            key = str(e.drop_id)
            if key in t.rows:
                for col, value in zip(("id", "file", "outcome", "rows", "rev", "warn", "at"), cells):
                    t.update_cell(key, col, value)
            else:
                t.add_row(*cells, key=key)
            self.entries[e.drop_id] = e
        t.sort("id", key=lambda cell: -int(_plain(cell)))
        if keep is not None and keep in t.rows:
            idx = t.get_row_index(keep)
            if idx != t.cursor_row:
                t.move_cursor(row=idx, scroll=False)
        self._show_info()

    @staticmethod
    def _cells(e: DropEntry) -> tuple:
        mark, style = OUTCOME_MARKS.get(e.outcome, ("?", ""))
        name = e.file_name if len(e.file_name) <= 20 else e.file_name[:19] + "…"
        n_warn = sum(int(w.get("count", 1)) if isinstance(w, dict) and w.get("code") == "more_warnings" else 1
                     for w in e.warnings)
        return (Text(str(e.drop_id), justify="right"), name, Text(f"{mark} {e.outcome}", style=style),
                Text(str(rows_total(e)), justify="right"), Text(str(e.n_revisions), justify="right"),
                Text(str(n_warn), justify="right", style="#d7af00" if n_warn else ""), fmt.stamp(e.processed_at))

    def _cursor_key(self) -> str | None:
        t = self.table
        if t.row_count == 0:
            return None
        return t.coordinate_to_cell_key(t.cursor_coordinate).row_key.value

    def _show_info(self) -> None:
        info = self.query_one("#drop-info", Static)
        key = self._cursor_key()
        if key is None:
            info.update("No drop file has been processed yet. Upstream jobs write *.sql files into the inbox; "
                        "they are applied within a few seconds while this app or `tracker watch` runs.")
            return
        info.update(drop_details(self.entries[int(key)]))

    @on(DataTable.RowHighlighted, "#drops")
    def _highlighted(self, _event) -> None:
        self._show_info()

    def show_board(self, board: Board) -> None:
        if board.header != self._header_seen:
            self._header_seen = board.header
            self.reload()

    def pass_finished(self, message) -> None:
        if message.applied or message.rejected:
            self.reload()

    def action_back(self) -> None:
        self.app.pop_screen()

    def palette_commands(self):
        yield "Back to the board", "", self.action_back
