"""The text charts: bucketing, geometry, glyphs and labels on constructed series."""

from __future__ import annotations

import numpy as np

from tracker.ui.plot import (
    BAND_GLYPH,
    GUTTER,
    MARK_GLYPH,
    ZERO_GLYPH,
    line_chart,
    probability_strips,
    resample,
)


def test_resample_buckets_consecutive_rows():
    v = np.arange(10, dtype=float)
    assert np.allclose(resample(v, 5), [0.5, 2.5, 4.5, 6.5, 8.5])
    assert np.allclose(resample(v, 2, "min"), [0, 5]) and np.allclose(resample(v, 2, "max"), [4, 9])
    w = v.copy()
    w[4] = np.nan
    assert resample(w, 2, "last")[0] == 3.0                    # the last finite value of the bucket
    up = resample(np.array([1.0, 2.0]), 4)                     # fewer rows than columns: rows repeat
    assert np.allclose(up, [1, 1, 2, 2])
    assert np.isnan(resample(np.array([np.nan, np.nan]), 1)).all()


def _cells(lines):
    return [line.plain[GUTTER:] for line in lines]


def test_line_chart_geometry_labels_and_direction():
    width, height = 50, 6
    rising = np.linspace(-0.02, 0.10, 300)
    lines = line_chart(rising, width=width, height=height, label=lambda v: f"{v * 100:+.1f}%",
                       x_labels=("2020-01-01", "2021-01-01"))
    assert len(lines) == height + 1                            # plot rows and the x axis
    assert all(len(line.plain) == width for line in lines[:-1])
    plot = _cells(lines[:-1])
    assert plot[0][-1] != " " and plot[-1][0] != " "           # top right and bottom left are inked
    assert plot[0][0] in (" ", ZERO_GLYPH) and plot[-1][-1] in (" ", ZERO_GLYPH)
    top = float(lines[0].plain[:GUTTER - 2].strip().rstrip("%"))
    bottom = float(lines[-2].plain[:GUTTER - 2].strip().rstrip("%"))
    span = 12.0                                                # the data run from -2% to +10%
    assert 10.0 - 0.02 * span <= top <= 10.0 + 0.05 * span     # a little padding, never cut off
    assert -2.0 - 0.05 * span <= bottom <= -2.0 + 0.02 * span
    assert any(ZERO_GLYPH in row for row in plot)               # zero lies inside the range
    assert lines[-1].plain.strip().startswith("2020-01-01") and lines[-1].plain.endswith("2021-01-01")


def test_band_and_marks_are_drawn_with_their_own_glyphs():
    n = 200
    mid = np.full(n, 0.05)
    lo, hi = mid - 0.02, mid + 0.02
    marks = np.full(n, 0.06)
    lines = line_chart(mid, width=40, height=8, band=(lo, hi), marks=marks)
    plot = "".join(_cells(lines[:-1]))
    assert BAND_GLYPH in plot and MARK_GLYPH in plot
    assert sum(ch != " " and ch not in (BAND_GLYPH, MARK_GLYPH, ZERO_GLYPH) for ch in plot) >= 29  # the line
    narrow = line_chart(mid, width=GUTTER + 3, height=4)
    assert len(narrow) == 1 and "too small" in narrow[0].plain


def test_probability_strips_levels():
    p = np.column_stack([np.r_[np.ones(50), np.zeros(50)], np.r_[np.zeros(50), np.ones(50)]])
    rows = probability_strips(p, ["calm", "turbulent"], width=GUTTER + 10)
    assert [r.plain[:GUTTER].strip().rstrip("│").strip() for r in rows] == ["calm", "turbulent"]
    assert _cells(rows) == ["█████     ", "     █████"]
