"""The Textual application: thin; screens live in their own modules."""

from __future__ import annotations

from textual.app import App

from tracker.config import Config
from tracker.store.connection import Store
from tracker.ui.board import BoardScreen


class TrackerApp(App):
    TITLE = "premium tracker"
    BINDINGS = [("q", "quit", "Quit")]

    def __init__(self, store: Store, config: Config) -> None:
        super().__init__()
        self.store = store
        self.config = config

    def on_mount(self) -> None:
        self.push_screen(BoardScreen())


def run_app(store: Store, config: Config) -> None:
    TrackerApp(store, config).run()
