"""Small text charts drawn with Braille dots, shade blocks and eighth blocks.

The drawing functions are pure (arrays in, Rich ``Text`` lines out) so they can be tested
without a terminal; :class:`Chart` is the widget that redraws them at its current width.
Each series has its own glyph as well as its own colour, so a chart reads the same in a
16-colour terminal or in print: Braille dots for the line, ``░`` for the 90% band, ``•``
for the hindsight path, ``┈`` for zero.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from rich.text import Text
from textual.widget import Widget

GUTTER = 11                     # y-axis labels: 9 characters, a space and the axis
LINE_GLYPH, BAND_GLYPH, MARK_GLYPH, ZERO_GLYPH = "⣿", "░", "•", "┈"
LINE_STYLE, BAND_STYLE, MARK_STYLE, ZERO_STYLE, AXIS_STYLE = "bold cyan", "blue", "magenta", "dim", "dim"
_BRAILLE = 0x2800
_DOT = ((0x01, 0x08), (0x02, 0x10), (0x04, 0x20), (0x40, 0x80))   # [sub-row][sub-column]
_EIGHTHS = " ▁▂▃▄▅▆▇█"


def resample(values: np.ndarray, n_out: int, how: str = "mean") -> np.ndarray:
    """Reduce (T,) values to ``n_out`` buckets of consecutive rows (NaN for an empty bucket).

    ``how`` is 'mean', 'min', 'max' or 'last' (the last finite value: what was known at
    the end of the bucket).
    """
    v = np.asarray(values, dtype=float)
    t = v.size
    out = np.full(n_out, np.nan)
    if t == 0 or n_out <= 0:
        return out
    for c in range(n_out):
        a = c * t // n_out
        b = max(a + 1, (c + 1) * t // n_out)
        seg = v[a:b]
        seg = seg[np.isfinite(seg)]
        if seg.size:
            out[c] = {"mean": np.mean, "min": np.min, "max": np.max, "last": lambda s: s[-1]}[how](seg)
    return out


def _range(*arrays: np.ndarray, include_zero: bool = True) -> tuple[float, float, bool, bool]:
    """y-limits from the 2nd and 98th percentiles (a filter's first days can have an enormous
    band that would flatten everything else), widened to zero; and whether values lie
    beyond each limit (they are then drawn on the edge row and the label says so)."""
    vals = [a[np.isfinite(a)] for a in arrays if a is not None]
    vals = [a for a in vals if a.size]
    if not vals:
        return -1.0, 1.0, False, False
    allv = np.concatenate(vals)
    if allv.size > 50:
        lo, hi = (float(x) for x in np.percentile(allv, [2.0, 98.0]))
    else:
        lo, hi = float(allv.min()), float(allv.max())
    if include_zero:
        lo, hi = min(lo, 0.0), max(hi, 0.0)
    if hi - lo < 1e-12:
        lo, hi = lo - 1e-3, hi + 1e-3
    pad = 0.04 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    return lo, hi, bool((allv < lo).any()), bool((allv > hi).any())


def line_chart(
    line: np.ndarray,
    *,
    width: int,
    height: int,
    band: tuple[np.ndarray, np.ndarray] | None = None,
    marks: np.ndarray | None = None,
    label: Callable[[float], str] = lambda v: f"{v:+.3g}",
    x_labels: tuple[str, str] = ("", ""),
) -> list[Text]:
    """A line (Braille, two points per cell across, four down) over an optional band and marks.

    Parameters
    ----------
    line : (T,) the series drawn as a line.
    band : pair of (T,) arrays, optional; lower and upper edge, drawn as shaded cells.
    marks : (T,) optional; a second series drawn as one ``•`` per column.
    width, height : characters available, including the ``GUTTER`` of y labels;
        ``height`` rows of plot plus one row of x labels below.
    label : formats a y value for the axis.
    x_labels : texts at the left and right ends of the x axis.
    """
    w = width - GUTTER
    if w < 8 or height < 2:
        return [Text("(window too small for this chart)", style="dim")]
    pts = resample(line, 2 * w)
    lo_b = hi_b = None
    if band is not None:
        lo_b, hi_b = resample(band[0], w, "min"), resample(band[1], w, "max")
    mk = resample(marks, w) if marks is not None else None
    vmin, vmax, clip_lo, clip_hi = _range(pts, lo_b, hi_b, mk)
    span = vmax - vmin
    rows = height
    chars = [[" "] * w for _ in range(rows)]
    styles = [[""] * w for _ in range(rows)]

    def row_of(v: float) -> int:
        return int(min(rows - 1, max(0, np.floor((vmax - v) / span * rows))))

    if lo_b is not None:
        for c in range(w):
            if np.isfinite(lo_b[c]) and np.isfinite(hi_b[c]):
                for r in range(row_of(hi_b[c]), row_of(lo_b[c]) + 1):
                    chars[r][c], styles[r][c] = BAND_GLYPH, BAND_STYLE
    zero_row = row_of(0.0) if vmin <= 0.0 <= vmax else None
    if zero_row is not None:
        for c in range(w):
            if chars[zero_row][c] == " ":
                chars[zero_row][c], styles[zero_row][c] = ZERO_GLYPH, ZERO_STYLE
    if mk is not None:
        for c in range(w):
            if np.isfinite(mk[c]):
                r = row_of(mk[c])
                chars[r][c], styles[r][c] = MARK_GLYPH, MARK_STYLE
    dots = np.zeros((rows, w), dtype=int)
    sub_rows = rows * 4
    prev = None
    for s in range(2 * w):
        if not np.isfinite(pts[s]):
            prev = None
            continue
        y = int(min(sub_rows - 1, max(0, np.floor((vmax - pts[s]) / span * sub_rows))))
        ys = range(min(prev, y), max(prev, y) + 1) if prev is not None else (y,)
        for yy in ys:
            dots[yy // 4, s // 2] |= _DOT[yy % 4][s % 2]
        prev = y
    for r in range(rows):
        for c in range(w):
            if dots[r, c]:
                chars[r][c], styles[r][c] = chr(_BRAILLE + dots[r, c]), LINE_STYLE

    labels = {0: ("≥" if clip_hi else "") + label(vmax), rows - 1: ("≤" if clip_lo else "") + label(vmin)}
    if zero_row is not None and zero_row not in labels and abs(zero_row - 0) > 0 and abs(zero_row - (rows - 1)) > 0:
        labels[zero_row] = label(0.0)
    out = []
    for r in range(rows):
        t = Text()
        t.append(f"{labels.get(r, ''):>{GUTTER - 2}} ", style=AXIS_STYLE)
        t.append("┤" if r in labels else "│", style=AXIS_STYLE)
        _append_cells(t, chars[r], styles[r])
        out.append(t)
    out.append(_x_axis(w, x_labels))
    return out


def probability_strips(probs: np.ndarray, names: list[str], *, width: int) -> list[Text]:
    """One row per regime: its filtered probability per column as an eighth-block bar (0..1).

    ``probs`` is (T, K); the columns line up with :func:`line_chart` of the same width.
    """
    w = width - GUTTER
    p = np.asarray(probs, dtype=float)
    if w < 8 or p.ndim != 2 or p.shape[1] == 0:
        return [Text("(no regime probabilities)", style="dim")]
    out = []
    for k in range(p.shape[1]):
        col = resample(p[:, k], w)
        t = Text()
        t.append(f"{names[k][:GUTTER - 2]:>{GUTTER - 2}} ", style=AXIS_STYLE)
        t.append("│", style=AXIS_STYLE)
        cells = []
        for v in col:
            cells.append("?" if not np.isfinite(v) else _EIGHTHS[int(round(min(1.0, max(0.0, v)) * 8))])
        t.append("".join(cells), style=LINE_STYLE)
        out.append(t)
    return out


def _append_cells(t: Text, chars: list[str], styles: list[str]) -> None:
    run, style = "", None
    for ch, st in zip(chars, styles):
        if st != style and run:
            t.append(run, style=style or "")
            run = ""
        style = st
        run += ch
    if run:
        t.append(run, style=style or "")


def _x_axis(w: int, labels: tuple[str, str]) -> Text:
    left, right = labels
    gap = max(1, w - len(left) - len(right))
    return Text(" " * GUTTER + left + " " * gap + right, style=AXIS_STYLE)


class Chart(Widget):
    """Draws ``painter(width)`` (a list of Text lines) at the widget's current width."""

    DEFAULT_CSS = "Chart { height: auto; width: 1fr; }"

    def __init__(self, lines: int = 1, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self._painter: Callable[[int], list[Text]] = lambda width: [Text("")]
        self.styles.height = lines

    def draw(self, painter: Callable[[int], list[Text]], lines: int) -> None:
        self._painter = painter
        self.styles.height = lines
        self.refresh(layout=True)

    def render(self) -> Text:
        return Text("\n").join(self._painter(max(1, self.size.width)))
