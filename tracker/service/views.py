"""What the screens and the report show, as plain frozen dataclasses (no Textual here).

Every function opens the store for one short read. Numbers are per period in the store;
here they are annualised (252 trading days, 12 months: common practice) where a person
reads them.
"""

from __future__ import annotations

import getpass
import json
import math
from dataclasses import asdict, dataclass
from datetime import date, datetime

import numpy as np
import pandas as pd
from scipy.stats import norm

from tracker.config import Config
from tracker.service.factor_models import PERIODS_PER_YEAR
from tracker.service.status import pending_drop_files
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

Z90 = float(norm.ppf(0.95))
REGIME_NAMES = {2: ("calm", "turbulent"), 3: ("calm", "choppy", "stressed"), 4: ("calm", "mild", "choppy", "stressed")}
CAUTION = ("Statistical estimates, not investment advice. Follow your firm's model-risk and "
           "investment policies and licensed advice.")


def regime_name(index: int | None, n: int | None) -> str:
    if index is None or n is None or (isinstance(index, float) and math.isnan(index)):
        return "-"
    names = REGIME_NAMES.get(int(n))
    return names[int(index)] if names and 0 <= int(index) < len(names) else f"regime {int(index)}"


def _f(x) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return float("nan")
    return v


def _date(x) -> date | None:
    if x is None or (isinstance(x, float) and math.isnan(x)) or pd.isna(x):
        return None
    return pd.Timestamp(x).date()


@dataclass(frozen=True)
class BoardRow:
    """One factor on the board. Premium figures are annualised decimals."""

    factor_id: str
    label: str
    frequency: str
    is_new: bool
    n_obs: int
    last_date: date | None
    estimate_date: date | None
    premium_ann: float
    band_lo: float                 # 90% band of the filtered premium
    band_hi: float
    t_stat: float                  # filtered premium / its sd
    p_positive: float              # P(premium > 0 | data to date), normal approximation
    sharpe_ann: float
    regime: int | None
    n_regimes: int | None
    regime_prob: float
    codes: tuple[str, ...]
    worst: int                     # 0 none, 1 info, 2 caution, 3 alert
    fit_status: str = "not estimated"  # premium model: ok, too_little_data, not_converged, ...
    fit_message: str = ""
    changes: tuple[str, ...] = ()  # what changed since the last review

    @property
    def regime_label(self) -> str:
        return regime_name(self.regime, self.n_regimes)

    @property
    def band_contains_zero(self) -> bool:
        return self.band_lo <= 0.0 <= self.band_hi

    def snapshot(self) -> dict:
        return {"regime": self.regime, "sign": int(np.sign(self.premium_ann)) if math.isfinite(self.premium_ann) else 0,
                "band_zero": self.band_contains_zero, "codes": list(self.codes),
                "last_date": str(self.last_date), "n_obs": self.n_obs}


@dataclass(frozen=True)
class MarketSummary:
    date: date | None
    regime: int | None
    n_regimes: int | None
    probabilities: tuple[float, ...]
    predicted: tuple[float, ...]
    status: str
    message: str
    columns: tuple[str, ...] = ()
    durations: tuple[float, ...] = ()

    @property
    def label(self) -> str:
        return regime_name(self.regime, self.n_regimes)

    def describe(self) -> str:
        if self.regime is None:
            return "market regime: not estimated"
        probs = " ".join(f"{regime_name(i, self.n_regimes)[:5]} {p:.2f}" for i, p in enumerate(self.probabilities))
        return f"market {self.label} ({probs})"


@dataclass(frozen=True)
class HeaderInfo:
    last_data_date: date | None
    last_refresh: datetime | None
    pending_drops: int
    rejected_drops: int
    last_review: datetime | None
    scenario: str | None


@dataclass(frozen=True)
class Board:
    rows: tuple[BoardRow, ...]
    market: MarketSummary
    header: HeaderInfo
    version: str


def _row(r: dict, ppy: int) -> BoardRow:
    prem, sd = _f(r["premium"]), _f(r["premium_sd"])
    t = prem / sd if sd > 0 else float("nan")
    codes = tuple(c for c in str(r["codes"] or "").split() if c)
    regime = None if pd.isna(r["regime"]) else int(r["regime"])
    n_reg = None if pd.isna(r["n_regimes"]) else int(r["n_regimes"])
    return BoardRow(
        factor_id=r["factor_id"], label=r["label"], frequency=r["frequency"], is_new=bool(r["is_new"]),
        n_obs=int(r["n_obs"]) if not pd.isna(r["n_obs"]) else 0,
        last_date=_date(r["last_date"]), estimate_date=_date(r["estimate_date"]),
        premium_ann=prem * ppy, band_lo=(prem - Z90 * sd) * ppy, band_hi=(prem + Z90 * sd) * ppy,
        t_stat=t, p_positive=float(norm.cdf(t)) if math.isfinite(t) else float("nan"),
        sharpe_ann=_f(r["sharpe_ann"]), regime=regime, n_regimes=n_reg,
        regime_prob=_f(r["regime_prob"]), codes=codes, worst=int(r["worst"] or 0),
        fit_status=str(r["fit_status"]), fit_message=str(r["fit_message"]),
    )


def load_board(store: Store, config: Config) -> Board:
    inbox = config.inbox_path(store.folder)
    with store.connect() as con:
        rows = con.execute(sql("views.board")).df().to_dict("records")
        m = con.execute(sql("views.market_latest")).fetchone()
        mfit = con.execute(sql("views.market_fit")).fetchone()
        last_run = con.execute(sql("status.last_run")).fetchone()[0]
        drops = dict(con.execute(sql("status.drop_outcomes")).fetchall())
        review = con.execute(sql("views.last_review")).fetchone()
        scenario = con.execute(sql("status.get_meta"), ["scenario"]).fetchone()
        version = dict(con.execute(sql("views.version")).fetchall())
    board_rows = [_row(r, PERIODS_PER_YEAR.get(r["frequency"], 252)) for r in rows]
    if review is not None:
        snap = json.loads(review[3])
        revised = _revised_since(store, review[2])
        board_rows = [_with_changes(r, snap.get(r.factor_id), revised.get(r.factor_id, 0)) for r in board_rows]
    market = _market(m, mfit)
    header = HeaderInfo(
        last_data_date=max((r.last_date for r in board_rows if r.last_date), default=None),
        last_refresh=last_run, pending_drops=len(pending_drop_files(inbox)),
        rejected_drops=int(drops.get("rejected", 0)),
        last_review=review[2] if review else None, scenario=scenario[0] if scenario else None,
    )
    return Board(tuple(board_rows), market, header, version=json.dumps(version, sort_keys=True))


def _market(m, mfit) -> MarketSummary:
    status, message, columns, durations = "missing", "The market regime has not been estimated yet.", (), ()
    if mfit is not None:
        status, message = mfit[0], mfit[1]
        try:
            params = json.loads(mfit[2])
            columns = tuple(params.get("columns") or params.get("selection", {}).get("columns", ()))
            trans = np.asarray(params.get("transition"), dtype=float)
            if trans.ndim == 2:
                durations = tuple(float(1.0 / (1.0 - trans[i, i])) if trans[i, i] < 1 else float("inf")
                                  for i in range(trans.shape[0]))
        except (TypeError, ValueError, json.JSONDecodeError):
            pass
    if m is None:
        return MarketSummary(None, None, None, (), (), status, message, columns, durations)
    return MarketSummary(_date(m[0]), int(m[1]), int(m[3]), tuple(map(float, m[4])), tuple(map(float, m[5])),
                         status, message, columns, durations)


def _revised_since(store: Store, when) -> dict[str, int]:
    with store.connect() as con:
        rows = con.execute(sql("views.revisions_since"), [when]).fetchall()
    out: dict[str, int] = {}
    for kind, sid, *_ in rows:
        if kind == "factor":
            out[sid] = out.get(sid, 0) + 1
    return out


def _with_changes(row: BoardRow, snap: dict | None, n_revised: int) -> BoardRow:
    if snap is None:
        return _replace(row, ("new factor",))
    changes = []
    now = row.snapshot()
    if now["regime"] != snap.get("regime"):
        changes.append(f"regime {regime_name(snap.get('regime'), row.n_regimes)}->{row.regime_label}")
    if now["sign"] != snap.get("sign"):
        changes.append("premium sign flipped")
    if now["band_zero"] != snap.get("band_zero"):
        changes.append("band now contains zero" if now["band_zero"] else "band no longer contains zero")
    old_codes, new_codes = set(snap.get("codes", [])), set(now["codes"])
    changes += [f"+{c}" for c in sorted(new_codes - old_codes)]
    changes += [f"-{c}" for c in sorted(old_codes - new_codes)]
    if now["n_obs"] != snap.get("n_obs"):
        changes.append(f"{now['n_obs'] - int(snap.get('n_obs', 0)):+d} rows")
    if n_revised:
        changes.append(f"{n_revised} revised")
    return _replace(row, tuple(changes))


def _replace(row: BoardRow, changes: tuple[str, ...]) -> BoardRow:
    from dataclasses import replace

    return replace(row, changes=changes)


def mark_reviewed(store: Store, config: Config, reviewer: str | None = None) -> datetime:
    """Store the review time and a snapshot of the board; return the time stored."""
    board = load_board(store, config)
    snap = {r.factor_id: r.snapshot() for r in board.rows}
    who = reviewer or _user()
    with store.transaction() as con:
        con.execute(sql("views.insert_review"), [who, json.dumps(snap)])
        when = con.execute(sql("views.last_review")).fetchone()[2]
    return when


def _user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # pragma: no cover - no passwd entry in some containers
        return "unknown"


@dataclass(frozen=True)
class FactorDetail:
    factor_id: str
    label: str
    description: str
    frequency: str
    is_new: bool
    dates: np.ndarray                # (T,) datetime64[D], the chosen window
    premium_ann: np.ndarray          # real-time filtered premium, annualised
    band_lo: np.ndarray
    band_hi: np.ndarray
    regime_premium_ann: np.ndarray
    returns: np.ndarray              # realized returns on the same dates
    regime_probs: np.ndarray         # (T, K) filtered
    hindsight_ann: np.ndarray | None  # smoothed path: HINDSIGHT, display only
    regimes: tuple[dict, ...]        # per regime: name, mean_ann, vol_ann, duration
    warnings: tuple[dict, ...]
    warning_history: tuple[dict, ...]
    fits: tuple[dict, ...]


def load_detail(store: Store, factor_id: str, *, window_days: int = 756, hindsight: bool = False) -> FactorDetail:
    with store.connect() as con:
        meta = con.execute(sql("views.factor_meta"), [factor_id]).fetchone()
        if meta is None:
            raise KeyError(factor_id)
        last = con.execute(sql("views.premium_path"), [factor_id, date(1900, 1, 1)]).df()
        ppy = PERIODS_PER_YEAR.get(meta[3], 252)
        start = last["date"].iloc[-window_days] if len(last) > window_days else (last["date"].iloc[0] if len(last) else pd.Timestamp("1900-01-01"))
        prem = last[last["date"] >= start]
        rets_all = con.execute(sql("views.returns_path"), [factor_id, date(1900, 1, 1)]).df()
        reg = con.execute(sql("views.regime_path"), [factor_id, start]).df()
        fits = con.execute(sql("views.factor_fits"), [factor_id]).df().to_dict("records")
        warns = con.execute(sql("views.factor_warnings_latest"), [factor_id, factor_id]).df().to_dict("records")
        hist = con.execute(sql("views.factor_warning_history"), [factor_id, start]).df().to_dict("records")
    dates = prem["date"].to_numpy().astype("datetime64[D]")
    rets = rets_all.set_index(rets_all["date"].to_numpy().astype("datetime64[D]"))["ret"].reindex(dates).to_numpy(float)
    k = int(len(reg["filtered"].iloc[0])) if len(reg) else 0
    reg_map = {np.datetime64(pd.Timestamp(d).date(), "D"): v for d, v in zip(reg["date"], reg["filtered"])}
    probs = np.array([reg_map.get(d, [np.nan] * k) for d in dates], dtype=float).reshape(len(dates), k) if k else np.empty((len(dates), 0))
    sd = prem["premium_sd"].to_numpy(float)
    p = prem["premium"].to_numpy(float)
    regimes = ()
    fit_by_model = {f["model"]: f for f in fits}
    if "regimes" in fit_by_model and fit_by_model["regimes"]["status"] == "ok":
        rp = json.loads(fit_by_model["regimes"]["params_json"])
        means, var, trans = np.asarray(rp["means"]), np.asarray(rp["variances"]), np.asarray(rp["transition"])
        regimes = tuple({"name": regime_name(i, len(means)), "mean_ann": float(means[i] * ppy),
                         "vol_ann": float(math.sqrt(var[i] * ppy)),
                         "duration": float(1 / (1 - trans[i, i])) if trans[i, i] < 1 else float("inf")}
                        for i in range(len(means)))
    smooth = None
    if hindsight and "premium" in fit_by_model and fit_by_model["premium"]["status"] == "ok":
        from tracker.service.factor_models import hindsight_premium

        params = {f["model"]: json.loads(f["params_json"]) for f in fits if f["status"] == "ok"}
        full = hindsight_premium(params, rets_all["ret"].to_numpy(float))
        if full is not None:
            idx = rets_all["date"].to_numpy().astype("datetime64[D]")
            smooth = pd.Series(full, index=idx).reindex(dates).to_numpy(float) * ppy
    return FactorDetail(
        factor_id=meta[0], label=meta[1], description=meta[2], frequency=meta[3], is_new=bool(meta[5]),
        dates=dates, premium_ann=p * ppy, band_lo=(p - Z90 * sd) * ppy, band_hi=(p + Z90 * sd) * ppy,
        regime_premium_ann=prem["regime_premium"].to_numpy(float) * ppy, returns=rets,
        regime_probs=probs, hindsight_ann=smooth, regimes=regimes, warnings=tuple(warns),
        warning_history=tuple(hist), fits=tuple(fits),
    )


@dataclass(frozen=True)
class DropEntry:
    drop_id: int
    file_name: str
    outcome: str
    reason: str
    rows: dict
    n_revisions: int
    warnings: tuple
    processed_at: datetime | None


def load_drops(store: Store, limit: int = 200) -> list[DropEntry]:
    with store.connect() as con:
        rows = con.execute(sql("views.recent_drops"), [limit]).fetchall()
    out = []
    for r in rows:
        try:
            counts = json.loads(r[4] or "{}")
        except json.JSONDecodeError:
            counts = {}
        try:
            warns = tuple(json.loads(r[6] or "[]"))
        except json.JSONDecodeError:
            warns = ()
        out.append(DropEntry(int(r[0]), r[1], r[2], r[3] or "", counts, int(r[5] or 0), warns, r[8]))
    return out


def board_as_records(board: Board) -> list[dict]:
    recs = []
    for r in board.rows:
        d = asdict(r)
        d["regime_label"] = r.regime_label
        d["last_date"] = str(r.last_date) if r.last_date else None
        d["estimate_date"] = str(r.estimate_date) if r.estimate_date else None
        d["codes"] = list(r.codes)
        d["changes"] = list(r.changes)
        recs.append({k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in d.items()})
    return recs


__all__ = [
    "Board", "BoardRow", "CAUTION", "DropEntry", "FactorDetail", "HeaderInfo", "MarketSummary",
    "board_as_records", "load_board", "load_detail", "load_drops", "mark_reviewed", "regime_name",
]

