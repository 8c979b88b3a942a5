"""What the latest-date warnings need from a factor's whole stored history, in O(1) space.

The latest-date rules (:func:`tracker.service.factor_warnings.latest_warnings`) read a
factor's whole history: the Newey-West test of its mean (and, through it, the adjusted
p-values of the whole tracked set), the drift statistic's baseline, the longest gap, the
longest repeated run and the median spacing of its dates. Re-reading and re-scanning
that history on every daily update makes the update cost grow with the history, so each
factor keeps a small :class:`HistorySummary` beside its filter state (``state_json``,
key ``"history"``), advanced with the rows each update stores:

* :class:`LagSums` -- count, sum, lagged cross-products for lags 0..MAX_LAG and the first
  and last MAX_LAG values: the Bartlett-weighted (Newey & West 1987) sum of demeaned
  autocovariances at any lag up to MAX_LAG, equal (to rounding) to
  :func:`tracker.estimation.significance.newey_west_mean` and ``long_run_variance`` on
  the whole series, since sum_t (x_t - m)(x_{t-j} - m) = C_j - m (A_j + B_j) + (n - j) m^2;
* the last few hundred finite standardized errors (MISFIT, OUTLIER), premium rows
  (FRAGILE, HINDSIGHT_GAP) and finite regime rows (REGIME_AMBIG, REGIME_FLIP);
* the log-likelihood baseline as LagSums plus the recent window (DRIFT);
* the longest gap with its start and the total missing (GAP), the longest run of one
  value (REPEATED), a histogram of date spacings (FREQ_MISMATCH), the count and the
  last date (IMPLAUSIBLE_SR, STALE).

The summary depends on the warning thresholds that size its tails; a summary made under
other thresholds is not used (the service then rebuilds it from the whole history).
"""

from __future__ import annotations

import base64
import math
from dataclasses import dataclass, field

import numpy as np

from tracker.estimation import significance as sig
from tracker.estimation import warning_rules as wr

MAX_LAG = 48          # newey_west_lags reaches 48 only beyond ~13 million rows
# 2: every float of a summary in one packed field (1: a field each, still read)
VERSION = 2


def pack(values) -> str:
    """Floats as base64 of little-endian float64: exact, and 5-10x faster to store and
    read back than JSON numbers (a summary holds about a thousand of them)."""
    return base64.b64encode(np.asarray(values, dtype="<f8").tobytes()).decode("ascii")


def unpack(text: str) -> list[float]:
    return _floats(text).tolist()


def _floats(text: str) -> np.ndarray:
    """:func:`pack`'s values as a writable float64 array."""
    return np.frombuffer(base64.b64decode(text), dtype="<f8").astype(float)


@dataclass
class LagSums:
    """Running sums of a series x_0..x_{n-1} for Bartlett long-run variances."""

    n: int = 0
    total: float = 0.0
    cross: np.ndarray = field(default_factory=lambda: np.zeros(MAX_LAG + 1))   # C_j = sum_t x_t x_{t-j}
    head: np.ndarray = field(default_factory=lambda: np.empty(0))              # first min(n, MAX_LAG)
    tail: np.ndarray = field(default_factory=lambda: np.empty(0))              # last min(n, MAX_LAG)

    @classmethod
    def of(cls, x: np.ndarray) -> LagSums:
        x = np.asarray(x, dtype=float)
        n = x.size
        cross = [float(x @ x)] + [float(x[j:] @ x[:-j]) if j < n else 0.0 for j in range(1, MAX_LAG + 1)]
        return cls(n, float(x.sum()), np.array(cross), x[:MAX_LAG].copy(), x[-MAX_LAG:].copy() if n else np.empty(0))

    def extend(self, values) -> None:
        """Append values one at a time: C_j += x_t x_{t-j} for every lag the tail holds
        (one vector operation a value; each element the same product and sum as a loop)."""
        cross = self.cross
        for v in np.asarray(values, dtype=float).tolist():
            cross[0] += v * v
            k = self.tail.size
            if k:
                cross[1:k + 1] += v * self.tail[::-1]
            self.total += v
            self.n += 1
            if self.head.size < MAX_LAG:
                self.head = np.append(self.head, v)
            self.tail = np.append(self.tail, v)[-MAX_LAG:]

    def copy(self) -> LagSums:
        return LagSums(self.n, self.total, self.cross.copy(), self.head.copy(), self.tail.copy())

    def values_if_short(self) -> np.ndarray | None:
        """The whole series when it fits in ``head`` (then the library is used directly)."""
        return np.asarray(self.head, dtype=float) if self.n <= MAX_LAG else None

    def bartlett_sum(self, lags: int) -> float:
        """sum_t u_t^2 + 2 sum_{j=1..L} (1 - j/(L+1)) sum_t u_t u_{t-j}, u = x - mean."""
        n, tot = self.n, self.total
        m = tot / n
        s = 0.0
        head, tail, cross = self.head.tolist(), self.tail.tolist(), self.cross.tolist()
        for j in range(lags + 1):
            a = tot - math.fsum(head[:j])                       # sum_{t >= j} x_t
            b = tot - (math.fsum(tail[-j:]) if j else 0.0)      # sum_{t <= n-1-j} x_t
            g = cross[j] - m * (a + b) + (n - j) * m * m
            s += g if j == 0 else 2.0 * (1.0 - j / (lags + 1.0)) * g
        return s

    def mean_test(self) -> sig.MeanTest | None:
        """:func:`sig.newey_west_mean` of the series (None beyond MAX_LAG lags)."""
        short = self.values_if_short()
        if short is not None:
            return sig.newey_west_mean(short)
        n = self.n
        lag = sig.newey_west_lags(n)
        if lag > MAX_LAG:
            return None
        mean = self.total / n
        var = self.bartlett_sum(lag) / n**2
        if not var > 0.0:
            return sig.newey_west_mean(np.full(n, mean))   # the library's zero-variance result
        se = math.sqrt(var)
        t = mean / se
        return sig.MeanTest("ok", "", mean, se, t, float(sig.two_sided_p_value(t)), n, lag, False)

    def long_run_variance(self) -> float | None:
        short = self.values_if_short()
        if short is not None:
            return sig.long_run_variance(short)
        lag = max(0, min(sig.newey_west_lags(self.n), self.n - 1))
        if lag > MAX_LAG:
            return None
        return self.bartlett_sum(lag) / self.n

    def to_dict(self) -> dict:
        return {"n": self.n, "total": self.total, "cross": pack(self.cross), "head": pack(self.head),
                "tail": pack(self.tail)}

    @classmethod
    def from_dict(cls, d: dict) -> LagSums:
        return cls(int(d["n"]), float(d["total"]), _floats(d["cross"]), _floats(d["head"]), _floats(d["tail"]))


def mean_test_with(sums: LagSums, returns: np.ndarray) -> sig.MeanTest | None:
    """The mean test of a summary's returns once ``returns`` are appended (as
    :meth:`HistorySummary.extend` appends them), leaving ``sums`` as they are: the
    set-level tests of a run come before its models run."""
    vals = np.asarray(returns, dtype=float)
    vals = vals[np.isfinite(vals)]
    if sums.n == 0:
        return LagSums.of(vals).mean_test()
    sums = sums.copy()
    sums.extend(vals)
    return sums.mean_test()


def sizes_for(th: wr.WarningThresholds, hindsight_rows: int) -> dict | None:
    """Tail lengths the rules need under ``th``; None when a rule needs the whole history."""
    if th.misfit_window <= 0:
        return None
    return {
        "errors": int(max(th.misfit_window, th.outlier_lookback, 1)),
        "premium": int(max(hindsight_rows, th.fragile_drop_last + 1)),
        "regimes": int(th.regime_flip_periods + 2),
        "drift_window": int(th.drift_window),
    }


@dataclass
class HistorySummary:
    """The summary of one factor's stored history (see the module docstring)."""

    sizes: dict
    frequency: str
    n_rows: int = 0                    # rows of the series, missing returns included
    returns: LagSums = field(default_factory=LagSums)      # finite returns
    last_date: str | None = None       # of the last finite return
    loglik_base: LagSums = field(default_factory=LagSums)
    loglik_window: np.ndarray = field(default_factory=lambda: np.empty(0))
    errors: np.ndarray = field(default_factory=lambda: np.empty(0))
    premium: np.ndarray = field(default_factory=lambda: np.empty(0))
    premium_var: np.ndarray = field(default_factory=lambda: np.empty(0))
    regimes: np.ndarray = field(default_factory=lambda: np.empty((0, 0)))     # (rows, K)
    gap: dict = field(default_factory=lambda: {"longest": 0, "start": None, "total": 0})
    run: dict = field(default_factory=lambda: {"best": 0, "end": -1, "value": None, "cur": 0, "cur_value": None})
    spacing: dict = field(default_factory=dict)           # days between finite dates -> count

    # ------------------------------------------------------------------ building

    @classmethod
    def empty(cls, sizes: dict, frequency: str) -> HistorySummary:
        return cls(sizes=dict(sizes), frequency=frequency)

    def extend(self, dates: np.ndarray, returns: np.ndarray, premium: np.ndarray, premium_var: np.ndarray,
               std_error: np.ndarray, loglik: np.ndarray, regime_filtered: np.ndarray | None) -> None:
        """Append rows (aligned arrays, shape (k,); regimes (k, K)) as they are stored."""
        sz = self.sizes
        returns = np.asarray(returns, dtype=float)
        finite = np.isfinite(returns)
        self.n_rows += returns.size
        vals = returns[finite]
        if self.returns.n == 0:
            self.returns = LagSums.of(vals)        # a whole history: vectorised
        else:
            self.returns.extend(vals)
        self._extend_dates(np.asarray(dates).astype("datetime64[D]")[finite])
        self._extend_runs(vals)
        e = np.asarray(std_error, dtype=float)
        self.errors = _last(self.errors, e[np.isfinite(e)], sz["errors"])
        self._extend_loglik(np.asarray(loglik, dtype=float))
        p = sz["premium"]
        self.premium = _last(self.premium, np.asarray(premium, float), p)
        self.premium_var = _last(self.premium_var, np.asarray(premium_var, float), p)
        if regime_filtered is not None:
            r = np.asarray(regime_filtered, dtype=float)
            ok = np.all(np.isfinite(r), axis=1)
            # rows of another number of regimes (a refit changed it) are not read again
            old = self.regimes if self.regimes.shape[1:] == r.shape[1:] else r[:0]
            self.regimes = _last(old, r[ok], sz["regimes"])

    def _extend_dates(self, d: np.ndarray) -> None:
        if d.size == 0:
            return
        prev = np.datetime64(self.last_date, "D") if self.last_date else None
        if prev is not None and d.size == 1 and self.frequency == "daily":
            self._extend_one_day(prev, d[0])      # the daily update: no array machinery
            return
        seq = np.concatenate([[prev], d]) if prev is not None else d
        if seq.size >= 2:
            if self.frequency == "daily":
                missing = np.busday_count(seq[:-1] + 1, seq[1:])
            else:
                missing = np.diff(wr._period_index(seq, self.frequency)) - 1
            i = int(np.argmax(missing))
            if int(missing[i]) > self.gap["longest"]:
                self.gap["longest"], self.gap["start"] = int(missing[i]), str(seq[i])
            self.gap["total"] += int(missing[missing > 0].sum())
            for k, c in zip(*np.unique(np.diff(seq).astype(np.int64), return_counts=True)):
                self.spacing[str(int(k))] = self.spacing.get(str(int(k)), 0) + int(c)
        self.last_date = str(d[-1])

    def _extend_one_day(self, prev: np.datetime64, day: np.datetime64) -> None:
        missing = int(np.busday_count(prev + 1, day))
        if missing > self.gap["longest"]:
            self.gap["longest"], self.gap["start"] = missing, str(prev)
        if missing > 0:
            self.gap["total"] += missing
        key = str(int((day - prev).astype(np.int64)))
        self.spacing[key] = self.spacing.get(key, 0) + 1
        self.last_date = str(day)

    def _extend_runs(self, vals: np.ndarray) -> None:
        r = self.run
        n0 = self.returns.n - vals.size              # values seen before this block
        for i, v in enumerate(vals.tolist()):
            if r["cur"] > 0 and v == r["cur_value"]:
                r["cur"] += 1
            else:
                r["cur"], r["cur_value"] = 1, v
            if r["cur"] > r["best"]:
                r["best"], r["end"], r["value"] = r["cur"], n0 + i, v

    def _extend_loglik(self, ll: np.ndarray) -> None:
        w = max(self.sizes["drift_window"], 0)
        window = np.concatenate([np.asarray(self.loglik_window, dtype=float), ll[np.isfinite(ll)]])
        cut = max(window.size - w, 0)
        leaving, window = window[:cut], window[cut:]
        if self.loglik_base.n == 0:
            self.loglik_base = LagSums.of(leaving)      # a whole history: vectorised
        else:
            self.loglik_base.extend(leaving)
        self.loglik_window = window

    # ------------------------------------------------------------------ reading

    def mean_test(self) -> sig.MeanTest | None:
        return self.returns.mean_test()

    def drift(self, window: int) -> wr.DriftStatistic | None:
        """:func:`wr.predictive_loglik_drift` of the whole log-likelihood history."""
        w = int(window)
        base = self.loglik_base
        need = max(2 * w, 30)
        if w < 1 or base.n < need:
            return wr.DriftStatistic("too_little_data", "", math.nan, math.nan, math.nan, math.nan,
                                     max(w, 0), base.n)
        recent = np.asarray(self.loglik_window, dtype=float)
        lrv = base.long_run_variance()
        if lrv is None:
            return None
        rm, bm = float(recent.mean()), base.total / base.n
        short = base.values_if_short()
        if short is not None:
            bm = float(short.mean())
        if not lrv > 0:
            return wr.DriftStatistic("too_little_data", "", math.nan, rm, bm, 0.0, w, base.n)
        z = (rm - bm) / math.sqrt(lrv * (1.0 / w + 1.0 / base.n))
        return wr.DriftStatistic("ok", "", z, rm, bm, math.sqrt(lrv), w, base.n)

    def median_spacing(self) -> float | None:
        n = sum(self.spacing.values())
        if n == 0:
            return None
        keys = sorted((int(k), c) for k, c in self.spacing.items())

        def at(rank: int) -> int:
            seen = 0
            for k, c in keys:
                seen += c
                if rank < seen:
                    return k
            return keys[-1][0]

        if n % 2:
            return float(at(n // 2))
        return (at(n // 2 - 1) + at(n // 2)) / 2.0

    def data_quality_warnings(self, th: wr.WarningThresholds) -> list:
        """GAP, REPEATED and FREQ_MISMATCH over the whole history, as the rules build them."""
        out = []
        n_dates = self.returns.n
        if n_dates >= 2:
            if self.frequency == "daily":
                limit, unit = th.gap_business_days, "business days"
            else:
                limit, unit = th.gap_periods, "periods"
            g = self.gap
            if g["longest"] >= limit and g["longest"] > 0:
                out.append(wr._fire("GAP", g["longest"], limit, unit=unit, gap_start=g["start"], total=g["total"]))
        r = self.run
        if r["best"] >= th.repeated_run_length and r["best"] > 1:
            out.append(wr._fire("REPEATED", r["best"], th.repeated_run_length, repeated=float(r["value"]),
                                end=r["end"]))
        if n_dates >= 3:
            median = self.median_spacing()
            expected = wr.FREQUENCY_DAYS[self.frequency]
            ratio = median / expected
            if ratio > th.freq_mismatch_ratio or ratio < 1.0 / th.freq_mismatch_ratio:
                out.append(wr._fire("FREQ_MISMATCH", median, th.freq_mismatch_ratio,
                                    expected=expected, frequency=self.frequency))
        return out

    # ------------------------------------------------------------------ storage

    def to_dict(self) -> dict:
        parts = self._float_parts()
        return {
            "version": VERSION, "sizes": self.sizes, "frequency": self.frequency, "n_rows": self.n_rows,
            "last_date": self.last_date, "gap": self.gap,
            "run": {k: v for k, v in self.run.items() if k not in ("value", "cur_value")},
            "spacing": self.spacing,
            "returns": {"n": self.returns.n, "total": self.returns.total},
            "loglik_base": {"n": self.loglik_base.n, "total": self.loglik_base.total},
            "k": int(self.regimes.shape[1]) if self.regimes.size else 0,
            "lengths": [int(a.size) for a in parts], "floats": pack(np.concatenate(parts)),
        }

    def _float_parts(self) -> list[np.ndarray]:
        """Every float of the summary, in the order of the packed field."""
        r, b = self.returns, self.loglik_base
        run = np.array([_nan(self.run["value"]), _nan(self.run["cur_value"])])
        return [r.cross, r.head, r.tail, b.cross, b.head, b.tail, self.loglik_window, self.errors,
                self.premium, self.premium_var, self.regimes.ravel(), run]

    @classmethod
    def from_dict(cls, d: dict) -> HistorySummary:
        if int(d["version"]) == 1:
            return cls._from_version_1(d)
        parts = _packed_parts(d)
        k = int(d["k"])
        run = dict(d["run"])
        run["value"], run["cur_value"] = _none(float(parts[11][0])), _none(float(parts[11][1]))
        return cls(
            sizes=dict(d["sizes"]), frequency=d["frequency"], n_rows=int(d["n_rows"]),
            returns=LagSums(int(d["returns"]["n"]), float(d["returns"]["total"]), *parts[0:3]),
            last_date=d["last_date"],
            loglik_base=LagSums(int(d["loglik_base"]["n"]), float(d["loglik_base"]["total"]), *parts[3:6]),
            loglik_window=parts[6], errors=parts[7], premium=parts[8], premium_var=parts[9],
            regimes=parts[10].reshape(-1, k) if k else np.empty((0, 0)),
            gap=dict(d["gap"]), run=run, spacing={str(k_): int(v) for k_, v in d["spacing"].items()},
        )

    @classmethod
    def _from_version_1(cls, d: dict) -> HistorySummary:
        """A summary stored before VERSION 2: one packed field per list."""
        k = int(d["regimes"]["k"])
        flat = _floats(d["regimes"]["values"])
        run = dict(d["run"])
        run["value"], run["cur_value"] = (_none(unpack(run[key])[0]) for key in ("value", "cur_value"))
        return cls(
            sizes=dict(d["sizes"]), frequency=d["frequency"], n_rows=int(d["n_rows"]),
            returns=LagSums.from_dict(d["returns"]), last_date=d["last_date"],
            loglik_base=LagSums.from_dict(d["loglik_base"]), loglik_window=_floats(d["loglik_window"]),
            errors=_floats(d["errors"]), premium=_floats(d["premium"]), premium_var=_floats(d["premium_var"]),
            regimes=flat.reshape(-1, k) if k else np.empty((0, 0)),
            gap=dict(d["gap"]), run=run, spacing={str(k_): int(v) for k_, v in d["spacing"].items()},
        )

    def copy(self) -> HistorySummary:
        return HistorySummary.from_dict(self.to_dict())


def summary_of(sizes: dict, frequency: str, dates, returns, premium, premium_var, std_error, loglik,
               regime_filtered) -> HistorySummary:
    """The summary of a whole stored history (aligned arrays, oldest first)."""
    s = HistorySummary.empty(sizes, frequency)
    s.extend(dates, returns, premium, premium_var, std_error, loglik, regime_filtered)
    return s


def _usable(state: dict | None, sizes: dict | None, frequency: str) -> dict | None:
    if not state or sizes is None:
        return None
    d = state.get("history")
    if not d or d.get("version") not in (1, VERSION) or d.get("sizes") != sizes or d.get("frequency") != frequency:
        return None
    return d


def summary_from_state(state: dict | None, sizes: dict | None, frequency: str) -> HistorySummary | None:
    """The stored summary when it was made under the same tail sizes, else None."""
    d = _usable(state, sizes, frequency)
    if d is None:
        return None
    try:
        return HistorySummary.from_dict(d)
    except (KeyError, TypeError, ValueError):
        return None


@dataclass(frozen=True)
class SummaryHead:
    """The part of a stored summary a run needs before its models run: the row count it
    describes and the returns' sums (the set-level mean tests). Reading it leaves the
    other tails unparsed, for the process that advances the factor."""

    n_rows: int
    returns: LagSums


def head_from_state(state: dict | None, sizes: dict | None, frequency: str) -> SummaryHead | None:
    """:func:`summary_from_state`'s head, None when the summary is missing, was made under
    other tail sizes or lacks a field; tails that do not decode (a damaged state, not
    something this program writes) fail where the factor is advanced."""
    d = _usable(state, sizes, frequency)
    if d is None:
        return None
    try:
        if d["version"] == 1:
            for key in ("loglik_base", "loglik_window", "errors", "premium", "premium_var", "regimes", "gap",
                        "run", "spacing", "last_date"):
                d[key]                          # present (their contents are read where used)
            return SummaryHead(int(d["n_rows"]), LagSums.from_dict(d["returns"]))
        for key in ("loglik_base", "k", "gap", "run", "spacing", "last_date"):
            d[key]
        cross, head, tail = _packed_parts(d, first=3)
        return SummaryHead(int(d["n_rows"]), LagSums(int(d["returns"]["n"]), float(d["returns"]["total"]),
                                                     cross, head, tail))
    except (KeyError, TypeError, ValueError):
        return None


def _packed_parts(d: dict, first: int = 12) -> list[np.ndarray]:
    """The first ``first`` of the 12 float arrays of a version-2 summary's packed field,
    in :meth:`HistorySummary._float_parts` order; ValueError when they do not add up.

    Only the base64 characters that hold those arrays are decoded: a run's head reads
    (the returns' sums, 145 of a summary's ~1,200 floats) cost a tenth of the whole."""
    lengths = [int(n) for n in d["lengths"]]
    text = d["floats"]
    n = sum(lengths)
    # base64 keeps 3 bytes in 4 characters: the whole field, or 4-character groups
    # that cover the first arrays' bytes
    if len(lengths) != 12 or len(text) != 4 * -(-8 * n // 3):
        raise ValueError("a history summary's packed floats do not match their 12 lengths")
    need = sum(lengths[:first])
    raw = base64.b64decode(text if first >= 12 else text[:4 * -(-8 * need // 3)])
    flat = np.frombuffer(raw, dtype="<f8", count=need).astype(float)
    ends = np.cumsum(lengths[:first])
    return [flat[e - m:e] for e, m in zip(ends.tolist(), lengths[:first])]


def _last(old: np.ndarray, new: np.ndarray, size: int) -> np.ndarray:
    """The last ``size`` of ``old`` followed by ``new``."""
    return np.concatenate([old, new[-size:]])[-size:] if size > 0 else old[:0]


def _nan(x) -> float:
    return float("nan") if x is None else float(x)


def _none(x: float):
    return None if math.isnan(x) else x


__all__ = ["HistorySummary", "LagSums", "MAX_LAG", "SummaryHead", "head_from_state", "mean_test_with", "pack",
           "sizes_for", "summary_from_state", "summary_of", "unpack"]
