"""One factor in depth: charts over a chosen window, its regimes, warnings and model fits.

The premium chart shows the real-time filtered premium (what was known each day) with
its 90% band; the smoothed path, which uses later data, is drawn only on request and is
labelled HINDSIGHT wherever it appears.
"""

from __future__ import annotations

import math

import numpy as np
from rich.table import Table
from rich.text import Text
from textual import work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import Screen
from textual.widgets import Footer, Static

from tracker.service.factor_models import PERIODS_PER_YEAR
from tracker.service.report import severity_of
from tracker.service.views import Board, FactorDetail, load_detail
from tracker.ui import formatting as fmt
from tracker.ui.messages import DetailLoaded
from tracker.ui.plot import BAND_GLYPH, LINE_GLYPH, MARK_GLYPH, ZERO_GLYPH, Chart, line_chart, probability_strips
from tracker.ui.widgets import ActivityLine, CautionLine

#: (name, years); None is the whole history.
WINDOWS = (("3m", 0.25), ("6m", 0.5), ("1y", 1.0), ("3y", 3.0), ("5y", 5.0), ("10y", 10.0), ("all", None))
DEFAULT_WINDOW = 3
PREMIUM_ROWS, RETURN_ROWS = 8, 5
_SEVERITY_WORDS = {"info": 1, "caution": 2, "alert": 3}


def window_rows(years: float | None, frequency: str) -> int:
    if years is None:
        return 10**9
    return max(12, int(round(years * PERIODS_PER_YEAR.get(frequency, 252))))


def _pct_axis(v: float) -> str:
    return f"{v * 100:+.1f}%"


def _last_finite(a: np.ndarray) -> float:
    a = np.asarray(a, dtype=float)
    ok = np.flatnonzero(np.isfinite(a))
    return float(a[ok[-1]]) if ok.size else math.nan


def regime_table(d: FactorDetail) -> Table | Text:
    if not d.regimes:
        return Text("The regime model has no usable fit yet (see the fit diagnostics below).", style="dim")
    now = d.regime_probs[-1] if d.regime_probs.size else np.full(len(d.regimes), np.nan)
    top = int(np.nanargmax(now)) if np.isfinite(now).any() else -1
    unit = fmt.periods_unit(d.frequency)
    t = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    for name, justify in (("Regime", "left"), ("P now", "right"), ("Mean/yr", "right"), ("Vol/yr", "right"),
                          (f"Expected duration ({unit})", "right")):
        t.add_column(name, justify=justify)
    for i, r in enumerate(d.regimes):
        p = now[i] if i < len(now) else math.nan
        dur = r["duration"]
        t.add_row(("> " if i == top else "  ") + r["name"], fmt.prob(p), fmt.pct(r["mean_ann"]),
                  fmt.pct(r["vol_ann"], signed=False), "never leaves" if not math.isfinite(dur) else f"{dur:.1f}")
    return t


def _grid() -> Table:
    """Two columns, so wrapped lines keep their indent under the text, not under the mark."""
    g = Table.grid(padding=(0, 1))
    g.add_column(no_wrap=True)
    g.add_column(ratio=1)
    return g


def warnings_text(d: FactorDetail) -> Table:
    g = _grid()
    hist = {h["code"]: h for h in d.warning_history}
    current = set()
    unit = fmt.periods_unit(d.frequency)
    if not d.warnings:
        g.add_row("", "No warnings on the latest estimate.")
    for w in d.warnings:
        current.add(w["code"])
        sev = _SEVERITY_WORDS.get(w["severity"], severity_of(w["code"]))
        style = fmt.SEVERITY_STYLES.get(sev, "")
        body = Text()
        body.append(f"{w['code']} ({w['severity']}): ", style=style)
        body.append(w["message"], style="bold")
        if w.get("detail"):
            body.append(f"\n{w['detail']}")
        nums = []
        if fmt.finite(w.get("value")):
            nums.append(f"value {float(w['value']):.4g}")
        if fmt.finite(w.get("threshold")):
            nums.append(f"threshold {float(w['threshold']):.4g}")
        nums.append(f"source: {w.get('source') or '-'}")
        body.append("\n" + " · ".join(nums), style="dim")
        h = hist.get(w["code"])
        if h is not None:
            n = int(h["n_days"])
            body.append(f"\nflagged on {n} {unit if n != 1 else unit.rstrip('s')} in this window, first "
                        f"{fmt.day(_as_date(h['first_date']))}", style="dim")
        g.add_row(Text(f"{fmt.severity_mark(sev):>2}", style=style), body)
    earlier = [h for c, h in sorted(hist.items()) if c not in current]
    if earlier:
        g.add_row("", Text("Earlier in this window, not on the latest estimate: " + "; ".join(
            f"{h['code']} {fmt.day(_as_date(h['first_date']))}..{fmt.day(_as_date(h['last_date']))} "
            f"({int(h['n_days'])} {unit})" for h in earlier), style="dim"))
    return g


def fits_text(d: FactorDetail) -> Table:
    g = _grid()
    if not d.fits:
        g.add_row("", Text("No model has been fitted yet.", style="dim"))
    for f in d.fits:
        ok = f["status"] == "ok"
        conv = "converged" if f.get("converged") else "did not converge"
        ll = f.get("loglik")
        ll_text = f"log-likelihood {float(ll):.2f}" if fmt.finite(ll) else "no likelihood"
        body = Text()
        body.append(f["status"], style="" if ok else "bold red")
        body.append(f", {conv}; {ll_text} on {int(f.get('n_obs') or 0)} obs; data "
                    f"{fmt.day(_as_date(f.get('data_from')))}..{fmt.day(_as_date(f.get('data_through')))}")
        body.append(f"\nlast refit {fmt.stamp(_as_datetime(f.get('fitted_at')))} ({f.get('reason') or '-'}). "
                    f"{f.get('message') or ''}", style="dim")
        g.add_row(Text(f["model"], style="bold"), body)
    return g


def _as_date(x):
    if x is None:
        return None
    try:
        import pandas as pd

        if pd.isna(x):
            return None
        return pd.Timestamp(x).date()
    except (TypeError, ValueError):
        return None


def _as_datetime(x):
    if x is None:
        return None
    try:
        import pandas as pd

        if pd.isna(x):
            return None
        return pd.Timestamp(x).to_pydatetime()
    except (TypeError, ValueError):
        return None


class DetailScreen(Screen):
    """Charts and diagnostics of one factor; Escape goes back to the board."""

    CSS_PATH = "detail.tcss"
    BINDINGS = [
        Binding("escape", "back", "Back", tooltip="Back to the board"),
        Binding("left", "window(-1)", "Shorter", show=False, tooltip="Shorter chart window (3m 6m 1y 3y 5y 10y all)"),
        Binding("right", "window(1)", "Longer", show=False, tooltip="Longer chart window"),
        Binding("w", "cycle_window", "Window", tooltip="Next chart window, cycling 3m 6m 1y 3y 5y 10y all"),
        Binding("h", "hindsight", "Hindsight", tooltip="Show or hide the smoothed path (uses later data; labelled HINDSIGHT)"),
        Binding("n", "step(1)", "Next factor", tooltip="Next factor in the board's order"),
        Binding("b", "step(-1)", "Previous", show=False, tooltip="Previous factor in the board's order"),
        Binding("r", "refit", "Refit", show=False, tooltip="Refit this factor's models in the background (asks first)"),
    ]

    def __init__(self, factor_id: str, *, order: list[str] | None = None, window: int = DEFAULT_WINDOW,
                 hindsight: bool = False) -> None:
        super().__init__()
        self.factor_id = factor_id
        self.order = order or [factor_id]
        self.window = window
        self.hindsight = hindsight
        self.detail: FactorDetail | None = None
        self._request = 0
        self._version: str | None = None

    def compose(self) -> ComposeResult:
        yield Static(self.factor_id, id="detail-title")
        yield ActivityLine(id="activity")
        with VerticalScroll(id="detail-body"):
            yield Static("", id="premium-title", classes="section")
            yield Chart(PREMIUM_ROWS + 1, id="premium-chart")
            yield Static("", id="premium-legend", classes="legend")
            yield Static("", id="premium-latest")
            yield Static("Realized return, compounded over the window", id="returns-title", classes="section")
            yield Chart(RETURN_ROWS + 1, id="returns-chart")
            yield Static("", id="returns-note", classes="legend")
            yield Static("Regime probabilities, filtered (data to each date); bar height 0..1",
                         id="regime-title", classes="section")
            yield Chart(2, id="regime-chart")
            yield Static("Regimes of this factor (Hamilton filter, Markov-switching mean and variance)",
                         classes="section")
            yield Static("", id="regime-table")
            yield Static("Warnings on the latest estimate", classes="section")
            yield Static("", id="warnings")
            yield Static("Fit diagnostics", classes="section")
            yield Static("", id="fits")
        yield CautionLine(id="caution")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        self.query_one("#detail-body").focus()
        board = getattr(self.app, "board", None)
        self._version = board.version if board else None
        self._title()
        self.reload()

    # ---------------------------------------------------------------- data

    def _frequency(self) -> str:
        if self.detail is not None and self.detail.factor_id == self.factor_id:
            return self.detail.frequency
        board = getattr(self.app, "board", None)
        row = next((r for r in board.rows if r.factor_id == self.factor_id), None) if board else None
        return row.frequency if row else "daily"

    def reload(self) -> None:
        self._request += 1
        rows = window_rows(WINDOWS[self.window][1], self._frequency())
        self._load(self._request, self.factor_id, rows, self.hindsight)
        self._title()

    @work(thread=True, exclusive=True, group="detail", exit_on_error=False)
    def _load(self, request: int, factor_id: str, rows: int, hindsight: bool) -> None:
        try:
            d = load_detail(self.app.store, factor_id, window_days=rows, hindsight=hindsight)
        except KeyError:
            self.post_message(DetailLoaded(request, None, f"factor {factor_id} is not in the store"))
            return
        except Exception as exc:
            self.post_message(DetailLoaded(request, None, f"{type(exc).__name__}: {exc}"))
            return
        self.post_message(DetailLoaded(request, d))

    def on_detail_loaded(self, message: DetailLoaded) -> None:
        if message.request != self._request:
            return                       # an answer to an older request (window changed meanwhile)
        if message.detail is None:
            self.query_one("#premium-title", Static).update(Text(f"Cannot show {self.factor_id}: {message.error}",
                                                                 style="bold red"))
            return
        self.detail = message.detail
        self._draw_detail()

    def show_board(self, board: Board) -> None:
        """A new board from the live worker: reload when the data or estimates changed."""
        if board.version != self._version:
            self._version = board.version
            self.reload()
        else:
            self._title()

    # ---------------------------------------------------------------- drawing

    def _title(self) -> None:
        name, _ = WINDOWS[self.window]
        d = self.detail if self.detail is not None and self.detail.factor_id == self.factor_id else None
        label = d.label if d else ""
        span = f" {fmt.day(_as_date(d.dates[0]))}..{fmt.day(_as_date(d.dates[-1]))}" if d is not None and len(d.dates) else ""
        pos = f"{self.order.index(self.factor_id) + 1}/{len(self.order)}" if self.factor_id in self.order else ""
        hs = "hindsight shown" if self.hindsight else "hindsight off"
        self.query_one("#detail-title", Static).update(
            Text.assemble((f"{self.factor_id}", "bold"), f" {label} · window {name}{span} · {hs} · {pos}"))

    def _chart_rows(self) -> tuple[int, int]:
        """Plot rows for the premium and return charts: 8 and 5 at 24 lines, more when taller."""
        spare = max(0, self.app.size.height - 24)
        return PREMIUM_ROWS + min(8, spare // 3), RETURN_ROWS + min(5, spare // 5)

    def on_resize(self) -> None:
        if self.detail is not None:
            self._draw_detail()

    def _draw_detail(self) -> None:
        d = self.detail
        prem_rows, ret_rows = self._chart_rows()
        self._title()
        x_labels = (fmt.day(_as_date(d.dates[0])), fmt.day(_as_date(d.dates[-1]))) if len(d.dates) else ("", "")
        has_est = bool(np.isfinite(d.premium_ann).any())
        self.query_one("#premium-title", Static).update(
            "Premium per year, real time (Kalman filter), with its 90% band")
        marks = d.hindsight_ann if (self.hindsight and d.hindsight_ann is not None) else None
        chart = self.query_one("#premium-chart", Chart)
        if has_est:
            band = (d.band_lo, d.band_hi)
            chart.draw(lambda w: line_chart(d.premium_ann, width=w, height=prem_rows, band=band, marks=marks,
                                            label=_pct_axis, x_labels=x_labels), prem_rows + 1)
        else:
            chart.draw(lambda w: [Text("No estimates yet: they appear when estimation has run.", style="dim")], 1)
        legend = Text.assemble((LINE_GLYPH, "bold cyan"), " filtered (real time)  ",
                               (BAND_GLYPH, "blue"), " 90% band  ", (ZERO_GLYPH, "dim"), " zero  ")
        if marks is not None:
            legend.append_text(Text.assemble((MARK_GLYPH, "magenta"), (" HINDSIGHT, uses later data", "magenta")))
        elif self.hindsight:
            legend.append("(no hindsight path: the premium model has no usable fit)", style="dim")
        else:
            legend.append("h: hindsight", style="dim")
        self.query_one("#premium-legend", Static).update(legend)
        p, lo, hi = _last_finite(d.premium_ann), _last_finite(d.band_lo), _last_finite(d.band_hi)
        rp = _last_finite(d.regime_premium_ann)
        latest = (f"Latest {fmt.per_year(p)}, band {fmt.pct(lo)}..{fmt.pct(hi)}; "
                  f"regime-aware (Kim filter) {fmt.per_year(rp)}")
        if marks is not None:
            latest += f"; HINDSIGHT {fmt.per_year(_last_finite(marks))}"
        self.query_one("#premium-latest", Static).update(latest)

        rets = np.asarray(d.returns, dtype=float)
        cum = np.cumprod(1.0 + np.nan_to_num(rets)) - 1.0 if rets.size else rets
        if rets.size and np.isfinite(rets).any():
            self.query_one("#returns-chart", Chart).draw(
                lambda w: line_chart(cum, width=w, height=ret_rows, label=_pct_axis, x_labels=x_labels),
                ret_rows + 1)
            ppy = PERIODS_PER_YEAR.get(d.frequency, 252)
            ok = rets[np.isfinite(rets)]
            note = (f"{ok.size} rows; mean {fmt.pct(ok.mean() * ppy)}/yr, vol "
                    f"{fmt.pct(ok.std(ddof=1) * math.sqrt(ppy) if ok.size > 1 else math.nan, signed=False)}/yr "
                    f"(descriptive, this window only); total {fmt.pct(cum[-1])}")
        else:
            self.query_one("#returns-chart", Chart).draw(lambda w: [Text("No returns in this window.", style="dim")], 1)
            note = ""
        self.query_one("#returns-note", Static).update(note)

        names = [r["name"] for r in d.regimes] or [f"regime {k}" for k in range(d.regime_probs.shape[1])]
        k = d.regime_probs.shape[1] if d.regime_probs.ndim == 2 else 0
        self.query_one("#regime-chart", Chart).draw(
            lambda w: probability_strips(d.regime_probs, names, width=w), max(1, k))
        self.query_one("#regime-table", Static).update(regime_table(d))
        self.query_one("#warnings", Static).update(warnings_text(d))
        self.query_one("#fits", Static).update(fits_text(d))

    # ---------------------------------------------------------------- actions

    def action_back(self) -> None:
        self.app.pop_screen()

    def action_window(self, step: int) -> None:
        new = min(len(WINDOWS) - 1, max(0, self.window + step))
        if new != self.window:
            self.window = new
            self.reload()

    def action_cycle_window(self) -> None:
        self.window = (self.window + 1) % len(WINDOWS)
        self.reload()

    def set_window(self, name: str) -> None:
        self.window = next(i for i, (n, _) in enumerate(WINDOWS) if n == name)
        self.reload()

    def action_hindsight(self) -> None:
        self.hindsight = not self.hindsight
        self.reload()

    def action_step(self, step: int) -> None:
        if self.factor_id not in self.order or len(self.order) < 2:
            return
        i = self.order.index(self.factor_id)
        self.factor_id = self.order[(i + step) % len(self.order)]
        self.detail = None
        self.reload()

    def action_refit(self) -> None:
        from tracker.ui.confirm import ConfirmScreen

        fid = self.factor_id
        self.app.push_screen(
            ConfirmScreen(f"Refit {fid}", f"Re-estimate the models of {fid} on its whole history now, in the "
                          "background? Stored past estimates are kept as they were known."),
            lambda yes: self.app.request_refit({fid}) if yes else None)

    def palette_commands(self):
        yield "Back to the board", "", self.action_back
        for name, _ in WINDOWS:
            yield f"Chart window {name}", "Change the span of the charts", lambda n=name: self.set_window(n)
        yield "Show or hide the hindsight path", "Smoothed premium; uses later data", self.action_hindsight
        yield "Next factor", "", lambda: self.action_step(1)
        yield "Previous factor", "", lambda: self.action_step(-1)
        yield f"Refit {self.factor_id}", "Re-estimate this factor's models in the background", self.action_refit
