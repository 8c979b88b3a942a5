"""What the background workers report back to the screens: typed, frozen-by-convention messages.

Workers never touch widgets; they post one of these and the App or the screen that asked
updates itself on the event loop.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

from textual.message import Message

from tracker.service.views import Board, DropEntry, FactorDetail


@dataclass
class BoardLoaded(Message):
    """A fresh board; posted when anything on it differs from the last one posted."""

    board: Board


@dataclass
class LiveActivity(Message):
    """What the live worker is doing now: ``done``/``total`` while estimating, else both 0."""

    text: str
    done: int = 0
    total: int = 0
    busy: bool = True


@dataclass
class PassFinished(Message):
    """One live pass is over: what it did (drop files, estimation) and any error in words."""

    checked_at: datetime
    drops: tuple[str, ...] = ()
    estimation: str = ""
    error: str = ""
    applied: int = 0
    rejected: int = 0


@dataclass
class DetailLoaded(Message):
    """The factor detail asked for with ``request``, or the reason it could not be read."""

    request: int
    detail: FactorDetail | None
    error: str = ""


@dataclass
class DropsLoaded(Message):
    entries: list[DropEntry] = field(default_factory=list)
    pending: tuple[str, ...] = ()
    error: str = ""


@dataclass
class ReviewMarked(Message):
    when: datetime | None
    error: str = ""


@dataclass
class AssetsLoaded(Message):
    """The asset view (``tracker.service.assets.AssetsView``), or an error in words."""

    view: object = None
    error: str = ""
