"""A yes/no question in a small modal: y or Enter confirms, n or Escape cancels."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Static


class ConfirmScreen(ModalScreen[bool]):
    CSS_PATH = "confirm.tcss"
    BINDINGS = [
        Binding("y", "answer(True)", "Yes"),
        Binding("enter", "answer(True)", "Yes", show=False),
        Binding("n", "answer(False)", "No"),
        Binding("escape", "answer(False)", "Cancel", show=False),
    ]

    def __init__(self, title: str, question: str) -> None:
        super().__init__()
        self.title_text = title
        self.question = question

    def compose(self) -> ComposeResult:
        with Vertical(id="confirm-box"):
            yield Static(self.title_text, id="confirm-title")
            yield Static(self.question, id="confirm-question")
            yield Static("y / Enter: yes    n / Esc: no", id="confirm-keys")

    def action_answer(self, yes: bool) -> None:
        self.dismiss(yes)
