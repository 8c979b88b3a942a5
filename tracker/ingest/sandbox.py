"""Reading an untrusted drop file into staged rows, without touching the store.

Every drop file is treated as hostile code. It goes through four gates, and the first
one it fails rejects the whole file:

1. bytes: no NUL byte (binary data), valid UTF-8 (a leading byte-order mark is
   dropped), at least one statement (an empty or comment-only file is rejected);
2. the strict scanner (:mod:`tracker.ingest.scanner`): only ``INSERT INTO <drop table>
   [(columns)] VALUES ...`` with constant values; any other statement kind (DDL,
   DELETE, UPDATE, COPY, ATTACH, DETACH, PRAGMA, SET, INSTALL, LOAD, transactions,
   CALL, EXPORT, SELECT, INSERT ... SELECT, other tables ...) is named with DuckDB's
   parser (``duckdb.extract_statements``) and rejected;
3. DuckDB's parser confirms each distinct statement head as an INSERT, and parses
   every row text that is executed;
4. values are produced inside an in-memory DuckDB *sandbox* holding only five
   constraint-free staging tables, opened with ``enable_external_access=false``,
   extension autoload/autoinstall off, community and unsigned extensions off, no
   temporary directory, one thread, a memory limit and ``lock_configuration=true``,
   so nothing executed there can read or write a file (``read_csv``, ``read_text``,
   ``glob``, ``COPY``, ``ATTACH`` fail even inside a VALUES subquery) or loosen
   those settings. A timer interrupts it after a time limit. A process keeps one
   sandbox between files, handed back only by a file read without error and then
   emptied (its staging tables made again); any failure closes it (``_SpareSandbox``).

Plain literal rows (the bulk of any file) are decoded in the sandbox with DuckDB's own
casts over token columns, in one vectorised query per column: the same values that
executing the INSERT would give (the test suite holds the two paths equal), at a
fraction of the cost of DuckDB parsing a million-row VALUES list. Rows with
expressions are executed in the sandbox as rebuilt INSERT statements of at most
:data:`EXEC_CHUNK` rows; a failing chunk is re-run row by row to name the line.

The staged rows come back as numpy arrays for :mod:`tracker.ingest.validate`.
"""

from __future__ import annotations

import re
import threading
from dataclasses import dataclass, field

import duckdb
import numpy as np
import pyarrow as pa

from tracker.ingest.dropformat import TABLES, DropTable
from tracker.ingest.outcome import Rejection
from tracker.ingest.scanner import BATCH_ROWS, LiteralBatch, Scan, ScanError, Statement, literal_row_offsets, scan
from tracker.store.sqlfiles import sql

EXEC_CHUNK = 1000
SANDBOX_MEMORY = "512MB"
SANDBOX_CONFIG = {
    "enable_external_access": False,
    "autoload_known_extensions": False,
    "autoinstall_known_extensions": False,
    "allow_community_extensions": False,
    "allow_unsigned_extensions": False,
    "temp_directory": "",
    "threads": 1,
    "memory_limit": SANDBOX_MEMORY,
    "lock_configuration": True,  # last: nothing after it may loosen the settings
}
_NUMPY_TYPE = {"VARCHAR": object, "DATE": "datetime64[D]", "DOUBLE": np.float64, "BOOLEAN": np.bool_}
_FILLER = {"VARCHAR": None, "DATE": np.datetime64("NaT", "D"), "DOUBLE": np.nan, "BOOLEAN": False}
_LINE_IN_ERROR = re.compile(r"LINE (\d+):")


class Rejected(Exception):
    def __init__(self, rejection: Rejection) -> None:
        super().__init__(rejection.reason)
        self.rejection = rejection


@dataclass
class StagedTable:
    """Rows of one drop table, column by column, with where each came from.

    ``values[c]`` has numpy dtype object (VARCHAR), datetime64[D], float64 or bool;
    ``null[c]`` marks SQL NULLs and columns the statement did not give. ``statement``
    (1-based) and ``row`` (0-based within its statement) locate each row in the file.
    """

    table: DropTable
    values: dict[str, np.ndarray]
    null: dict[str, np.ndarray]
    statement: np.ndarray
    row: np.ndarray

    def __len__(self) -> int:
        return len(self.statement)


@dataclass
class Staged:
    scan: Scan
    tables: dict[str, StagedTable]

    @property
    def n_rows(self) -> int:
        return sum(len(t) for t in self.tables.values())

    def line(self, statement: int, row: int) -> int:
        return self.scan.row_line(int(statement), int(row))

    def lines(self, where: list[tuple[int, int]]) -> list[int]:
        return self.scan.row_lines([(int(s), int(r)) for s, r in where])


@dataclass
class _Pieces:
    values: dict[str, list[np.ndarray]] = field(default_factory=dict)
    null: dict[str, list[np.ndarray]] = field(default_factory=dict)
    statement: list[np.ndarray] = field(default_factory=list)
    row: list[np.ndarray] = field(default_factory=list)


def open_sandbox() -> duckdb.DuckDBPyConnection:
    """A fresh in-memory DuckDB holding only the five staging tables, locked down."""
    con = duckdb.connect(":memory:", config=dict(SANDBOX_CONFIG))
    con.execute(sql("ingest.sandbox_schema")).fetchall()
    return con


class _SpareSandbox:
    """One sandbox a process keeps between drop files: opening an in-memory DuckDB costs
    ~0.03-0.04 s and closing it ~0.01 s, a fifth of a daily file's ingest.

    A sandbox is handed back only by a file that was read without any error, and its five
    staging tables are then dropped and made again, so the next file starts from empty
    tables under the same locked settings (a drop file can only INSERT into them: the
    scanner admits nothing else). A file that failed in any way -- a rejection, the time
    limit, memory -- closes its sandbox, and the next file opens a fresh one. Files read
    at the same time (threads) each get their own.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._con: duckdb.DuckDBPyConnection | None = None

    def take(self) -> duckdb.DuckDBPyConnection:
        with self._lock:
            con, self._con = self._con, None
        return con if con is not None else open_sandbox()

    def give_back(self, con: duckdb.DuckDBPyConnection) -> None:
        try:
            con.execute(_RESET).fetchall()
        except duckdb.Error:
            con.close()
            return
        with self._lock:
            con, self._con = self._con, con
        if con is not None:
            con.close()


_RESET = ("DROP TABLE factor_returns; DROP TABLE asset_returns; DROP TABLE risk_free; "
          "DROP TABLE factors; DROP TABLE assets;\n") + sql("ingest.sandbox_schema")
_SPARE = _SpareSandbox()


def decode_text(data: bytes) -> str:
    """The file's text, or :class:`Rejected` for binary data or bytes that are not UTF-8."""
    nul = data.find(b"\0")
    if nul >= 0:
        raise Rejected(Rejection("binary", f"binary data, not SQL text (a NUL byte at offset {nul})",
                                 line=data.count(b"\n", 0, nul) + 1))
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise Rejected(Rejection(
            "not_utf8", f"not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start} cannot be decoded)",
            line=data.count(b"\n", 0, exc.start) + 1)) from None
    return text[1:] if text.startswith("\ufeff") else text


def parse_drop(data: bytes, *, time_limit_s: float = 120.0) -> Staged:
    """Read a drop file's bytes into staged rows, or raise :class:`Rejected`."""
    text = decode_text(data)
    con = _SPARE.take()
    timer = threading.Timer(time_limit_s, con.interrupt)
    timer.daemon = True
    timer.start()
    clean = False
    try:
        staged = _parse(con, text)
        clean = True
        return staged
    except duckdb.InterruptException:
        raise Rejected(Rejection("sandbox_limit", f"reading the file took more than {time_limit_s:g} s")) from None
    except duckdb.OutOfMemoryException:
        raise Rejected(Rejection("sandbox_limit", f"the values need more than the sandbox's {SANDBOX_MEMORY}")) from None
    finally:
        timer.cancel()
        if clean:
            _SPARE.give_back(con)
        else:
            con.close()


def _parse(con: duckdb.DuckDBPyConnection, text: str) -> Staged:
    pieces: dict[str, _Pieces] = {}
    checked_heads: set[tuple[str, int]] = set()
    # Bulk rows wait here per column list until there are enough for one decoding query,
    # so a file of many small statements costs a few queries, not three per statement.
    pending: dict[tuple[str, tuple[str, ...]], list[tuple[Statement, LiteralBatch, list]]] = {}
    counts: dict[tuple[str, tuple[str, ...]], int] = {}

    def flush(key) -> None:
        segments = pending.pop(key, [])
        counts.pop(key, None)
        if segments:
            _decode_segments(con, text, segments, pieces.setdefault(key[0], _Pieces()))

    def sink(st: Statement, batch: LiteralBatch) -> None:
        _check_head(con, st, checked_heads)
        key = (st.table.name, st.columns)
        pending.setdefault(key, []).append((st, batch, batch.rows))
        counts[key] = counts.get(key, 0) + batch.n_rows
        if counts[key] >= BATCH_ROWS:
            flush(key)

    try:
        sc = scan(text, sink)
    except ScanError as exc:
        raise Rejected(_name_scan_error(con, exc)) from None
    for key in list(pending):
        flush(key)
    if not sc.statements:
        raise Rejected(Rejection("empty", "the file holds no statements (it is empty or only comments); "
                                 "an upstream job that has nothing to send should send no file"))
    for st in sc.statements:
        _check_head(con, st, checked_heads)
        if st.expr_rows:
            _execute_rows(con, text, sc, st, pieces.setdefault(st.table.name, _Pieces()))
    return Staged(sc, {name: _assemble(TABLES[name], p) for name, p in pieces.items()})


def _name_scan_error(con, exc: ScanError) -> Rejection:
    """Turn a scanner fault into a rejection, letting DuckDB's parser name the statement."""
    if exc.fragment is None:
        return Rejection(exc.rule, exc.message, exc.statement, exc.line)
    try:
        parsed = con.extract_statements(exc.fragment)
    except duckdb.Error as err:
        return Rejection("syntax", _parser_message(err), exc.statement, _error_line(err, exc.line))
    if not parsed:
        return Rejection(exc.rule, exc.message, exc.statement, exc.line)
    kind = parsed[0].type.name
    first = exc.fragment.split(None, 1)[0].upper() if exc.fragment.split() else kind
    if exc.rule == "forbidden_statement":
        message = (f"{first} statements are not allowed (DuckDB's parser: statement type {kind}); "
                   "a drop file may hold only INSERT ... VALUES into " + ", ".join(TABLES))
    else:
        message = exc.message
    return Rejection(exc.rule, message, exc.statement, exc.line)


def _parser_message(err: Exception) -> str:
    first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    return first.replace("Parser Error: ", "").strip() + " (DuckDB's parser)"


def _error_line(err: Exception, base: int | None) -> int | None:
    m = _LINE_IN_ERROR.search(str(err))
    if m is None or base is None:
        return base
    return base + int(m.group(1)) - 1


def _check_head(con, st: Statement, checked: set[tuple[str, int]]) -> None:
    """Ask DuckDB's parser (the sandbox's: the module-level parser opens DuckDB's default
    in-memory database on first use, ~0.04 s) whether the statement head, with one row of
    NULLs, is an INSERT."""
    key = (st.header, len(st.columns))
    if key in checked:
        return
    probe = st.header + " (" + ", ".join(["NULL"] * len(st.columns)) + ")"
    try:
        parsed = con.extract_statements(probe)
    except duckdb.Error as err:
        raise Rejected(Rejection("syntax", _parser_message(err), st.number, st.line)) from None
    if len(parsed) != 1 or parsed[0].type != duckdb.StatementType.INSERT:
        raise Rejected(Rejection("forbidden_insert", "DuckDB does not read this statement head as a "
                                 "plain INSERT", st.number, st.line))
    checked.add(key)


def _decode_segments(con, text: str, segments: list, out: _Pieces) -> None:
    """Decode bulk rows of one column list (from one or more statements) in one query per column."""
    st0 = segments[0][0]
    table, columns = st0.table, st0.columns
    rows = segments[0][2] if len(segments) == 1 else [r for seg in segments for r in seg[2]]
    struct = pa.array(rows, type=pa.struct([(f"c{k}", pa.string()) for k in range(2 * len(columns))]))
    parts = struct.flatten()
    decoded: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for j, name in enumerate(columns):
        col = table.column(name)
        con.register("cells", pa.table({"q": parts[2 * j], "b": parts[2 * j + 1]}))
        try:
            res = con.execute(sql(f"ingest.sandbox_decode_{col.sql_type.lower()}")).fetchnumpy()
        finally:
            con.unregister("cells")
        ok = np.asarray(res["ok"], dtype=bool)
        if not ok.all():
            k = int(np.argmin(ok))
            raw = rows[k][2 * j] if rows[k][2 * j + 1] == "" else rows[k][2 * j + 1]
            for st, batch, seg_rows in segments:
                if k < len(seg_rows):
                    break
                k -= len(seg_rows)
            raise Rejected(Rejection("bad_value", f"{name} value {raw[:60]!r} is not a valid {col.sql_type}",
                                     st.number, _batch_row_line(text, st, batch, k)))
        decoded[name] = _split_masked(res["v"], col.sql_type)
    statements = np.concatenate([np.full(b.n_rows, st.number, dtype=np.int32) for st, b, _ in segments])
    positions = np.concatenate([np.arange(b.first_row, b.first_row + b.n_rows) for _, b, _ in segments])
    _add(out, table, decoded, statements, positions)


def _batch_row_line(text: str, st: Statement, batch: LiteralBatch, k: int) -> int:
    return text.count("\n", 0, literal_row_offsets(text, st, batch, [k])[0]) + 1


def _split_masked(v, sql_type: str) -> tuple[np.ndarray, np.ndarray]:
    mask = np.ma.getmaskarray(v)
    data = np.ma.getdata(v)
    if sql_type == "DATE":
        data = data.astype("datetime64[D]")
    elif sql_type == "VARCHAR":
        data = data.astype(object)
    elif sql_type == "BOOLEAN":
        data = data.astype(bool)
    else:
        data = data.astype(np.float64)
    return data, mask


def _add(out: _Pieces, table: DropTable, decoded: dict[str, tuple[np.ndarray, np.ndarray]],
         statement: int | np.ndarray, rows: np.ndarray) -> None:
    n = len(rows)
    for col in table.columns:
        if col.name in decoded:
            data, mask = decoded[col.name]
        else:
            data = np.full(n, _FILLER[col.sql_type], dtype=_NUMPY_TYPE[col.sql_type])
            mask = np.ones(n, dtype=bool)
        out.values.setdefault(col.name, []).append(data)
        out.null.setdefault(col.name, []).append(mask)
    out.statement.append(np.broadcast_to(np.asarray(statement, dtype=np.int32), (n,)).copy())
    out.row.append(rows.astype(np.int64))


def _execute_rows(con, text: str, sc: Scan, st: Statement, out: _Pieces) -> None:
    """Execute the rows with expressions in the sandbox, in chunks, and stage what they give."""
    table, cols = st.table.name, ", ".join(st.columns)
    head = sql("ingest.sandbox_insert_head").format(table=table, columns=cols)
    fetch = sql("ingest.sandbox_staged").format(table=table, columns=cols)
    clear = sql("ingest.sandbox_clear").format(table=table)
    rows = st.expr_rows
    for k in range(0, len(rows), EXEC_CHUNK):
        chunk = rows[k:k + EXEC_CHUNK]
        try:
            _execute_text(con, head + "\n" + ",\n".join(text[r.start:r.end] for r in chunk))
        except duckdb.Error as err:
            con.execute(clear).fetchall()
            _pinpoint(con, text, head, clear, st, chunk, err)
        try:
            res = con.execute(fetch).fetchnumpy()
        except duckdb.Error as err:
            # a value DuckDB stores but cannot hand over, e.g. a date whose year has seven
            # digits (beyond what a microsecond timestamp holds)
            con.execute(clear).fetchall()
            text_err = str(err).splitlines()[0] if str(err) else type(err).__name__
            raise Rejected(Rejection("bad_value", f"a value cannot be read ({text_err})",
                                     st.number, chunk[0].line)) from None
        con.execute(clear).fetchall()
        if len(next(iter(res.values()))) != len(chunk):
            raise Rejected(Rejection("sandbox_error", "the sandbox staged a different number of rows than "
                                     "the statement holds", st.number, chunk[0].line))
        decoded = {c: _split_masked(res[c], st.table.column(c).sql_type) for c in st.columns}
        for c in st.columns:
            if st.table.column(c).sql_type == "DATE":
                data, mask = decoded[c]
                years = data.astype("datetime64[Y]").astype(np.int64) + 1970
                bad = ~mask & ((years < 1) | (years > 9999))
                if bad.any():
                    k = int(np.argmax(bad))
                    raise Rejected(Rejection("bad_value", f"{c} value {str(data[k])!r} is not a valid DATE "
                                             "(years 1 to 9999)", st.number, chunk[k].line))
        _add(out, st.table, decoded, st.number, np.array([r.row for r in chunk]))


def _execute_text(con, statement_text: str) -> None:
    parsed = con.extract_statements(statement_text)
    if len(parsed) != 1 or parsed[0].type != duckdb.StatementType.INSERT:
        raise duckdb.ParserException("a row does not parse as part of one INSERT statement")
    con.execute(parsed[0]).fetchall()


def _pinpoint(con, text, head, clear, st: Statement, chunk, err: Exception) -> None:
    """Re-run a failed chunk row by row so the rejection names the line."""
    if isinstance(err, (duckdb.InterruptException, duckdb.OutOfMemoryException)):
        raise err
    for r in chunk:
        try:
            _execute_text(con, head + "\n" + text[r.start:r.end])
        except duckdb.Error as row_err:
            if isinstance(row_err, (duckdb.InterruptException, duckdb.OutOfMemoryException)):
                raise
            rule = "syntax" if isinstance(row_err, duckdb.ParserException) else "bad_value"
            raise Rejected(Rejection(rule, _parser_message(row_err).replace(" (DuckDB's parser)", "")
                                     + " (DuckDB, evaluating the row in the sandbox)", st.number, r.line)) from None
        finally:
            con.execute(clear).fetchall()
    raise Rejected(Rejection("bad_value", _parser_message(err), st.number, chunk[0].line))


def _assemble(table: DropTable, p: _Pieces) -> StagedTable:
    def cat(parts: list[np.ndarray], dtype) -> np.ndarray:
        return np.concatenate(parts) if parts else np.empty(0, dtype=dtype)

    values = {c.name: cat(p.values.get(c.name, []), _NUMPY_TYPE[c.sql_type]) for c in table.columns}
    null = {c.name: cat(p.null.get(c.name, []), bool) for c in table.columns}
    return StagedTable(table, values, null, cat(p.statement, np.int32), cat(p.row, np.int64))
