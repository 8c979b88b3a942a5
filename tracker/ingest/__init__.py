"""Ingestion of SQL drop files: untrusted text in, validated rows in the store.

Modules: :mod:`~tracker.ingest.dropformat` (the documented format),
:mod:`~tracker.ingest.scanner` (strict reading, pure Python),
:mod:`~tracker.ingest.sandbox` (DuckDB sandbox, staged rows),
:mod:`~tracker.ingest.validate` (row rules), :mod:`~tracker.ingest.apply` (the
transaction), :mod:`~tracker.ingest.inbox` (claims, moves, receipts, recovery),
:mod:`~tracker.ingest.commands` (``tracker ingest`` / ``tracker watch``).
Nothing here runs estimation or imports the UI.
"""

from tracker.ingest.apply import DATA_VERSION, DROPS_VERSION
from tracker.ingest.commands import ingest_command, watch_command
from tracker.ingest.inbox import process_inbox
from tracker.ingest.outcome import DropWarning, Outcome, Rejection, SeriesChange, TableCounts

__all__ = [
    "DATA_VERSION",
    "DROPS_VERSION",
    "DropWarning",
    "Outcome",
    "Rejection",
    "SeriesChange",
    "TableCounts",
    "ingest_command",
    "process_inbox",
    "watch_command",
]
