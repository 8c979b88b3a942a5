"""How numbers, dates and severities are written on screen (plain strings; no Textual).

Every severity is written as a text mark as well as a colour, so nothing depends on the
terminal's colours: ``!!`` alert, ``!`` caution, ``i`` info.
"""

from __future__ import annotations

import math
import re
from datetime import date, datetime

from tracker.service.report import SEVERITY_NAMES, ordered_codes, severity_of

SEVERITY_MARKS = {0: " ", 1: "i", 2: "!", 3: "!!"}
SEVERITY_STYLES = {0: "", 1: "dim", 2: "bold #d7af00", 3: "bold #ff3030"}
CHANGED_MARK = "*"          # something material changed since the review
ROWS_MARK = "+"             # only new rows arrived since the review
_ROWS_ONLY = re.compile(r"^[+-]\d+ rows?$")

#: Short names for the narrow board; the full name is shown in the row summary.
_SHORT_REGIME = {"calm": "calm", "mild": "mild", "choppy": "chop", "turbulent": "turb", "stressed": "strs"}


def finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def pct(x, digits: int = 2, *, signed: bool = True) -> str:
    """A decimal as a percentage: 0.0626 -> '+6.26%'; NaN -> '-'."""
    if not finite(x):
        return "-"
    return f"{float(x) * 100:{'+' if signed else ''}.{digits}f}%"


def per_year(x, digits: int = 2) -> str:
    """'+6.26%/yr', or 'n/a' when the number is missing."""
    return "n/a" if not finite(x) else f"{pct(x, digits)}/yr"


def band(lo, hi, digits: int = 1) -> str:
    """A band of two decimals as '[+2.4, +10.1]' (percent)."""
    if not (finite(lo) and finite(hi)):
        return "-"
    return f"[{float(lo) * 100:+.{digits}f}, {float(hi) * 100:+.{digits}f}]"


def num(x, digits: int = 2, *, signed: bool = False) -> str:
    if not finite(x):
        return "-"
    return f"{float(x):{'+' if signed else ''}.{digits}f}"


def prob(x) -> str:
    return "-" if not finite(x) else f"{float(x):.2f}"


def day(d: date | datetime | None) -> str:
    if d is None:
        return "-"
    if isinstance(d, datetime):
        d = d.date()
    return d.isoformat()


def stamp(t: datetime | None) -> str:
    """A stored timestamp to the minute ('2026-12-02 01:33'), '-' when missing."""
    if t is None:
        return "-"
    try:
        return t.strftime("%Y-%m-%d %H:%M")
    except (AttributeError, ValueError):
        return str(t)


def clock(t: datetime) -> str:
    return t.strftime("%H:%M:%S")


def short_regime(label: str) -> str:
    return _SHORT_REGIME.get(label, label[:4])


def regime_cell(label: str, p, *, short: bool) -> str:
    if label == "-":
        return "-"
    return f"{short_regime(label) if short else label} {prob(p)}"


def severity_mark(worst: int) -> str:
    return SEVERITY_MARKS.get(int(worst or 0), "?")


def codes_cell(codes, worst: int, width: int | None) -> str:
    """Severity mark and codes (most severe first), cut to ``width`` with a '+n' tail."""
    ordered = ordered_codes(codes)
    mark = severity_mark(worst)
    if not ordered:
        return ""
    if width is None:
        return f"{mark} {' '.join(ordered)}"
    out = mark
    for i, code in enumerate(ordered):
        rest = len(ordered) - i - 1
        tail = f" +{rest}" if rest else ""
        if len(out) + 1 + len(code) + len(tail) <= width:
            out += " " + code
        elif i == 0:                     # never only a count: the worst code, shortened
            room = max(1, width - len(out) - 1 - len(tail) - 1)
            return f"{out} {code[:room]}…{tail}"
        else:
            return f"{out} +{len(ordered) - i}"
    return out


def code_with_severity(code: str) -> str:
    sev = severity_of(code)
    return f"{severity_mark(sev)} {code} ({SEVERITY_NAMES.get(sev, 'unknown')})"


def periods_unit(frequency: str) -> str:
    return "months" if frequency == "monthly" else "trading days"


def material_changes(changes) -> list[str]:
    """Changes other than new rows arriving (regime, sign, band, warnings, revisions)."""
    return [c for c in changes if not _ROWS_ONLY.match(c)]


def change_mark(changes) -> str:
    if material_changes(changes):
        return CHANGED_MARK
    return ROWS_MARK if changes else ""
