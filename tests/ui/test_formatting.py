"""How cells are written: percentages, bands, the warning column and the change marks."""

from __future__ import annotations

import math

from tracker.service.report import ordered_codes, severity_of
from tracker.ui import formatting as fmt


def test_numbers_and_missing_values():
    assert fmt.pct(0.0626) == "+6.26%" and fmt.pct(-0.00271) == "-0.27%" and fmt.pct(math.nan) == "-"
    assert fmt.band(0.0239, 0.1013) == "[+2.4, +10.1]" and fmt.band(math.nan, 0.1) == "-"
    assert fmt.per_year(math.nan) == "n/a" and fmt.per_year(0.05) == "+5.00%/yr"
    assert fmt.regime_cell("turbulent", 0.791, short=True) == "turb 0.79"
    assert fmt.regime_cell("-", math.nan, short=False) == "-"


def test_warning_codes_most_severe_first_and_cut_to_width():
    codes = ("HINDSIGHT_GAP", "FDR", "OUTLIER", "NOISE")      # info, caution, alert, caution
    ordered = ordered_codes(codes)
    assert ordered[0] == "OUTLIER" and ordered[-1] == "HINDSIGHT_GAP"
    assert [severity_of(c) for c in ordered] == sorted((severity_of(c) for c in codes), reverse=True)
    full = fmt.codes_cell(codes, 3, None)
    assert full == "!! " + " ".join(ordered)
    for width in (8, 10, 13, 20, 40):
        cell = fmt.codes_cell(codes, 3, width)
        assert len(cell) <= width and cell.startswith("!! ")
        assert cell[3] == "O"                                 # the worst code is always named, maybe shortened
    assert fmt.codes_cell(codes, 3, 13) == "!! OUTLIER +3"
    assert fmt.codes_cell((), 0, 10) == ""


def test_change_marks_tell_material_changes_from_new_rows():
    assert fmt.change_mark(()) == ""
    assert fmt.change_mark(("+1 rows",)) == fmt.ROWS_MARK
    assert fmt.change_mark(("+1 rows", "+NOISE")) == fmt.CHANGED_MARK
    assert fmt.material_changes(("+3 rows", "regime calm->turbulent", "2 revised")) == [
        "regime calm->turbulent", "2 revised"]
