"""Every key, a short glossary of the measures with their sources, and the cautions.

The key lists are read from the screens' own bindings, so they cannot drift from what
the keys do.
"""

from __future__ import annotations

from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import Screen
from textual.widgets import Footer, Static

from tracker.service.report import warning_catalogue
from tracker.service.views import CAUTION
from tracker.ui import formatting as fmt

KEY_NAMES = {"question_mark": "?", "slash": "/", "enter": "Enter", "escape": "Esc", "left": "←", "right": "→",
             "up": "↑", "down": "↓", "ctrl+p": "Ctrl+P"}

GLOSSARY = (
    ("Filtered premium",
     "The factor's expected return per period, estimated from data up to each date only (a local-level "
     "state-space model run through the Kalman filter), annualised by 252 trading days or 12 months. "
     "The 90% band is the estimate plus or minus 1.645 filtered standard deviations.",
     "Kalman filter; Durbin & Koopman (2012)"),
    ("t and P(>0)",
     "t is the filtered premium divided by its filtered standard deviation; P(>0) is the probability that "
     "the premium is positive under a normal approximation.", "common practice"),
    ("Hindsight path",
     "The smoothed premium uses data after each date. It shows what we believe now about the past, never "
     "what was known at the time; it is drawn only on request and labelled HINDSIGHT.",
     "Kalman smoother; Durbin & Koopman (2012)"),
    ("Regime probability",
     "P(regime | data to date) from a Markov-switching model of the factor's mean and variance. Regimes "
     "are ordered from calmest to most volatile and keep their labels across refits.",
     "Hamilton filter; Hamilton (1989)"),
    ("Regime-aware premium",
     "A premium whose measurement variance switches with the regime, filtered with collapsing.",
     "Kim filter; Kim (1994), Kim & Nelson (1999)"),
    ("Market regime",
     "A joint regime across the factors: a Gaussian hidden Markov model with 2 to 4 states chosen by BIC, "
     "read with a forward filter (no look-ahead).", "hidden Markov model; Hamilton (1989) filtering"),
    ("Expected duration",
     "How long a regime lasts on average once entered: 1/(1-p_ii) periods, p_ii the probability of "
     "staying in regime i from one period to the next.", "Hamilton (1989)"),
    ("Volatility forecast",
     "The variance the premium model expects for the next return: EWMA with decay 0.94 daily or 0.97 "
     "monthly, or GARCH(1,1).", "RiskMetrics (1996); Bollerslev (1986)"),
    ("Newey-West standard error",
     "A standard error of a mean that allows for autocorrelation and changing variance.",
     "Newey & West (1987)"),
    ("Sharpe ratio standard error",
     "sqrt((1 + SR^2/2)/T) for independent returns: how uncertain a measured Sharpe ratio is.", "Lo (2002)"),
    ("Probabilistic Sharpe ratio",
     "The probability that the true Sharpe ratio exceeds a benchmark, given the sample's length, "
     "skewness and kurtosis; also the minimum track record length.", "Bailey & Lopez de Prado (2012)"),
    ("Multiple testing",
     "Looking at many factors makes some look significant by chance. Holm controls the chance of any false "
     "finding; Benjamini-Yekutieli controls the share of false findings under any dependence.",
     "Holm (1979); Benjamini & Hochberg (1995); Benjamini & Yekutieli (2001)"),
    ("Hurdle for new factors",
     "A newly proposed factor should clear |t| > 3.0, not 2, because so many candidates have been tried.",
     "Harvey, Liu & Zhu (2016)"),
)

CAUTIONS = (
    CAUTION,
    "Every number here is a statistical estimate with error, from models that can be wrong. Premia are small "
    "and noisy: a factor with an annual Sharpe ratio of 0.3 needs about 44 years of data for a t-stat of 2.",
    "The real-time (filtered) figures are what could have been known on each date; the hindsight path is not.",
    "The demo store's firm, factors and numbers are invented.",
)


def key_name(key: str) -> str:
    return ", ".join(KEY_NAMES.get(k.strip(), k.strip()) for k in key.split(","))


def keys_table(title: str, bindings: list[Binding]) -> Table:
    t = Table(title=title, title_justify="left", title_style="bold", box=None, show_header=False, pad_edge=False)
    t.add_column("key", style="bold", min_width=7)
    t.add_column("what it does")
    seen = set()
    for b in bindings:
        if b.key == "ctrl+p" or (b.action, b.key) in seen:
            continue
        seen.add((b.action, b.key))
        t.add_row(key_name(b.key), b.tooltip or b.description or b.action)
    return t


def _as_bindings(items) -> list[Binding]:
    return [b if isinstance(b, Binding) else Binding(*b) for b in items]


def key_sections() -> list[tuple[str, list[Binding]]]:
    from tracker.ui.app import TrackerApp
    from tracker.ui.board import BoardScreen, BoardTable
    from tracker.ui.detail import DetailScreen
    from tracker.ui.inbox import InboxScreen

    return [
        ("Everywhere", _as_bindings(TrackerApp.BINDINGS)),
        ("Board", [b for b in _as_bindings(BoardScreen.BINDINGS) if b.action != "open_detail"]
         + _as_bindings(BoardTable.BINDINGS) + [Binding("up,down", "", "Move between factors")]),
        ("Factor detail", _as_bindings(DetailScreen.BINDINGS) + [Binding("up,down", "", "Scroll")]),
        ("Inbox", _as_bindings(InboxScreen.BINDINGS) + [Binding("up,down", "", "Move between drop files")]),
        ("Questions (refit, mark reviewed)", [Binding("y,enter", "", "Yes, go ahead"), Binding("n,escape", "", "No, cancel")]),
    ]


class HelpScreen(Screen):
    CSS_PATH = "help.tcss"
    BINDINGS = [Binding("escape", "close", "Back"), Binding("question_mark", "close", "Back", show=False)]

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="help-body"):
            yield Static(Text("Keys", style="bold underline"), classes="section")
            yield Static(Text("Letters, arrows, Enter, Escape, / and ? do everything; p opens the command "
                              "palette, where every action can also be found by name.", style="dim"))
            for title, bindings in key_sections():
                yield Static(keys_table(title, bindings), classes="keys")
            yield Static(Text("Marks on the board", style="bold underline"), classes="section")
            yield Static(self._marks())
            yield Static(Text("Measures", style="bold underline"), classes="section")
            yield Static(self._glossary())
            yield Static(Text("Warnings", style="bold underline"), classes="section")
            yield Static(self._warnings())
            yield Static(Text("Cautions", style="bold underline"), classes="section")
            yield Static(Text("\n".join(CAUTIONS)), id="cautions")
        yield Footer(compact=True)

    def on_mount(self) -> None:
        self.query_one("#help-body").focus()

    @staticmethod
    def _marks() -> Text:
        return Text(f"{fmt.CHANGED_MARK}  changed since the last review: regime, premium sign, band and zero, warnings or "
                    "revised data (what changed is under the table)\n"
                    f"{fmt.ROWS_MARK}  only new rows since the last review\n"
                    "!! alert    ! caution    i info   (the warning column; colour repeats the mark)\n"
                    "A dim 90% band contains zero: the premium cannot be told apart from zero at that level.\n"
                    "Charts: ⣿ the line, ░ the 90% band, • the HINDSIGHT path, ┈ zero; ≥ or ≤ on an axis "
                    "label: some values lie beyond it and are drawn on the edge row.")

    @staticmethod
    def _glossary() -> Text:
        out = Text()
        for name, what, source in GLOSSARY:
            out.append(f"{name}: ", style="bold")
            out.append(what)
            out.append(f" [{source}]\n", style="dim")
        return out

    @staticmethod
    def _warnings() -> Text:
        out = Text()
        for code, sev, message, source in warning_catalogue():
            out.append(f"{fmt.severity_mark(sev):>2} {code}: ", style=fmt.SEVERITY_STYLES.get(sev, ""))
            out.append(message)
            out.append(f" [{source}]\n", style="dim")
        return out

    def action_close(self) -> None:
        self.app.pop_screen()

    def palette_commands(self):
        yield "Close the help", "", self.action_close
