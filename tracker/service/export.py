"""`tracker export`: copies of stored tables as CSV or Parquet files."""

from __future__ import annotations

from pathlib import Path

from tracker.store.connection import Store

# The tables a user may read (documented in README.md). Names are checked against this
# list before they reach DuckDB's relation API, so no SQL text is ever built from input.
EXPORTABLE = (
    "factors", "factor_returns", "assets", "asset_returns", "risk_free", "drop_files",
    "revisions", "model_fits", "premium_estimates", "regime_estimates", "warnings",
    "estimation_runs", "reviews", "exposure_estimates", "truth_premia", "truth_regimes", "truth_exposures",
)
FORMATS = ("csv", "parquet")


class ExportError(Exception):
    pass


def export_tables(store: Store, tables: list[str], out_dir: Path, fmt: str) -> list[Path]:
    """Write each table to ``out_dir/<table>.<fmt>``; return the files written."""
    unknown = [t for t in tables if t not in EXPORTABLE]
    if unknown:
        raise ExportError(f"unknown table {unknown[0]!r}; exportable: {', '.join(EXPORTABLE)}")
    if fmt not in FORMATS:
        raise ExportError(f"unknown format {fmt!r}; use csv or parquet")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ExportError(f"cannot create {out_dir}: {exc.strerror or exc}") from exc
    written = []
    with store.connect() as con:
        for table in tables or list(EXPORTABLE):
            target = out_dir / f"{table}.{fmt}"
            rel = con.table(table)
            if fmt == "csv":
                rel.write_csv(str(target), header=True)
            else:
                rel.write_parquet(str(target))
            written.append(target)
    return written
