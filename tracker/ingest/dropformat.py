"""The drop format: what an upstream job may write into the inbox.

A drop file is a UTF-8 text file named ``*.sql`` holding ``INSERT ... VALUES``
statements (multi-row ``VALUES`` lists welcome) into exactly these five tables and
columns. Without a column list, the values of a row are taken in the order listed
and trailing optional columns (marked ``?``) may be left off; with a column list,
any order is allowed and omitted optional columns take their default::

    factor_returns (factor_id, date, ret)      -- decimal simple excess return for the
                                               --   factor's frequency (0.0123 = 1.23 %)
    asset_returns  (asset_id, date, ret)       -- decimal simple total return
    risk_free      (date, rate, frequency?)    -- decimal simple return over the period
                                               --   ending on date; frequency 'daily'
                                               --   (default) or 'monthly'
    factors        (factor_id, label, description?, frequency,
                    is_traded?, is_new?, start_date?)   -- declarations
    assets         (asset_id, label, description?, frequency, start_date?)

Defaults: description ``''``, is_traded ``TRUE``, is_new ``FALSE``, start_date ``NULL``
(no lower bound), risk_free frequency ``'daily'``. A ``NULL`` in an optional column
means its default; a ``NULL`` in any other column rejects the file. ``description``
may only be left off positionally together with every column after it, so the
shortest positional declaration is ``(id, label, description, frequency)``.

Values
    Strings in single quotes (``''`` inside a string is one quote). Numbers as SQL
    numeric literals (``-0.0042``, ``1e-05``, ``.5``). Dates ISO ``YYYY-MM-DD``,
    written ``DATE '2026-11-03'`` or ``'2026-11-03'``. ``TRUE``/``FALSE``, ``NULL``.
    Constant arithmetic and casts (``0.05/252``, ``CAST('2026-11-03' AS DATE)``,
    ``'0.01'::DOUBLE``) are allowed; they are evaluated inside the sandbox.
    Nothing else: no function calls, no subqueries, no column or table references.
Comments
    ``-- to end of line`` and ``/* block */`` (nested blocks allowed), anywhere.
Declarations
    A factor or asset must be declared (in the store or earlier/later in the same
    file) before its returns are accepted. frequency is ``'daily'`` or ``'monthly'``.
    Ids are 1-64 characters from ``A-Z a-z 0-9 _ . -``, starting with a letter or
    digit; a factor and an asset may not share an id. Re-sending an identical
    declaration is a no-op; changing any attribute of a stored declaration rejects.
Writing files
    Write under a hidden or temporary name (a leading ``.``, or a ``.tmp`` or
    ``.part`` suffix) and rename to ``<name>.sql`` when complete: only ``*.sql``
    files whose name does not start with ``.`` are picked up, so a half-written
    file is never read. An optional UTF-8 byte-order mark is ignored.

Example::

    -- end-of-day returns, 2026-11-03
    INSERT INTO factors (factor_id, label, frequency, start_date) VALUES
      ('CARRY2', 'Carry, second sleeve', 'daily', DATE '2026-01-02');
    INSERT INTO factor_returns VALUES
      ('MKT', DATE '2026-11-03', -0.0042),
      ('CARRY2', DATE '2026-11-03', 0.0011);
    INSERT INTO risk_free (date, rate) VALUES ('2026-11-03', 0.000151);

Outcomes
    Every file gets exactly one: ``applied`` (moved to ``applied/``), ``duplicate``
    (byte-identical to an applied file, same sha256, whatever its name: nothing is
    written; moved to ``applied/``) or ``rejected`` (nothing is written; moved to
    ``rejected/``). Each is a ``drop_files`` row and a ``<name>.receipt.json`` beside the
    file. A rejection names the statement, the line and the rule; the whole file is
    rejected at the first fault:

    ==================== =======================================================
    rule                 when
    ==================== =======================================================
    file_too_large       over ``[ingest] max_file_mb`` MiB; not read at all
    binary               a NUL byte (binary data)
    not_utf8             bytes that are not UTF-8
    empty                no statement: empty, whitespace or comments only (an
                         upstream job with nothing to send should send no file)
    syntax               not parseable (the scanner's or DuckDB's parser message)
    forbidden_statement  any statement that is not an INSERT: DDL, DELETE,
                         UPDATE, COPY, ATTACH, DETACH, PRAGMA, SET, RESET,
                         INSTALL, LOAD, BEGIN/COMMIT/ROLLBACK, CALL, CHECKPOINT,
                         EXPORT, SELECT, WITH ..., VACUUM, USE ...
    forbidden_insert     INSERT ... SELECT, INSERT OR REPLACE/IGNORE, DEFAULT
                         VALUES, BY NAME, ON CONFLICT, RETURNING
    unknown_table        INSERT into any table but the five (the store's own
                         logs, fits, estimates, meta included) or another catalog
    unknown_column       a column the table does not have
    duplicate_column     a column listed twice
    missing_column       a column list without a required column
    row_width            a row with the wrong number of values
    not_constant         a function call, subquery, name or other non-constant
                         inside VALUES (``read_csv(...)``, ``(SELECT ...)``)
    bad_value            a value that does not convert to its column's type
    sandbox_limit        the sandbox's time or memory limit was reached
    internal_error       the file made the program fail; kept, not retried
    ==================== =======================================================

    and the row rules of :mod:`tracker.ingest.validate` (missing_value, bad_id,
    bad_label, bad_frequency, duplicate_key, redeclared, id_clash, unknown_series,
    non_finite, implausible_date, future_date, before_start, return_floor, too_large),
    with its warnings (large_move, weekend_date, not_month_end, two_rows_in_month).

Every file is untrusted code: see :mod:`tracker.ingest.sandbox` for how it is read
and :mod:`tracker.ingest.validate` for the row rules applied before the store is
touched, :mod:`tracker.ingest.inbox` for the inbox folders and crash recovery, and
:mod:`tracker.ingest.apply` for revisions and the change markers.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

FREQUENCIES = ("daily", "monthly")
ID_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}", re.ASCII)
MAX_LABEL = 200
MAX_DESCRIPTION = 2000


@dataclass(frozen=True)
class Column:
    name: str
    sql_type: str          # VARCHAR, DATE, DOUBLE or BOOLEAN
    required: bool
    default: Any = None


@dataclass(frozen=True)
class DropTable:
    """One table of the drop format.

    ``key`` is the store's primary key; ``series_kind`` is the ``revisions.series_kind``
    of a returns table (None for declarations); ``min_positional`` is the fewest values
    a row may give without a column list.
    """

    name: str
    columns: tuple[Column, ...]
    key: tuple[str, ...]
    min_positional: int
    series_kind: str | None = None
    id_column: str | None = None
    value_column: str | None = None

    @property
    def column_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns)

    def column(self, name: str) -> Column:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)


def _c(name: str, sql_type: str, required: bool = True, default: Any = None) -> Column:
    return Column(name, sql_type, required, default)


TABLES: dict[str, DropTable] = {
    t.name: t
    for t in (
        DropTable(
            "factor_returns",
            (_c("factor_id", "VARCHAR"), _c("date", "DATE"), _c("ret", "DOUBLE")),
            key=("factor_id", "date"), min_positional=3,
            series_kind="factor", id_column="factor_id", value_column="ret",
        ),
        DropTable(
            "asset_returns",
            (_c("asset_id", "VARCHAR"), _c("date", "DATE"), _c("ret", "DOUBLE")),
            key=("asset_id", "date"), min_positional=3,
            series_kind="asset", id_column="asset_id", value_column="ret",
        ),
        DropTable(
            "risk_free",
            (_c("date", "DATE"), _c("rate", "DOUBLE"), _c("frequency", "VARCHAR", False, "daily")),
            key=("frequency", "date"), min_positional=2,
            series_kind="risk_free", id_column="frequency", value_column="rate",
        ),
        DropTable(
            "factors",
            (
                _c("factor_id", "VARCHAR"), _c("label", "VARCHAR"),
                _c("description", "VARCHAR", False, ""), _c("frequency", "VARCHAR"),
                _c("is_traded", "BOOLEAN", False, True), _c("is_new", "BOOLEAN", False, False),
                _c("start_date", "DATE", False, None),
            ),
            key=("factor_id",), min_positional=4, id_column="factor_id",
        ),
        DropTable(
            "assets",
            (
                _c("asset_id", "VARCHAR"), _c("label", "VARCHAR"),
                _c("description", "VARCHAR", False, ""), _c("frequency", "VARCHAR"),
                _c("start_date", "DATE", False, None),
            ),
            key=("asset_id",), min_positional=4, id_column="asset_id",
        ),
    )
}

RETURN_TABLES = ("factor_returns", "asset_returns", "risk_free")
DECLARATION_TABLES = ("factors", "assets")
# The declarations table of each returns table's series (risk_free has none).
DECLARED_IN = {"factor_returns": "factors", "asset_returns": "assets"}
