"""Strict reading of a drop file's text, before anything is executed.

The scanner accepts only the grammar of :mod:`tracker.ingest.dropformat`::

    file      := gap (statement? gap ';' gap)* statement? gap
    statement := INSERT INTO [main.]table ['(' column (',' column)* ')'] VALUES row (',' row)*
    row       := '(' value (',' value)* ')'

and stops at the first statement that is anything else, naming it. Rows are read two
ways. Plain literal rows (a quoted string, a number, ``DATE '...'``, TRUE, FALSE or
NULL, each of the kind its column expects) are matched in bulk by one compiled
pattern per column list and handed over as token columns, decoded later by the
sandbox with DuckDB's own casts. Any other row is tokenized: it may hold only
literals, ``+ - * /``, parentheses, ``::`` and ``CAST(... AS type)`` with the
type names in :data:`VALUE_WORDS`, so it is a constant expression; its text is
executed in the sandbox. Everything here is pure Python: nothing in this module runs
SQL.

The bulk pattern is possessive throughout (``*+``, ``++``), so it has exactly one
way to read a text: a comment can never be cut short to let a row appear inside it.
"""

from __future__ import annotations

import re
from bisect import bisect_right
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import lru_cache

from tracker.ingest.dropformat import TABLES, DropTable

BATCH_ROWS = 100_000       # rows per bulk match: bounds the memory of one token batch
_FLAGS = re.IGNORECASE | re.ASCII

# Words allowed inside a row that is not plain literals: constants and casts only.
VALUE_WORDS = frozenset(
    "null true false date cast as double float real decimal numeric integer int bigint "
    "smallint varchar text boolean bool".split()
)

_GAP = r"(?:[ \t\n\r\f\v]++|--[^\n\r]*+)*+"
_STR = "'([^']*+(?:''[^']*+)*+)'"
_END = r"(?![A-Za-z0-9_$.])"
_NUMBER = r"[-+]?(?:\d++(?:\.\d*+)?|\.\d++)(?:[eE][-+]?\d++)?+"
_CELL = {
    "VARCHAR": rf"(?:{_STR}|(NULL){_END})",
    "DATE": rf"(?:(?:DATE{_GAP})?{_STR}|(NULL){_END})",
    "DOUBLE": rf"(?:{_STR}|({_NUMBER}|NULL){_END})",
    "BOOLEAN": rf"(?:{_STR}|(TRUE|FALSE|NULL){_END})",
}

_TOKEN = re.compile(
    r"""
    (?P<ws>[ \t\n\r\f\v]+)
  | (?P<lc>--[^\n\r]*)
  | (?P<bc>/\*)
  | (?P<str>'[^']*(?:''[^']*)*')
  | (?P<qid>"[^"]*(?:""[^"]*)*")
  | (?P<num>(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?)
  | (?P<word>[A-Za-z_][A-Za-z0-9_$]*)
  | (?P<cast>::)
  | (?P<punct>[(),;+\-*/.])
    """,
    re.VERBOSE | re.ASCII,
)
_COMMENT_EDGE = re.compile(r"/\*|\*/")
_LEAD = re.compile(rf"(?:{_GAP},)?{_GAP}", _FLAGS)


class ScanError(Exception):
    """The first place where the text leaves the drop format.

    ``fragment`` is the offending statement's text when the rule is about what kind
    of statement it is, so the sandbox can ask DuckDB's parser to name it.
    """

    def __init__(self, rule: str, message: str, statement: int | None, line: int | None,
                 fragment: str | None = None) -> None:
        super().__init__(message)
        self.rule = rule
        self.message = message
        self.statement = statement
        self.line = line
        self.fragment = fragment


@dataclass
class LiteralBatch:
    """Plain rows read in bulk.

    ``rows[i]`` holds, for each column j, the pair ``(quoted body, bare token)`` at
    positions ``2j`` and ``2j + 1``: the text between the quotes (``''`` not yet
    collapsed) and '' when the value was quoted, else NULL, TRUE, FALSE or a number.
    The sink that decodes a batch may drop ``rows`` afterwards (set it to None).
    """

    first_row: int
    start: int                        # text offset where the batch's first row starts
    n_rows: int
    rows: list[tuple[str, ...]] | None


@dataclass
class ExprRow:
    row: int
    start: int
    end: int
    line: int


@dataclass
class Statement:
    """One accepted INSERT: its target, the columns its rows give, and its rows."""

    number: int
    line: int
    start: int
    table: DropTable
    columns: tuple[str, ...]
    header: str                       # the text from INSERT to VALUES, for DuckDB's check
    batches: list[LiteralBatch] = field(default_factory=list)
    expr_rows: list[ExprRow] = field(default_factory=list)
    n_rows: int = 0


@dataclass
class Scan:
    text: str
    statements: list[Statement]
    _newlines: list[int] | None = None

    @property
    def n_rows(self) -> int:
        return sum(s.n_rows for s in self.statements)

    def line_at(self, pos: int) -> int:
        if self._newlines is None:
            self._newlines = [m.start() for m in re.finditer("\n", self.text)]
        return bisect_right(self._newlines, pos - 1) + 1

    def row_line(self, statement: int, row: int) -> int:
        """The line where row ``row`` (0-based) of statement ``statement`` (1-based) starts."""
        return self.row_lines([(statement, row)])[0]

    def row_lines(self, where: list[tuple[int, int]]) -> list[int]:
        """Lines of many (statement, row) pairs, re-reading each bulk batch at most once."""
        found: dict[tuple[int, int], int] = {}
        wanted: dict[tuple[int, int], list[int]] = {}
        for statement, row in where:
            st = self.statements[statement - 1]
            expr = next((er for er in st.expr_rows if er.row == row), None)
            if expr is not None:
                found[(statement, row)] = expr.line
                continue
            for bi, b in enumerate(st.batches):
                if b.first_row <= row < b.first_row + b.n_rows:
                    wanted.setdefault((statement, bi), []).append(row - b.first_row)
                    break
            else:
                found[(statement, row)] = st.line
        for (statement, bi), ks in wanted.items():
            st = self.statements[statement - 1]
            b = st.batches[bi]
            for k, offset in zip(ks, literal_row_offsets(self.text, st, b, ks)):
                found[(statement, b.first_row + k)] = self.line_at(offset)
        return [found[(s, r)] for s, r in where]


def literal_row_offsets(text: str, st: Statement, batch: LiteralBatch, ks: list[int]) -> list[int]:
    """Text offsets of rows ``ks`` of a bulk batch (rows are not kept, so they are re-read)."""
    pick = _patterns(st.table.name, st.columns)[1]
    targets = sorted(set(ks))
    at: dict[int, int] = {}
    t = 0
    for i, m in enumerate(pick.finditer(text, batch.start)):
        if i == targets[t]:
            at[i] = _LEAD.match(text, m.start()).end()
            t += 1
            if t == len(targets):
                break
    return [at.get(k, batch.start) for k in ks]


@lru_cache(maxsize=64)
def _patterns(table: str, columns: tuple[str, ...]) -> tuple[re.Pattern, re.Pattern]:
    """(run, pick) for one column list: ``run`` matches up to BATCH_ROWS plain rows,
    ``pick`` extracts the cells of one row (with its leading comma)."""
    t = TABLES[table]
    cells = [_CELL[t.column(c).sql_type] for c in columns]
    sep = f"{_GAP},{_GAP}"
    row = rf"\({_GAP}" + sep.join(cells) + rf"{_GAP}\)"
    plain = re.sub(r"\((?!\?)", "(?:", row.replace(r"\(", "\0").replace(r"\)", "\1"))
    plain = plain.replace("\0", r"\(").replace("\1", r"\)")
    run = re.compile(rf"{plain}(?:{sep}{plain}){{0,{BATCH_ROWS - 1}}}+", _FLAGS)
    pick = re.compile(rf"(?:{_GAP},)?{_GAP}{row}", _FLAGS)
    return run, pick


class _Reader:
    def __init__(self, text: str) -> None:
        self.text = text
        self.n = len(text)
        self._nl_pos = 0
        self._nl_line = 1

    def line(self, pos: int) -> int:
        if pos < self._nl_pos:
            self._nl_pos, self._nl_line = 0, 1
        self._nl_line += self.text.count("\n", self._nl_pos, pos)
        self._nl_pos = pos
        return self._nl_line

    def token(self, pos: int, statement: int | None) -> tuple[str, int, int]:
        """(kind, start, end) of the token at ``pos``; kind '' at the end of the text."""
        if pos >= self.n:
            return "", pos, pos
        m = _TOKEN.match(self.text, pos)
        if m is None:
            ch = self.text[pos]
            if ch in "'\"":
                raise ScanError("syntax", f"unterminated {'string' if ch == chr(39) else 'quoted name'}",
                                statement, self.line(pos))
            raise ScanError("syntax", f"unexpected character {ch!r}", statement, self.line(pos))
        kind = m.lastgroup
        if kind == "bc":
            return "bc", pos, self._block_comment_end(pos, statement)
        return kind, pos, m.end()

    def _block_comment_end(self, pos: int, statement: int | None) -> int:
        depth, i = 1, pos + 2
        while depth:
            m = _COMMENT_EDGE.search(self.text, i)
            if m is None:
                raise ScanError("syntax", "unterminated /* comment", statement, self.line(pos))
            depth += 1 if m.group(0) == "/*" else -1
            i = m.end()
        return i

    def skip_gap(self, pos: int, statement: int | None) -> int:
        while True:
            kind, start, end = self.token(pos, statement)
            if kind not in ("ws", "lc", "bc"):
                return start
            pos = end

    def significant(self, pos: int, statement: int | None) -> tuple[str, int, int]:
        return self.token(self.skip_gap(pos, statement), statement)

    def word(self, start: int, end: int) -> str:
        return self.text[start:end].lower()

    def statement_end(self, pos: int) -> int:
        """Offset of the next top-level ';' (or the end), skipping strings and comments."""
        while pos < self.n:
            try:
                kind, start, end = self.token(pos, None)
            except ScanError:
                pos += 1
                continue
            if kind == "punct" and self.text[start] == ";":
                return start
            pos = end
        return self.n


BatchSink = Callable[[Statement, LiteralBatch], None]


def scan(text: str, sink: BatchSink | None = None) -> Scan:
    """Read ``text`` into accepted statements, or raise :class:`ScanError` at the first fault.

    ``sink(statement, batch)`` is called with each bulk batch as soon as it is read, so
    a large file is decoded piecewise instead of holding every token at once.
    """
    r = _Reader(text)
    statements: list[Statement] = []
    pos = 0
    while True:
        kind, start, end = r.significant(pos, None)
        if kind == "":
            break
        if kind == "punct" and text[start] == ";":
            pos = end
            continue
        number = len(statements) + 1
        st, pos = _statement(r, start, number, sink)
        statements.append(st)
    return Scan(text, statements)


def _identifier(r: _Reader, kind: str, start: int, end: int) -> str | None:
    if kind == "word":
        return r.word(start, end)
    if kind == "qid":
        return r.text[start + 1:end - 1].replace('""', '"').lower()
    return None


def _statement(r: _Reader, start: int, number: int, sink: BatchSink | None) -> tuple[Statement, int]:
    text = r.text
    line = r.line(start)

    def fail(rule: str, message: str, at: int | None = None, fragment: bool = False) -> ScanError:
        frag = text[start:r.statement_end(start)] if fragment else None
        return ScanError(rule, message, number, r.line(at if at is not None else start), frag)

    kind, s, e = r.token(start, number)
    if kind != "word" or r.word(s, e) != "insert":
        raise fail("forbidden_statement", "only INSERT ... VALUES statements are allowed", fragment=True)
    kind, s, e = r.significant(e, number)
    if kind != "word" or r.word(s, e) != "into":
        raise fail("forbidden_insert", "only plain INSERT INTO ... VALUES is allowed "
                   f"(found {text[s:e]!r} after INSERT)", s, fragment=True)
    kind, s, e = r.significant(e, number)
    name = _identifier(r, kind, s, e)
    k2, s2, e2 = r.significant(e, number)
    if name is not None and k2 == "punct" and text[s2] == ".":
        k3, s3, e3 = r.significant(e2, number)
        inner = _identifier(r, k3, s3, e3)
        if name != "main" or inner is None:
            raise fail("unknown_table", f"table {text[s:e3]!r} is not a drop table; allowed: "
                       + ", ".join(TABLES), s)
        name, e = inner, e3
    if name not in TABLES:
        shown = text[s:e] if kind else "end of file"
        raise fail("unknown_table", f"INSERT into {shown!r} is not allowed; the drop tables are "
                   + ", ".join(TABLES), s)
    table = TABLES[name]
    kind, s, e = r.significant(e, number)
    columns: tuple[str, ...] | None = None
    if kind == "punct" and text[s] == "(":
        columns, e = _column_list(r, table, e, number)
        kind, s, e = r.significant(e, number)
    if kind != "word" or r.word(s, e) != "values":
        found = text[s:e] if kind else "end of file"
        raise fail("forbidden_insert", f"only INSERT ... VALUES is allowed (found {found!r} where "
                   "VALUES belongs; INSERT ... SELECT, DEFAULT VALUES and BY NAME are not allowed)",
                   s, fragment=True)
    header = text[start:e]
    pos = r.skip_gap(e, number)
    if columns is None:
        width = _row_width(r, pos, number)
        if not table.min_positional <= width <= len(table.columns):
            raise fail("row_width", f"a row of {table.name} without a column list must give "
                       f"{_width_text(table)} values, this one gives {width}", pos)
        columns = table.column_names[:width]
    st = Statement(number, line, start, table, columns, header)
    pos = _rows(r, st, pos, sink)
    return st, pos


def _width_text(table: DropTable) -> str:
    lo, hi = table.min_positional, len(table.columns)
    return str(lo) if lo == hi else f"{lo} to {hi}"


def _column_list(r: _Reader, table: DropTable, pos: int, number: int) -> tuple[tuple[str, ...], int]:
    cols: list[str] = []
    while True:
        kind, s, e = r.significant(pos, number)
        name = _identifier(r, kind, s, e)
        if name in ("select", "with", "values", "from"):
            raise ScanError("forbidden_insert", "INSERT ... SELECT is not allowed", number, r.line(s))
        if name is None:
            raise ScanError("syntax", f"expected a column name, found {r.text[s:e] or 'end of file'!r}",
                            number, r.line(s))
        if name not in table.column_names:
            raise ScanError("unknown_column", f"{table.name} has no column {r.text[s:e]!r}; its columns are "
                            + ", ".join(table.column_names), number, r.line(s))
        if name in cols:
            raise ScanError("duplicate_column", f"column {name} is listed twice", number, r.line(s))
        cols.append(name)
        kind, s, e = r.significant(e, number)
        if kind == "punct" and r.text[s] == ",":
            pos = e
            continue
        if kind == "punct" and r.text[s] == ")":
            break
        raise ScanError("syntax", f"expected ',' or ')' in the column list, found {r.text[s:e] or 'end of file'!r}",
                        number, r.line(s))
    missing = [c.name for c in table.columns if c.required and c.name not in cols]
    if missing:
        raise ScanError("missing_column", f"the column list of {table.name} lacks required column(s) "
                        + ", ".join(missing), number, r.line(pos))
    return tuple(cols), e


def _row_width(r: _Reader, pos: int, number: int) -> int:
    return _expr_row(r, pos, number)[1]


def _expr_row(r: _Reader, pos: int, number: int) -> tuple[int, int]:
    """Tokenize one row starting at '(' under the constant-expression rules.

    Returns (end offset, number of top-level values). Whether the expressions are
    well formed is left to DuckDB's parser in the sandbox; this only screens tokens.
    """
    text = r.text
    kind, s, e = r.token(pos, number)
    if kind != "punct" or text[s] != "(":
        found = text[s:e] if kind else "end of file"
        raise ScanError("syntax", f"expected '(' to start a row, found {found!r}", number, r.line(s))
    depth, width, pos = 1, 1, e
    while depth:
        kind, s, e = r.token(pos, number)
        if kind == "" or (kind == "punct" and text[s] == ";"):
            raise ScanError("syntax", "a row is not closed with ')'", number, r.line(s))
        if kind == "punct":
            ch = text[s]
            if ch == "(":
                depth += 1
            elif ch == ")":
                depth -= 1
            elif ch == "," and depth == 1:
                width += 1
            elif ch == ".":
                raise ScanError("not_constant", "VALUES may hold only constants; found a '.' name",
                                number, r.line(s))
        elif kind == "word":
            w = r.word(s, e)
            if w not in VALUE_WORDS:
                what = "a subquery" if w in ("select", "from", "with", "table", "values") else repr(text[s:e])
                raise ScanError("not_constant", f"VALUES may hold only constants and casts; found {what}",
                                number, r.line(s))
        elif kind == "qid":
            raise ScanError("not_constant", f"VALUES may hold only constants; found the name {text[s:e]}",
                            number, r.line(s))
        pos = e
    return pos, width


def _rows(r: _Reader, st: Statement, pos: int, sink: BatchSink | None) -> int:
    text = r.text
    run, pick = _patterns(st.table.name, st.columns)
    width = len(st.columns)
    while True:
        m = run.match(text, pos)
        if m is not None:
            end = m.end()
            found = pick.findall(text, pos, end)
            batch = LiteralBatch(st.n_rows, pos, len(found), found)
            st.batches.append(batch)
            if sink is not None:
                sink(st, batch)
                batch.rows = None
            st.n_rows += batch.n_rows
            pos = end
        else:
            end, w = _expr_row(r, pos, st.number)
            if w != width:
                raise ScanError("row_width", f"a row gives {w} values where {width} ({', '.join(st.columns)}) "
                                "are expected", st.number, r.line(pos))
            st.expr_rows.append(ExprRow(st.n_rows, pos, end, r.line(pos)))
            st.n_rows += 1
            pos = end
        kind, s, e = r.significant(pos, st.number)
        if kind == "punct" and text[s] == ",":
            kind2, s2, _ = r.significant(e, st.number)
            pos = s2
            continue
        if kind == "" or (kind == "punct" and text[s] == ";"):
            return e
        found = text[s:e]
        if kind == "word" and r.word(s, e) in ("returning", "on"):
            raise ScanError("forbidden_insert", f"only plain INSERT ... VALUES is allowed (found {found!r} "
                            "after the rows)", st.number, r.line(s))
        raise ScanError("syntax", f"expected ',' or ';' after a row, found {found!r}", st.number, r.line(s))


def _warm_patterns() -> None:
    """Compile the patterns of the daily files' column lists (each returns table's column
    prefixes, as positional rows or a column list in declared order name them) at import,
    ~15 ms, so that a long-running process's first drop file does not pay for them."""
    for t in TABLES.values():
        if t.series_kind is not None:
            for k in range(t.min_positional, len(t.columns) + 1):
                _patterns(t.name, t.column_names[:k])


_warm_patterns()
