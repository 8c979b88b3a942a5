"""Drop files for the service tests: written as the inbox expects (atomic rename)."""

from __future__ import annotations


def drop(inbox, name: str, text: str) -> None:
    tmp = inbox / f".{name}.tmp"
    tmp.write_text(text, "utf-8")
    tmp.rename(inbox / name)


def returns_sql(fid: str, dates, values) -> str:
    rows = ",\n".join(f"  ('{fid}', DATE '{d:%Y-%m-%d}', {v:.10f})" for d, v in zip(dates, values))
    return f"INSERT INTO factor_returns VALUES\n{rows};\n"


def append_scenario_days(store, days) -> None:
    """Write the demo scenario's held-back rows of ``days`` straight into factor_returns
    (the estimation tests' new day; the ingest has its own tests)."""
    from tracker.seed_db import scenario as sc

    rows = sc.generate().factor_returns
    rows = rows[rows["date"].isin(days)]
    with store.transaction() as con:
        con.register("incoming_frame", rows)
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) SELECT factor_id, date, ret FROM incoming_frame")
        con.unregister("incoming_frame")
