"""Small widgets every screen shows: the live activity line and the one-line caution."""

from __future__ import annotations

from textual.widgets import Static

from tracker.service.views import CAUTION

SHORT_CAUTION = "Statistical estimates, not investment advice. Full caution: press ?"


class ActivityLine(Static):
    """What the live worker is doing (estimating 3/11 ...), or when it last checked."""

    DEFAULT_CSS = "ActivityLine { height: 1; width: 1fr; padding: 0 1; color: $text-muted; }"

    def on_mount(self) -> None:
        self.update(getattr(self.app, "activity_text", ""))


class CautionLine(Static):
    """The caution on one line; the full text where the terminal is wide enough."""

    DEFAULT_CSS = "CautionLine { height: 1; width: 1fr; padding: 0 1; color: $text-muted; text-style: italic; }"

    def on_resize(self) -> None:
        self.update(CAUTION if self.size.width >= len(CAUTION) + 2 else SHORT_CAUTION)

    def on_mount(self) -> None:
        self.on_resize()
