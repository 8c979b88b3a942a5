"""The one loader for the SQL kept in ``queries/``.

Layout (installed as the ``tracker.queries`` package):

* ``migrations/NNN_name.sql`` -- applied once each, in order, inside one transaction;
* ``named/<group>.sql`` -- blocks introduced by ``-- name: <query_name>``, fetched as
  ``sql("<group>.<query_name>")``;
* ``schema.sql`` -- the schema the migrations produce, kept for readers and checked by
  a test.

Values are never formatted into these strings: callers bind them as parameters.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache
from importlib import resources

_NAME_LINE = re.compile(r"^--\s*name:\s*([a-z_][a-z0-9_]*)\s*$", re.MULTILINE)
_MIGRATION_FILE = re.compile(r"^(\d{3})_([a-z0-9_]+)\.sql$")


@dataclass(frozen=True)
class Migration:
    version: int
    name: str
    text: str


def _package_files(sub: str):
    return resources.files("tracker.queries").joinpath(sub) if sub else resources.files("tracker.queries")


@cache
def migrations() -> tuple[Migration, ...]:
    """All migrations in version order; versions must be 1, 2, 3, ... without gaps."""
    found = []
    for entry in _package_files("migrations").iterdir():
        match = _MIGRATION_FILE.match(entry.name)
        if match:
            found.append(Migration(int(match.group(1)), match.group(2), entry.read_text("utf-8")))
    found.sort(key=lambda m: m.version)
    expected = list(range(1, len(found) + 1))
    if [m.version for m in found] != expected:
        raise RuntimeError(f"migration versions must be contiguous from 001, found {[m.version for m in found]}")
    return tuple(found)


@cache
def _named_group(group: str) -> dict[str, str]:
    text = _package_files("named").joinpath(f"{group}.sql").read_text("utf-8")
    parts = _NAME_LINE.split(text)
    # parts = [preamble, name1, body1, name2, body2, ...]
    blocks: dict[str, str] = {}
    for name, body in zip(parts[1::2], parts[2::2]):
        if name in blocks:
            raise RuntimeError(f"query {group}.{name} is defined twice")
        blocks[name] = body.strip().rstrip(";")
    return blocks


def sql(qualified_name: str) -> str:
    """Return the text of the named query ``group.name`` from ``queries/named/group.sql``."""
    group, _, name = qualified_name.partition(".")
    try:
        return _named_group(group)[name]
    except (KeyError, FileNotFoundError):
        raise KeyError(f"no query named {qualified_name!r} in queries/named/") from None


def schema_text() -> str:
    return _package_files("").joinpath("schema.sql").read_text("utf-8")
