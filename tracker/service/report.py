"""The headless report: the board, the market regime, the warnings explained, the caution.

``render_report(store, config, fmt, since_review=False) -> str`` with ``fmt`` one of
``'text'``, ``'markdown'``, ``'csv'``, ``'json'``. With ``since_review`` only the factors
that changed since the last review are listed (all of them when no review is stored; the
output says so). Premium figures are annualised (252 trading days or 12 months: common
practice); every number comes from :func:`tracker.service.views.load_board` and the
stored warnings, nothing is re-estimated.

JSON fields (stable; ``schema`` changes when a field is removed or changes meaning)
---------------------------------------------------------------------------------
Top level:

``schema``                 ``"tracker.report/1"``
``caution``                the caution text (string)
``scenario``               the demo scenario's name, or null for a store of real data
``since_review``           true when only factors changed since the last review are listed
``last_review``            ISO timestamp of the last review, or null
``data_through``           ISO date of the latest stored return, or null
``estimates_refreshed``    ISO timestamp of the last estimation run, or null
``drops``                  ``{"pending": int, "rejected": int}`` drop files waiting / rejected
``market``                 object, below
``factors``                list of objects, below, in factor id order
``assets``                 the asset view: ``status`` ('ok' or 'unavailable' with ``message``),
                           ``date``, ``factors``, ``window_rows``, ``rows`` (per asset:
                           ``expected_ann``, ``expected_se_ann`` (delta method, premium and
                           exposure uncertainty), ``realised_ann``, ``gap_ann``, ``gap_t``,
                           ``alpha_ann``, ``alpha_t``, ``exposures`` {factor: {beta, se}}),
                           ``premia`` {factor: filtered_ann, fama_macbeth_ann,
                           fama_macbeth_se_ann, inversion_ann}, ``inversion_message``,
                           ``grs`` {f, p_value}, ``sdf`` {max_sharpe_ann_filtered,
                           max_sharpe_ann_sample, max_sharpe_ann_sample_se, b,
                           pricing_errors_ann}

``market``: ``date`` (ISO date or null), ``regime`` (0-based index, ordered from calmest
to most volatile, or null), ``regime_label``, ``n_regimes``, ``status`` and ``message``
of the fit, ``columns`` (factor ids the joint model uses), ``regimes``: list of
``{"regime", "label", "probability" (filtered, data to date), "predicted" (next
period), "expected_duration" (periods, 1/(1-p_ii); null when infinite)}``.

Each factor: ``factor_id``, ``label``, ``frequency`` ('daily'/'monthly'), ``is_new``
(a newly proposed factor), ``n_obs``, ``last_date`` (latest return), ``estimate_date``
(latest estimate), ``premium_ann`` (filtered premium, real time, annualised decimal),
``band90_lo`` / ``band90_hi`` (90% band of the filtered premium), ``t_stat`` (filtered
premium / its sd), ``p_positive`` (P(premium > 0), normal approximation),
``sharpe_ann``, ``regime`` / ``regime_label`` / ``n_regimes`` / ``regime_prob`` (the
factor's most likely regime and its filtered probability), ``worst_severity`` ('none',
'info', 'caution', 'alert'), ``warning_codes`` (most severe first), ``changes`` (what
changed since the last review; empty without a review), ``warnings``: list of
``{"code", "severity", "message", "detail", "value", "threshold", "source", "date"}``.
Numbers that are not available (NaN) are null.

CSV: one row per factor with the factor fields above (``warning_codes`` and ``changes``
joined by spaces and '; '), plus ``warnings`` ('CODE: message' joined by ' | '),
``market_regime``, ``market_regime_prob`` and ``caution`` repeated on every row, so a
copied sheet keeps its caution.
"""

from __future__ import annotations

import csv
import io
import json
import math
import textwrap
from datetime import date, datetime

from tracker.config import Config
from tracker.estimation.warning_rules import CATALOGUE
from tracker.service.views import CAUTION, Board, BoardRow, load_board, regime_name
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

SCHEMA = "tracker.report/1"
FORMATS = ("text", "markdown", "csv", "json")
SEVERITY_NAMES = {0: "none", 1: "info", 2: "caution", 3: "alert"}
_SEVERITY_RANK = {"info": 1, "caution": 2, "alert": 3}
_CATALOGUE_ORDER = {code: i for i, code in enumerate(CATALOGUE)}
TEXT_WIDTH = 100


def severity_of(code: str) -> int:
    """1 info, 2 caution, 3 alert (the catalogue's severity); 1 for an unknown code."""
    spec = CATALOGUE.get(code)
    return _SEVERITY_RANK.get(spec.severity, 1) if spec else 1


def ordered_codes(codes) -> list[str]:
    """Warning codes, most severe first, then in catalogue order."""
    return sorted(codes, key=lambda c: (-severity_of(c), _CATALOGUE_ORDER.get(c, 999), c))


def warning_message(code: str) -> str:
    spec = CATALOGUE.get(code)
    return spec.message if spec else ""


def warning_catalogue() -> list[tuple[str, int, str, str]]:
    """Every warning code: (code, severity 1..3, one-line message, source), catalogue order."""
    return [(c, severity_of(c), s.message, s.source) for c, s in CATALOGUE.items()]


def render_report(store: Store, config: Config, fmt: str = "text", since_review: bool = False) -> str:
    if fmt not in FORMATS:
        raise ValueError(f"unknown report format {fmt!r}; choose one of {', '.join(FORMATS)}")
    board = load_board(store, config)
    rows = list(board.rows)
    reviewed = board.header.last_review is not None
    if since_review and reviewed:
        rows = [r for r in rows if r.changes]
    warns = _latest_warnings(store, [r.factor_id for r in rows])
    doc = _document(board, rows, warns, since_review)
    doc["assets"] = _assets(store, config)
    return {"text": _text, "markdown": _markdown, "csv": _csv, "json": _json}[fmt](doc)


def _latest_warnings(store: Store, factor_ids: list[str]) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    with store.connect() as con:
        for fid in factor_ids:
            recs = con.execute(sql("views.factor_warnings_latest"), [fid, fid]).fetchall()
            out[fid] = [
                {"code": r[0], "severity": r[1], "message": r[2], "detail": r[3], "value": _num(r[4]),
                 "threshold": _num(r[5]), "source": r[6], "date": _iso(r[7])}
                for r in recs
            ]
            out[fid].sort(key=lambda w: (-_SEVERITY_RANK.get(w["severity"], 1),
                                         _CATALOGUE_ORDER.get(w["code"], 999), w["code"]))
    return out


def _num(x):
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _iso(x):
    if x is None:
        return None
    if isinstance(x, datetime):
        return x.isoformat(timespec="seconds")
    if isinstance(x, date):
        return x.isoformat()
    try:
        import pandas as pd

        ts = pd.Timestamp(x)
        return ts.date().isoformat() if ts == ts.normalize() else ts.isoformat()
    except (TypeError, ValueError):
        return str(x)


def _factor(r: BoardRow, warnings: list[dict]) -> dict:
    return {
        "factor_id": r.factor_id, "label": r.label, "frequency": r.frequency, "is_new": r.is_new,
        "n_obs": r.n_obs, "last_date": _iso(r.last_date), "estimate_date": _iso(r.estimate_date),
        "premium_ann": _num(r.premium_ann), "band90_lo": _num(r.band_lo), "band90_hi": _num(r.band_hi),
        "t_stat": _num(r.t_stat), "p_positive": _num(r.p_positive), "sharpe_ann": _num(r.sharpe_ann),
        "regime": r.regime, "regime_label": r.regime_label if r.regime is not None else None,
        "n_regimes": r.n_regimes, "regime_prob": _num(r.regime_prob),
        "worst_severity": SEVERITY_NAMES.get(r.worst, "none"),
        "warning_codes": ordered_codes(r.codes), "changes": list(r.changes), "warnings": warnings,
    }


def _market(board: Board) -> dict:
    m = board.market
    regimes = []
    for i, p in enumerate(m.probabilities):
        dur = m.durations[i] if i < len(m.durations) else None
        regimes.append({
            "regime": i, "label": regime_name(i, m.n_regimes), "probability": _num(p),
            "predicted": _num(m.predicted[i]) if i < len(m.predicted) else None,
            "expected_duration": _num(dur),
        })
    return {"date": _iso(m.date), "regime": m.regime,
            "regime_label": m.label if m.regime is not None else None, "n_regimes": m.n_regimes,
            "status": m.status, "message": m.message, "columns": list(m.columns), "regimes": regimes}


def _document(board: Board, rows: list[BoardRow], warns: dict, since_review: bool) -> dict:
    h = board.header
    return {
        "schema": SCHEMA,
        "caution": CAUTION,
        "scenario": h.scenario,
        "since_review": bool(since_review),
        "last_review": _iso(h.last_review),
        "data_through": _iso(h.last_data_date),
        "estimates_refreshed": _iso(h.last_refresh),
        "drops": {"pending": int(h.pending_drops), "rejected": int(h.rejected_drops)},
        "market": _market(board),
        "factors": [_factor(r, warns.get(r.factor_id, [])) for r in rows],
    }


def _assets(store: Store, config: Config) -> dict:
    from tracker.service.assets import load_assets_view

    try:
        v = load_assets_view(store, config)
    except Exception as exc:  # the asset view must never take the report down with it
        return {"status": "unavailable", "message": f"{type(exc).__name__}: {exc}"}
    if v.status != "ok":
        return {"status": v.status, "message": v.message}
    return {
        "status": "ok", "date": _iso(v.date), "factors": list(v.factors), "window_rows": v.window,
        "rows": [{"asset_id": r.asset_id, "label": r.label, "expected_ann": _num(r.expected_ann),
                  "expected_se_ann": _num(r.expected_se_ann), "realised_ann": _num(r.realised_ann),
                  "gap_ann": _num(r.gap_ann), "gap_t": _num(r.gap_t), "alpha_ann": _num(r.alpha_ann),
                  "alpha_t": _num(r.alpha_t),
                  "exposures": {f: {"beta": _num(b), "se": _num(se)} for f, (b, se) in r.exposures.items()}}
                 for r in v.rows],
        "premia": {f: {"filtered_ann": _num(v.filtered_premia_ann.get(f)),
                       "fama_macbeth_ann": _num(v.fama_macbeth_ann.get(f, (None, None))[0]),
                       "fama_macbeth_se_ann": _num(v.fama_macbeth_ann.get(f, (None, None))[1]),
                       "inversion_ann": _num(v.inversion_ann.get(f))} for f in v.factors},
        "inversion_message": v.inversion_message,
        "grs": {"f": _num(v.grs_f), "p_value": _num(v.grs_p)},
        "sdf": {"max_sharpe_ann_filtered": _num(v.sdf_max_sharpe_ann),
                "max_sharpe_ann_sample": _num(v.sdf_max_sharpe_sample_ann),
                "max_sharpe_ann_sample_se": _num(v.sdf_max_sharpe_sample_se_ann),
                "b": {f: _num(x) for f, x in v.sdf_b.items()},
                "pricing_errors_ann": {a: _num(x) for a, x in v.sdf_pricing_errors_ann.items()}},
    }


def _asset_lines(a: dict) -> list[str]:
    if a.get("status") != "ok":
        return [f"Assets: not available ({a.get('message', '')})"]
    lines = [f"Assets on {a['date']}: expected excess return = exposures x filtered premia (annualised), "
             f"exposures from a {a['window_rows']}-row rolling window",
             f"  {'Asset':<8} {'Expected':>9} {'sd':>7} {'Realised':>9} {'Gap':>8} {'t(gap)':>7}"]
    for r in a["rows"]:
        lines.append(f"  {r['asset_id']:<8} {_p(r['expected_ann'])} {_p(r['expected_se_ann'], signed=False):>7}"
                     f" {_p(r['realised_ann'])} {_p(r['gap_ann'])} {_f(r['gap_t'], signed=True)}")
    g, sd = a["grs"], a["sdf"]
    lines.append(f"  GRS test of joint alphas (Gibbons, Ross & Shanken 1989): F {_f(g['f'])}, p {_f(g['p_value'], 3)}")
    lines.append(f"  Maximal Sharpe ratio of the factor span (Hansen-Jagannathan bound), annual: "
                 f"{_f(sd['max_sharpe_ann_filtered'])} from filtered premia; "
                 f"{_f(sd['max_sharpe_ann_sample'])} (sd {_f(sd['max_sharpe_ann_sample_se'])}) from sample means")
    lines.append("  Premia per year: factor  filtered  Fama-MacBeth (sd)  inversion")
    for f, p in a["premia"].items():
        lines.append(f"    {f:<8} {_p(p['filtered_ann'])} {_p(p['fama_macbeth_ann'])} ({_p(p['fama_macbeth_se_ann'], signed=False)})"
                     f" {_p(p['inversion_ann'])}")
    return lines


# --------------------------------------------------------------------------- formats

def _json(doc: dict) -> str:
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


def _p(x, digits=2, signed=True) -> str:
    return "-" if x is None else f"{x * 100:{'+' if signed else ''}.{digits}f}%"


def _f(x, digits=2, signed=False) -> str:
    return "-" if x is None else f"{x:{'+' if signed else ''}.{digits}f}"


def _band(f: dict) -> str:
    if f["band90_lo"] is None or f["band90_hi"] is None:
        return "-"
    return f"{_p(f['band90_lo'])} .. {_p(f['band90_hi'])}"


def _regime(f: dict) -> str:
    return "-" if f["regime_label"] is None else f"{f['regime_label']} {_f(f['regime_prob'])}"


def _market_line(m: dict) -> str:
    if m["regime"] is None:
        return f"Market regime: not estimated ({m['message']})"
    parts = [f"{r['label']} {_f(r['probability'])}" for r in m["regimes"]]
    return f"Market regime on {m['date']}: {m['regime_label']} ({', '.join(parts)})"


def _durations_line(m: dict) -> str:
    parts = [f"{r['label']} {_f(r['expected_duration'], 1)}" for r in m["regimes"]]
    return "Expected duration in periods, 1/(1-p_ii): " + ", ".join(parts) if parts else ""


def _scope_line(doc: dict) -> str:
    if not doc["since_review"]:
        return f"All {len(doc['factors'])} factors."
    if doc["last_review"] is None:
        return f"No review stored yet: all {len(doc['factors'])} factors are listed."
    return f"{len(doc['factors'])} factor(s) changed since the review of {doc['last_review']}."


LEGEND = ("Premium: filtered (real-time) estimate, annualised; band: 90%; t: premium / its sd; "
          "P(>0): probability the premium is positive; marks: !! alert, ! caution, i info.")
BOARD_HEADINGS = ("Factor", "Last date", "Regime", "Premium/yr", "90% band", "t", "P(>0)", "Warnings", "Changed")


def _board_cells(f: dict) -> tuple[str, ...]:
    mark = {"alert": "!! ", "caution": "! ", "info": "i ", "none": ""}[f["worst_severity"]]
    return (f["factor_id"], f["last_date"] or "-", _regime(f), _p(f["premium_ann"]), _band(f),
            _f(f["t_stat"], signed=True), _f(f["p_positive"], 3),
            (mark + " ".join(f["warning_codes"])).strip(), "; ".join(f["changes"]))


def _header_lines(doc: dict) -> list[str]:
    lines = []
    if doc["scenario"]:
        lines.append(f"Demo scenario: {doc['scenario']}.")
    lines += [
        f"Data through {doc['data_through'] or '-'}; estimates refreshed {doc['estimates_refreshed'] or 'never'}; "
        f"drop files {doc['drops']['pending']} pending, {doc['drops']['rejected']} rejected; "
        f"last review {doc['last_review'] or 'never'}.",
        _market_line(doc["market"]),
    ]
    dur = _durations_line(doc["market"])
    if dur:
        lines.append(dur)
    return lines


def _numbers(w: dict) -> str:
    nums = []
    if w["value"] is not None:
        nums.append(f"value {w['value']:.4g}")
    if w["threshold"] is not None:
        nums.append(f"threshold {w['threshold']:.4g}")
    nums.append(f"source: {w['source']}")
    return "; ".join(nums)


def _warning_lines(f: dict, indent: str) -> list[str]:
    out = []
    more = indent + "    "
    for w in f["warnings"]:
        out += textwrap.wrap(f"{w['code']} ({w['severity']}): {w['message']}", TEXT_WIDTH,
                             initial_indent=indent, subsequent_indent=more)
        for part in (w["detail"], _numbers(w)):
            if part:
                out += textwrap.wrap(part, TEXT_WIDTH, initial_indent=indent + "  ", subsequent_indent=more)
    return out


def _text(doc: dict) -> str:
    lines = ["Premium tracker report", ""]
    for x in _header_lines(doc):
        lines += textwrap.wrap(x, TEXT_WIDTH, subsequent_indent="  ")
    lines += ["", _scope_line(doc), ""]
    cells = [BOARD_HEADINGS] + [_board_cells(f) for f in doc["factors"]]
    widths = [max(len(c[i]) for c in cells) for i in range(len(BOARD_HEADINGS))]
    right = {3, 4, 5, 6}
    for c in cells:
        lines.append("  ".join(v.rjust(w) if i in right else v.ljust(w) for i, (v, w) in enumerate(zip(c, widths))).rstrip())
    lines += [""] + textwrap.wrap(LEGEND, TEXT_WIDTH) + ["", "Warnings"]
    any_w = False
    for f in doc["factors"]:
        if f["warnings"]:
            any_w = True
            lines.append(f"  {f['factor_id']} ({f['label']})")
            lines += _warning_lines(f, "    ")
    if not any_w:
        lines.append("  none")
    if "assets" in doc:
        lines += [""] + _asset_lines(doc["assets"])
    lines += [""] + textwrap.wrap(doc["caution"], TEXT_WIDTH) + [""]
    return "\n".join(lines)


def _md_escape(s: str) -> str:
    return s.replace("|", "\\|")


def _markdown(doc: dict) -> str:
    lines = ["# Premium tracker report", ""]
    lines += [f"- {_md_escape(x)}" for x in _header_lines(doc)]
    lines += ["", _scope_line(doc), "", "| " + " | ".join(BOARD_HEADINGS) + " |",
              "|" + "|".join("---:" if i in (3, 4, 5, 6) else "---" for i in range(len(BOARD_HEADINGS))) + "|"]
    for f in doc["factors"]:
        lines.append("| " + " | ".join(_md_escape(c) for c in _board_cells(f)) + " |")
    lines += ["", LEGEND, "", "## Warnings", ""]
    any_w = False
    for f in doc["factors"]:
        if not f["warnings"]:
            continue
        any_w = True
        lines += [f"### {f['factor_id']} ({_md_escape(f['label'])})", ""]
        for w in f["warnings"]:
            lines.append(f"- **{w['code']}** ({w['severity']}): {_md_escape(w['message'])}")
            if w["detail"]:
                lines.append(f"  {_md_escape(w['detail'])}")
            lines.append("  " + _md_escape(_numbers(w)))
        lines.append("")
    if not any_w:
        lines += ["None.", ""]
    if "assets" in doc:
        lines += ["## Assets", "", "```"] + _asset_lines(doc["assets"]) + ["```", ""]
    lines += [f"> {doc['caution']}", ""]
    return "\n".join(lines)


CSV_COLUMNS = (
    "factor_id", "label", "frequency", "is_new", "n_obs", "last_date", "estimate_date", "premium_ann",
    "band90_lo", "band90_hi", "t_stat", "p_positive", "sharpe_ann", "regime", "regime_label", "n_regimes",
    "regime_prob", "worst_severity", "warning_codes", "changes", "warnings", "market_regime",
    "market_regime_prob", "caution",
)


def _csv(doc: dict) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    m = doc["market"]
    m_prob = m["regimes"][m["regime"]]["probability"] if m["regime"] is not None and m["regimes"] else None
    for f in doc["factors"]:
        rec = dict(f)
        rec["warning_codes"] = " ".join(f["warning_codes"])
        rec["changes"] = "; ".join(f["changes"])
        rec["warnings"] = " | ".join(f"{x['code']}: {x['message']}" for x in f["warnings"])
        rec["market_regime"] = m["regime_label"]
        rec["market_regime_prob"] = m_prob
        rec["caution"] = doc["caution"]
        w.writerow(["" if rec[c] is None else rec[c] for c in CSV_COLUMNS])
    return buf.getvalue()


__all__ = ["CSV_COLUMNS", "FORMATS", "SCHEMA", "SEVERITY_NAMES", "ordered_codes", "render_report",
           "severity_of", "warning_catalogue", "warning_message"]
