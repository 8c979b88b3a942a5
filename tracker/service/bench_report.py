"""The table ``tracker bench`` prints, and its verdict on the issue's targets.

Every verdict is computed from numbers measured in the same run; where a cell needed for
a target was not run, the target says "not measured" (``met`` null) instead of guessing.
A full refit of a borrowed-state cell is a projection (measured per-factor cost of a
sample refit times N) and is named so wherever it is used.
"""

from __future__ import annotations

import math

INCREMENTAL_LIMIT_S = 1.0
INCREMENTAL_SPEEDUP = 100.0
REFIT_SPEEDUP = 5.0
MEMORY_LIMIT_MB = 2048.0
HISTORY_FLAT = 1.5          # incremental cost at the longer history / at the shorter one


def _f(x, spec: str = ".2f") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(x, spec)


def _one_day(cell: dict) -> dict | None:
    inc = [i for i in cell.get("incremental") or [] if i["new_days"] == 1]
    return inc[0] if inc else None


def _refit_basis(cell: dict) -> tuple[float | None, str]:
    if cell.get("full_refit"):
        return cell["full_refit"]["wall_s"], "measured"
    if cell.get("sample_refit"):
        return cell["sample_refit"]["projected_full_refit_s"], (
            f"projected: {cell['sample_refit']['factors']} factors refit x N")
    return None, "not measured"


def print_report(result: dict, echo) -> None:
    cells = [c for c in result["cells"] if "error" not in c]
    for c in result["cells"]:
        if "error" in c:
            echo(f"cell {c.get('factors')} x {c.get('days')}: FAILED {c['error']}")
    echo("")
    echo(f"{'N':>5} {'T':>6} {'state':>8} {'load s':>7} {'refit s':>9} {'s/factor':>9} {'naive s/f':>9} "
         f"{'ratio':>6} {'1-day s':>8} {'advance':>8} {'due':>8} {'5-day s':>8} {'refit/1d':>9} {'RSS MB':>8}")
    for c in cells:
        basis, how = _refit_basis(c)
        one = _one_day(c)
        five = next((i for i in c.get("incremental") or [] if i["new_days"] > 1), None)
        per = c["full_refit"]["per_factor_s"] if c.get("full_refit") else (
            c["sample_refit"]["per_factor_s"] if c.get("sample_refit") else None)
        naive = c["naive"]["per_factor_s"] if c.get("naive") else None
        ratio = naive / per if naive and per else None
        speed = basis / one["end_to_end_s"] if basis and one else None
        rss = product_peak_mb(c)
        echo(f"{c['factors']:>5} {c['days']:>6} {c['state']:>8} {_f(c.get('load_s')):>7} "
             f"{_f(basis, '.1f') + ('*' if how.startswith('projected') else ''):>9} {_f(per):>9} {_f(naive):>9} "
             f"{_f(ratio):>6} {_f(one and one['end_to_end_s'], '.3f'):>8} "
             f"{_f(one and one['advance_end_to_end_s'], '.3f'):>8} {_f(one and one['due_s'], '.3f'):>8} "
             f"{_f(five and five['end_to_end_s'], '.3f'):>8} {_f(speed, '.0f'):>9} {rss:>8.0f}")
    echo("  refit s: the first estimation of the store (every model cold, market, warnings, writes); "
         "* = projected from a sample refit.")
    echo("  1-day s = ingest + advance + due (refits on schedule or after DRIFT); advance = ingest + the "
         "advancing factors only.")
    for c in cells:
        one = _one_day(c)
        if one:
            echo(f"  {c['factors']}x{c['days']} 1-day plans {one['plans']}; ingest {one['ingest_s']:.3f} s; "
                 f"advance phases {_phases(one.get('advance_update'))}; close {one.get('close_s', 0.0):.3f}")
        if c.get("first_exposures"):
            fe = c["first_exposures"]
            how = "in the refit" if fe.get("in_refit") else f"{fe['rows']:,} rows"
            echo(f"  {c['factors']}x{c['days']} with {fe['assets']} assets: first exposures {fe['wall_s']:.1f} s "
                 f"({how}); the daily drops carry their rows (exposures in the phases above)")
        if c.get("naive"):
            nv = c["naive"]
            echo(f"  {c['factors']}x{c['days']} naive ({nv['factors']} factors): UC {nv['uc_s']:.1f} s, "
                 f"Markov {nv['markov_s']:.1f} s; loglik ours-naive (rel. min): regimes "
                 f"{_f(nv['loglik_regimes']['ours_minus_naive_rel_min'], '.2e')}, local level same model "
                 f"{_f(nv['loglik_premium_same_model']['ours_minus_naive_rel_min'], '.2e')}")
        if c.get("full_refit"):
            fr = c["full_refit"]
            cpu = ", ".join(f"{k} {v:.1f}" for k, v in sorted(fr["model_cpu_s"].items()))
            runs = fr.get("repeats_wall_s") or [fr["wall_s"]]
            echo(f"  {c['factors']}x{c['days']} refit runs {', '.join(f'{w:.1f}' for w in runs)} s "
                 f"(the median reported); its phases {_phases(fr)}; model CPU s: {cpu}")
        if c.get("ui"):
            u = c["ui"]
            echo(f"  UI ({u.get('mode')}): load_board {_f(u.get('load_board_s'), '.3f')} s, startup "
                 f"{_f(u.get('startup_s'), '.2f')} s, cursor down {_f(u.get('cursor_down_s'), '.3f')} s, "
                 f"sort {_f(u.get('sort_s'), '.3f')} s{'; ' + u['error'] if u.get('error') else ''}")
    ing = result.get("ingest")
    if ing and "error" not in ing:
        echo(f"ingest: {ing['rows_written']:,} rows ({ing['file_mb']:.1f} MiB) in {ing['seconds']:.1f} s = "
             f"{_f(ing['rows_per_s'], ',.0f')} rows/s ({ing['outcome']})")
    elif ing:
        echo(f"ingest: FAILED {ing['error']}")
    echo("")
    for t in result.get("targets", []):
        mark = {True: "MET   ", False: "MISSED", None: "n/a   "}[t["met"]]
        echo(f"[{mark}] {t['target']}: {t['measured']}")
    echo(f"total {result.get('seconds', 0):.0f} s")


def _build_peak(c: dict) -> float:
    return max(c.get("build_peak_rss_mb") or 0, c.get("build_peak_children_rss_mb") or 0)


def product_peak_mb(c: dict) -> float:
    """Largest process of the product's own work in a cell: the daily updates, sample refit
    and interface, and the build too when it was a real refit (not borrowed state)."""
    peak = max(c.get("peak_rss_mb") or 0, c.get("peak_children_rss_mb") or 0)
    return max(peak, _build_peak(c)) if c.get("state") == "refit" else peak


def _next_days(cell: dict) -> str:
    """The later one-day drops of a cell (the same process, warm), beside the first, which
    is the one judged."""
    later = [i["end_to_end_s"] for i in cell.get("incremental") or [] if i["new_days"] == 1][1:]
    return f"; next day(s) {', '.join(f'{v:.3f}' for v in later)} s" if later else ""


def _phases(u: dict | None) -> str:
    if not u:
        return "-"
    return ", ".join(f"{k} {v:.3f}" for k, v in u.get("phases_s", {}).items())


def targets(result: dict) -> list[dict]:
    cells = [c for c in result["cells"] if "error" not in c]
    out = []
    big = [c for c in cells if c["factors"] >= 500 and _one_day(c)]
    if big:
        txt = "; ".join(f"{c['factors']}x{c['days']}: {_one_day(c)['end_to_end_s']:.3f} s end to end "
                        f"({_one_day(c)['advance_end_to_end_s']:.3f} s for the advancing factors, plans "
                        f"{_one_day(c)['plans']}){_next_days(c)}" for c in big)
        met = all(_one_day(c)["end_to_end_s"] < INCREMENTAL_LIMIT_S for c in big)
    else:
        txt, met = "no cell with 500 factors was run", None
    out.append({"target": "one-day update of 500 factors under 1 s", "measured": txt, "met": met})
    parts, verdicts = [], []
    for c in cells:
        basis, how = _refit_basis(c)
        one = _one_day(c)
        if basis and one:
            r = basis / one["end_to_end_s"]
            ra = basis / one["advance_end_to_end_s"]
            extra = f", {ra:.0f}x for the advancing factors alone" if one.get("due_update") else ""
            parts.append(f"{c['factors']}x{c['days']}: {r:.0f}x ({how}{extra})")
            if c["factors"] >= 500:
                # the target is stated for the 500-factor update; smaller cells are shown
                # (their refit is short, so the update's fixed cost weighs more)
                verdicts.append(r >= INCREMENTAL_SPEEDUP)
    out.append({"target": "incremental at least 100x faster than a full refit (500 factors)",
                "measured": "; ".join(parts) or "no refit measured",
                "met": all(verdicts) if verdicts else None})
    by_n: dict[int, list[dict]] = {}
    for c in cells:
        if _one_day(c):
            by_n.setdefault(c["factors"], []).append(c)
    parts, verdicts = [], []
    for n, cs in sorted(by_n.items()):
        cs = sorted(cs, key=lambda c: c["days"])
        if len(cs) >= 2:
            a, b = _one_day(cs[0])["advance_end_to_end_s"], _one_day(cs[-1])["advance_end_to_end_s"]
            parts.append(f"N={n}: T {cs[0]['days']}->{cs[-1]['days']} x{b / a:.2f}")
            verdicts.append(b / a < HISTORY_FLAT)
        for c in cs:
            inc = sorted(c["incremental"], key=lambda i: i["new_days"])
            if len(inc) >= 2:
                parts.append(f"{n}x{c['days']}: {inc[0]['new_days']}->{inc[-1]['new_days']} days "
                             f"x{inc[-1]['advance_end_to_end_s'] / inc[0]['advance_end_to_end_s']:.2f}")
    out.append({"target": f"incremental cost grows with new rows, not history (T ratio < {HISTORY_FLAT})",
                "measured": "; ".join(parts) or "one history length only",
                "met": all(verdicts) if verdicts else None})
    parts, verdicts = [], []
    for c in cells:
        if c.get("naive") and c.get("full_refit"):
            nv, fr = c["naive"], c["full_refit"]
            r = nv["per_factor_s"] / fr["per_factor_s"]
            worse = nv["loglik_regimes"]["n_worse_than_1e-6"] + nv["loglik_premium_same_model"]["n_worse_than_1e-6"]
            n_runs = len(fr.get("repeats_wall_s") or [fr["wall_s"]])
            text = f"{c['factors']}x{c['days']}: naive/ours {r:.2f}x cold"
            if n_runs > 1:
                text += f" (median of {n_runs} refits)"
            if c.get("warm_refit"):
                # a scheduled refit starts from the parameters in force: reported beside the
                # cold first fit, the verdict stays on the cold one
                text += f", {nv['per_factor_s'] / c['warm_refit']['per_factor_s']:.2f}x scheduled (warm)"
            parts.append(f"{text}, {worse} fits worse than naive by >1e-6")
            verdicts.append(r >= REFIT_SPEEDUP and worse == 0)
    out.append({"target": "full refit at least 5x faster than the naive statsmodels loop, log-likelihoods no worse",
                "measured": "; ".join(parts) or "no refit cell", "met": all(verdicts) if verdicts else None})
    mem = [c for c in cells if c["factors"] >= 500 and c["days"] >= 15000]
    if mem:
        peak = max(product_peak_mb(c) for c in mem)
        what = ("daily updates, sample refit and interface; the full refit was not run, the "
                f"bench's borrowed-state builder peaked at {max(_build_peak(c) for c in mem):.0f} MB"
                if mem[0]["state"] == "borrowed" else "full refit, daily updates and interface")
        out.append({"target": "under 2 GB peak memory for 500 x 15,000",
                    "measured": f"{peak:.0f} MB (largest single process: {what})",
                    "met": peak < MEMORY_LIMIT_MB})
    else:
        out.append({"target": "under 2 GB peak memory for 500 x 15,000", "measured": "cell not run", "met": None})
    return out
