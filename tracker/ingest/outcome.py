"""What processing one drop file produced: frozen results the CLI, service and UI read."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any


@dataclass(frozen=True)
class Rejection:
    """Why a file was rejected: a rule code, plain words, and where in the file.

    ``statement`` and ``line`` are 1-based and None when the rule concerns the whole
    file (size, encoding, emptiness) or the store (a clash with a stored declaration
    found no single line).
    """

    rule: str
    message: str
    statement: int | None = None
    line: int | None = None

    @property
    def reason(self) -> str:
        where = []
        if self.statement is not None:
            where.append(f"statement {self.statement}")
        if self.line is not None:
            where.append(f"line {self.line}")
        prefix = ", ".join(where)
        return f"{prefix + ': ' if prefix else ''}{self.message} (rule: {self.rule})"


@dataclass(frozen=True)
class DropWarning:
    """A row that was applied but looks odd (large move, weekend date, month-end)."""

    code: str
    message: str
    table: str | None = None
    series_id: str | None = None
    date: str | None = None
    value: float | None = None
    threshold: float | None = None
    statement: int | None = None
    line: int | None = None

    def to_dict(self) -> dict[str, Any]:
        return {k: v for k, v in self.__dict__.items() if v is not None}


@dataclass(frozen=True)
class TableCounts:
    """Rows of one table in a file: how many were new, revised or already stored as sent."""

    in_file: int = 0
    inserted: int = 0
    revised: int = 0
    unchanged: int = 0

    @property
    def written(self) -> int:
        return self.inserted + self.revised

    def to_dict(self) -> dict[str, int]:
        return {"in_file": self.in_file, "inserted": self.inserted, "revised": self.revised,
                "unchanged": self.unchanged}


@dataclass(frozen=True)
class SeriesChange:
    """What an applied file changed in one stored series.

    ``series_kind`` is 'factor', 'asset' or 'risk_free' (then ``series_id`` is the
    frequency); ``first_revised`` is the earliest date whose stored value changed,
    from which estimates must be re-derived, None when only new dates were added.
    """

    series_kind: str
    series_id: str
    n_inserted: int
    n_revised: int
    first_date: date
    last_date: date
    first_revised: date | None


@dataclass(frozen=True)
class Outcome:
    """The recorded result of one drop file.

    ``outcome`` is 'applied', 'rejected' or 'duplicate'. ``rows`` holds per-table counts
    for the five drop tables; ``rows_written`` (inserted + revised) is what
    ``drop_files.rows_json`` stores. ``changes`` lists the series an applied file changed;
    ``declared`` the ids it newly declared ('factor:ID' / 'asset:ID');
    ``revision_details`` the first 100 revisions (table, series_id, date, old, new). ``data_version`` is
    the store's change marker after the transaction (see :mod:`tracker.ingest.apply`).
    ``stored_as`` and ``receipt`` are the file's final path in ``applied/`` or
    ``rejected/`` and its receipt beside it. ``recovered`` is True when the outcome was
    committed by a process that died before moving the file, and this pass only
    finished the move: its ``rows`` hold only rows written (as ``inserted``), and
    ``changes`` is empty, so a consumer should re-read the store.
    """

    outcome: str
    file_name: str
    drop_id: int | None
    sha256: str
    size_bytes: int
    received_at: datetime
    reason: str | None = None
    rule: str | None = None
    rows: dict[str, TableCounts] = field(default_factory=dict)
    n_revisions: int = 0
    warnings: tuple[DropWarning, ...] = ()
    n_warnings: int = 0
    changes: tuple[SeriesChange, ...] = ()
    declared: tuple[str, ...] = ()
    duplicate_of: int | None = None
    revision_details: tuple[dict[str, Any], ...] = ()
    data_version: int | None = None
    stored_as: Path | None = None
    receipt: Path | None = None
    recovered: bool = False

    @property
    def rows_written(self) -> dict[str, int]:
        return {t: c.written for t, c in self.rows.items()}

    @property
    def changed_data(self) -> bool:
        return bool(self.changes) or bool(self.declared)

    def summary(self) -> str:
        """One line for the command line and the UI's log."""
        head = f"{self.outcome} {self.file_name}"
        if self.drop_id is not None:
            head += f" (drop {self.drop_id})"
        if self.outcome == "rejected":
            return f"{head}: {self.reason}"
        if self.outcome == "duplicate":
            return f"{head}: identical to drop {self.duplicate_of}, already applied; nothing written"
        parts = [f"{t} {c.written}" for t, c in self.rows.items() if c.in_file]
        text = ", ".join(parts) if parts else "no rows"
        unchanged = sum(c.unchanged for c in self.rows.values())
        return (f"{head}: rows written {text}; {self.n_revisions} revision(s); "
                f"{unchanged} unchanged; {self.n_warnings} warning(s)")
