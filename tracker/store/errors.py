"""Errors raised by the store layer, each carrying one clear line for the user."""


class StoreError(Exception):
    """The store cannot be used (unwritable path, corrupt file, newer schema)."""


class StoreBusy(StoreError):
    """Another process held the store for longer than the configured wait."""
