"""What the board shows, as plain functions (no Textual): sort keys, filter, column
layout for a terminal width, the text of every cell, the header lines, the row summary."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from rich.text import Text

from tracker.service.report import ordered_codes, severity_of, warning_message
from tracker.service.views import Board, BoardRow, regime_name
from tracker.ui import formatting as fmt

WIDE_FROM = 120          # terminal columns from which the wide layout is used


@dataclass(frozen=True)
class SortKey:
    key: str
    title: str
    descending: bool
    value: Callable[[BoardRow], object]


def _num(x: float) -> float:
    return x if isinstance(x, (int, float)) and math.isfinite(x) else math.nan


SORTS = (
    SortKey("factor", "factor id", False, lambda r: r.factor_id),
    SortKey("premium", "premium", True, lambda r: _num(r.premium_ann)),
    SortKey("t", "t-stat", True, lambda r: _num(r.t_stat)),
    SortKey("ppos", "P(>0)", True, lambda r: _num(r.p_positive)),
    SortKey("regime", "regime probability", True, lambda r: _num(r.regime_prob)),
    SortKey("severity", "warning severity", True, lambda r: r.worst),
    SortKey("changed", "changed since review", True,
            lambda r: 2 * len(fmt.material_changes(r.changes)) + (1 if r.changes else 0)),
    SortKey("last", "last data date", False, lambda r: r.last_date.toordinal() if r.last_date else math.nan),
)


def sort_rows(rows: list[BoardRow], sort: SortKey, reverse: bool) -> list[BoardRow]:
    """Rows in display order; missing numbers last whichever the direction, ties by id."""
    desc = sort.descending != reverse

    def key(r: BoardRow):
        v = sort.value(r)
        missing = isinstance(v, float) and math.isnan(v)
        if isinstance(v, str):
            return (missing, v, r.factor_id)
        return (missing, 0.0 if missing else (-v if desc else v), r.factor_id)

    out = sorted(rows, key=key)
    if isinstance(sort.value(rows[0]) if rows else 0, str) and desc:
        out.reverse()
    return out


def row_matches(r: BoardRow, query: str) -> bool:
    q = query.strip().lower()
    if not q:
        return True
    hay = " ".join([r.factor_id, r.label, r.regime_label, " ".join(r.codes), " ".join(r.changes)]).lower()
    return all(part in hay for part in q.split())


# ------------------------------------------------------------------------- layout

@dataclass(frozen=True)
class Layout:
    wide: bool
    stat: str                                   # 't' or 'ppos' on the narrow board
    columns: tuple[tuple[str, str], ...]        # (key, heading)
    warn_width: int
    changes_width: int


def choose_layout(width: int, rows: list[BoardRow], stat: str) -> Layout:
    wide = width >= WIDE_FROM
    if wide:
        cols = (("factor", " Factor"), ("name", "Name"), ("last", "Last date"), ("regime", "Regime"),
                ("prem", "Premium/yr"), ("band", "90% band"), ("t", "t"), ("ppos", "P(>0)"),
                ("sharpe", "Sharpe"), ("warn", "Warnings"), ("changes", "Changed since review"))
    else:
        cols = (("factor", " Factor"), ("last", "Last date"), ("regime", "Regime"),
                ("prem", "Prem/yr"), ("band", "90% band/yr"), (stat, "t" if stat == "t" else "P>0"),
                ("warn", "Warnings"))
    probe = Layout(wide, stat, cols, 0, 0)
    fixed = 0
    for key, head in cols:
        if key in ("warn", "changes"):
            continue
        fixed += max([len(head)] + [len(plain(cell_text(r, key, probe))) for r in rows]) + 2
    room = max(8, width - fixed - 2 * (2 if wide else 1) - 2)   # cell padding, the scrollbar, one spare
    if wide:
        longest = max([len(fmt.codes_cell(r.codes, r.worst, None)) for r in rows] + [8])
        changes = max([len("; ".join(r.changes)) for r in rows] + [len("Changed since review")])
        warn = min(longest, max(8, room // 2, room - changes))
        return Layout(wide, stat, cols, warn, max(10, room - warn))
    return Layout(wide, stat, cols, room, 0)


def plain(x) -> str:
    """The characters of a cell, without styles."""
    return x.plain if isinstance(x, Text) else str(x)


def cell_text(r: BoardRow, key: str, layout: Layout) -> Text | str:
    """The text of one board cell (numbers right-aligned; severity by mark and colour)."""
    right = "right"
    if key == "factor":                 # the change mark, then the id (the sort looks past the mark)
        return Text.assemble((fmt.change_mark(r.changes) or " ", "bold"), r.factor_id)
    if key == "name":
        return r.label if len(r.label) <= 24 else r.label[:23] + "…"
    if key == "last":
        return fmt.day(r.last_date)
    if key == "regime":
        return fmt.regime_cell(r.regime_label, r.regime_prob, short=not layout.wide)
    if key == "prem":
        return Text(fmt.pct(r.premium_ann), justify=right)
    if key == "band":
        return Text(fmt.band(r.band_lo, r.band_hi, 2 if layout.wide else 1), justify=right,
                    style="dim" if r.band_contains_zero else "")
    if key == "t":
        return Text(fmt.num(r.t_stat, signed=True), justify=right)
    if key == "ppos":
        return Text(fmt.num(r.p_positive, 3), justify=right)
    if key == "sharpe":
        return Text(fmt.num(r.sharpe_ann, signed=True), justify=right)
    if key == "warn":
        return Text(fmt.codes_cell(r.codes, r.worst, layout.warn_width), style=fmt.SEVERITY_STYLES.get(r.worst, ""))
    if key == "changes":
        s = "; ".join(r.changes)
        return s if len(s) <= layout.changes_width else s[: max(0, layout.changes_width - 1)] + "…"
    return ""


# ------------------------------------------------------------------------- header text

def _fit(width: int, *candidates: str) -> str:
    for c in candidates:
        if len(c) <= width:
            return c
    return candidates[-1]


def market_text(board: Board, width: int) -> str:
    m = board.market
    if m.regime is None:
        return _fit(width, f"Market regime: not estimated yet ({m.message})", "Market regime: not estimated yet")
    probs = [(regime_name(i, m.n_regimes), p) for i, p in enumerate(m.probabilities)]
    top = m.probabilities[m.regime] if m.regime < len(m.probabilities) else math.nan
    dur = m.durations[m.regime] if m.regime < len(m.durations) else math.nan
    long_probs = ", ".join(f"{n} {fmt.prob(p)}" for n, p in probs)
    return _fit(
        width,
        f"Market regime on {fmt.day(m.date)}: {m.label}, p {fmt.prob(top)} ({long_probs}); "
        f"expected duration {fmt.num(dur, 0)} {fmt.periods_unit('daily')}",
        f"Market regime: {m.label}, p {fmt.prob(top)} ({long_probs})",
        f"Market: {m.label} ({' '.join(f'{n[:5]} {fmt.prob(p)}' for n, p in probs)})",
    )


def store_text(board: Board, width: int) -> str:
    h = board.header
    drops = f"{h.pending_drops} waiting, {h.rejected_drops} rejected"
    return _fit(
        width,
        f"Data through {fmt.day(h.last_data_date)} · estimates refreshed {fmt.stamp(h.last_refresh)} · "
        f"drop files: {drops} · last review {fmt.stamp(h.last_review) if h.last_review else 'none'}",
        f"Data through {fmt.day(h.last_data_date)} · estimated {fmt.stamp(h.last_refresh)} · drops {drops}",
        f"Data to {fmt.day(h.last_data_date)} · estimated {fmt.stamp(h.last_refresh)} · drops {drops}",
    )


def row_summary(r: BoardRow, board: Board) -> list[str]:
    """Three lines about the highlighted factor, below the table: what the narrow board leaves out."""
    new = " (newly proposed)" if r.is_new else ""
    line1 = (f"{r.factor_id} {r.label}{new} · regime {r.regime_label} p {fmt.prob(r.regime_prob)} · "
             f"t {fmt.num(r.t_stat, signed=True)} · P(>0) {fmt.num(r.p_positive, 3)} · "
             f"Sharpe {fmt.num(r.sharpe_ann, signed=True)} · {r.n_obs} obs · estimate of {fmt.day(r.estimate_date)}")
    codes = ordered_codes(r.codes)
    if codes:
        first = codes[0]
        more = f" (+{len(codes) - 1} more; Enter for all)" if len(codes) > 1 else ""
        line2 = f"{fmt.severity_mark(severity_of(first))} {first}: {warning_message(first)}{more}"
    else:
        line2 = "No warnings on the latest estimate."
    if board.header.last_review is None:
        line3 = "No review yet: press m to mark the board reviewed; changes are shown from then on."
    elif r.changes:
        line3 = (f"{fmt.change_mark(r.changes)} since the review of {fmt.stamp(board.header.last_review)}: "
                 f"{'; '.join(r.changes)}")
    else:
        line3 = f"No change since the review of {fmt.stamp(board.header.last_review)}."
    return [line1, line2, line3]
