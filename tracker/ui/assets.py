"""Assets: expected excess returns of the assets held, from their exposures and the premia.

Reads :func:`tracker.service.assets.load_assets_view` (about two seconds on the demo
store, so in a worker). If an installation has no asset service, the screen says the
asset view is not available and shows nothing else. ``f`` switches the table between
the assets and the factor premia behind them (filtered, Fama-MacBeth, inversion).
"""

from __future__ import annotations

import math

from rich.text import Text
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from tracker.ui import formatting as fmt
from tracker.ui.messages import AssetsLoaded
from tracker.ui.widgets import ActivityLine, CautionLine

NOT_AVAILABLE = "The asset view is not available yet in this installation. Factor premia are on the board."
ASSET_COLUMNS = (("asset", "Asset"), ("expected", "Expected/yr"), ("se", "± se"), ("realised", "Realised/yr"),
                 ("gap", "Gap/yr"), ("gap_t", "Gap t"))
WIDE_ASSET_COLUMNS = (("asset", "Asset"), ("name", "Name"), ("expected", "Expected/yr"), ("se", "± se"),
                      ("realised", "Realised/yr"), ("gap", "Gap/yr"), ("gap_t", "Gap t"), ("alpha", "Alpha/yr"),
                      ("alpha_t", "Alpha t"))
FACTOR_COLUMNS = (("factor", "Factor"), ("filtered", "Filtered/yr"), ("fm", "Fama-MacBeth/yr"), ("fm_se", "± se"),
                  ("inversion", "Inversion/yr"))


def asset_loader():
    """The service function, or None when this installation has no asset view."""
    try:
        from tracker.service.assets import load_assets_view
    except ImportError:
        return None
    return load_assets_view


def _r(s: str, style: str = "") -> Text:
    return Text(s, justify="right", style=style)


def asset_cells(row, keys) -> list:
    values = {
        "asset": row.asset_id, "name": row.label,
        "expected": _r(fmt.pct(row.expected_ann)), "se": _r(fmt.pct(row.expected_se_ann, signed=False)),
        "realised": _r(fmt.pct(row.realised_ann)), "gap": _r(fmt.pct(row.gap_ann)),
        "gap_t": _r(fmt.num(row.gap_t, signed=True), "bold" if fmt.finite(row.gap_t) and abs(row.gap_t) > 2 else ""),
        "alpha": _r(fmt.pct(row.alpha_ann)), "alpha_t": _r(fmt.num(row.alpha_t, signed=True)),
    }
    return [values[k] for k in keys]


def factor_cells(view, factor: str) -> list:
    fm = view.fama_macbeth_ann.get(factor, (math.nan, math.nan))
    return [factor, _r(fmt.pct(view.filtered_premia_ann.get(factor))), _r(fmt.pct(fm[0])),
            _r(fmt.pct(fm[1], signed=False)), _r(fmt.pct(view.inversion_ann.get(factor)))]


def asset_summary(view, row) -> Text:
    out = Text()
    out.append(f"{row.asset_id} {row.label}: ", style="bold")
    out.append(f"expected {fmt.pct(row.expected_ann)}/yr ± {fmt.pct(row.expected_se_ann, signed=False)} "
               f"(exposures x premia); realised {fmt.pct(row.realised_ann)}/yr; gap {fmt.pct(row.gap_ann)} "
               f"(t {fmt.num(row.gap_t, signed=True)}); SDF pricing error "
               f"{fmt.pct(view.sdf_pricing_errors_ann.get(row.asset_id))}/yr\n")
    betas = sorted(((f, b) for f, b in row.exposures.items() if not f.startswith("*")),
                   key=lambda x: -abs(x[1][0]) if fmt.finite(x[1][0]) else 0)
    out.append("Exposures (beta ± se, Newey-West): " + ", ".join(f"{f} {b:+.2f}±{se:.2f}" for f, (b, se) in betas),
               style="dim")
    return out


def view_summary(view) -> Text:
    out = Text()
    out.append(f"GRS test of joint alphas: F {fmt.num(view.grs_f)}, p {fmt.num(view.grs_p, 3)} "
               "(Gibbons, Ross & Shanken 1989)\n")
    out.append(f"Maximal Sharpe ratio of the factor span (Hansen-Jagannathan bound): "
               f"{fmt.num(view.sdf_max_sharpe_ann)}/yr from the filtered premia; sample "
               f"{fmt.num(view.sdf_max_sharpe_sample_ann)} ± {fmt.num(view.sdf_max_sharpe_sample_se_ann)}\n")
    out.append(f"Exposures: rolling OLS over the last {view.window} rows; inversion: "
               f"{view.inversion_message or '-'}. f: factor premia", style="dim")
    return out


class AssetsScreen(Screen):
    CSS_PATH = "assets.tcss"
    BINDINGS = [
        Binding("escape", "back", "Back", tooltip="Back to the previous screen"),
        Binding("f", "toggle_table", "Assets / premia",
                tooltip="Switch the table between assets and the factor premia behind them"),
    ]

    def __init__(self) -> None:
        super().__init__()
        self.view = None
        self.showing = "assets"
        self._version = None

    def compose(self) -> ComposeResult:
        yield Static("Assets", id="assets-title")
        yield ActivityLine(id="activity")
        yield DataTable(id="assets", cursor_type="row", zebra_stripes=True)
        yield Static("Computing the asset view…", id="asset-info")
        yield Static("", id="assets-summary")
        yield CautionLine(id="caution")
        yield Footer(compact=True)

    @property
    def table(self) -> DataTable:
        return self.query_one("#assets", DataTable)

    def on_mount(self) -> None:
        board = getattr(self.app, "board", None)
        self._version = board.version if board else None
        if asset_loader() is None:
            self.table.display = False
            self.query_one("#asset-info", Static).update(NOT_AVAILABLE)
            return
        self.table.focus()
        self._load()

    @work(thread=True, exclusive=True, group="assets", exit_on_error=False)
    def _load(self) -> None:
        try:
            view = asset_loader()(self.app.store, self.app.config)
        except Exception as exc:
            self.post_message(AssetsLoaded(error=f"{type(exc).__name__}: {exc}"))
            return
        self.post_message(AssetsLoaded(view=view))

    def on_assets_loaded(self, message: AssetsLoaded) -> None:
        info = self.query_one("#asset-info", Static)
        if message.error:
            info.update(Text(f"Cannot compute the asset view: {message.error}", style="bold red"))
            return
        view = message.view
        self.view = view
        title = self.query_one("#assets-title", Static)
        if view.status != "ok":
            title.update(Text.assemble(("Assets", "bold"), " · not available"))
            info.update(view.message)
            self.table.display = False
            return
        self.table.display = True
        title.update(Text.assemble(("Assets", "bold"), f" · {len(view.rows)} · expected excess returns as of "
                                   f"{fmt.day(view.date)}"))
        self.query_one("#assets-summary", Static).update(view_summary(view))
        self._fill()

    def _columns(self):
        if self.showing == "premia":
            return FACTOR_COLUMNS
        return WIDE_ASSET_COLUMNS if self.app.size.width >= 110 else ASSET_COLUMNS

    def _fill(self) -> None:
        """Rows by key: a refresh after new estimates updates cells in place."""
        t, view = self.table, self.view
        cols = self._columns()
        if [str(c.key.value) for c in t.columns.values()] != [k for k, _ in cols]:
            t.clear(columns=True)         # a different table (assets / premia), not a live update
            for key, head in cols:
                t.add_column(head if key in ("asset", "name", "factor") else Text(head, justify="right"), key=key)
        keys = [k for k, _ in cols]
        items = ([(r.asset_id, asset_cells(r, keys)) for r in view.rows] if self.showing == "assets"
                 else [(f, factor_cells(view, f)) for f in view.factors])
        for key, cells in items:
            if key in t.rows:
                for col, value in zip(keys, cells):
                    t.update_cell(key, col, value, update_width=True)
            else:
                t.add_row(*cells, key=key)
        self._show_info()

    def _show_info(self) -> None:
        info = self.query_one("#asset-info", Static)
        t = self.table
        if self.view is None or self.view.status != "ok" or t.row_count == 0:
            return
        key = t.coordinate_to_cell_key(t.cursor_coordinate).row_key.value
        if self.showing == "assets":
            row = next(r for r in self.view.rows if r.asset_id == key)
            info.update(asset_summary(self.view, row))
        else:
            b = self.view.sdf_b.get(key)
            info.update(f"{key}: filtered premium (Kalman filter) against the cross-sectional Fama-MacBeth "
                        f"premium with Shanken-corrected se, and the complete-market inversion; SDF weight b "
                        f"{fmt.num(b, 3)}")

    @on(DataTable.RowHighlighted, "#assets")
    def _highlighted(self, _event) -> None:
        self._show_info()

    def show_board(self, board) -> None:
        if board.version != self._version and asset_loader() is not None:
            self._version = board.version
            self._load()

    def action_toggle_table(self) -> None:
        if self.view is None or self.view.status != "ok":
            return
        self.showing = "premia" if self.showing == "assets" else "assets"
        self._fill()

    def action_back(self) -> None:
        self.app.pop_screen()

    def palette_commands(self):
        yield "Back to the board", "", self.action_back
        yield "Switch assets / factor premia", "", self.action_toggle_table
