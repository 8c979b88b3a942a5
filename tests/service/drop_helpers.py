"""Drop files for the service tests: written as the inbox expects (atomic rename)."""

from __future__ import annotations


def drop(inbox, name: str, text: str) -> None:
    tmp = inbox / f".{name}.tmp"
    tmp.write_text(text, "utf-8")
    tmp.rename(inbox / name)


def returns_sql(fid: str, dates, values) -> str:
    rows = ",\n".join(f"  ('{fid}', DATE '{d:%Y-%m-%d}', {v:.10f})" for d, v in zip(dates, values))
    return f"INSERT INTO factor_returns VALUES\n{rows};\n"
