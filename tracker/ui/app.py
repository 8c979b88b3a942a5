"""The Textual application: thin. Screens live in their own modules, the live loop in live.py.

The app owns the store, the configuration and the live loop; a timer starts one live pass
every ``[ui] refresh_s`` seconds in a worker thread (never two at once), and the boards
and progress the pass reports are handed to every screen on the stack.
"""

from __future__ import annotations

import asyncio
import signal
from collections.abc import Callable, Iterable
from datetime import datetime

from textual.app import App, SystemCommand
from textual.binding import Binding
from textual.screen import Screen
from textual.worker import Worker, WorkerState

from tracker.config import Config
from tracker.service.views import Board
from tracker.store.connection import Store
from tracker.ui import formatting as fmt
from tracker.ui.live import DEFAULT_INGEST, Ingest, LiveLoop, PassReport
from tracker.ui.messages import BoardLoaded, LiveActivity, PassFinished
from tracker.ui.widgets import ActivityLine

_UNSET = object()


class TrackerApp(App):
    """The terminal interface.

    Parameters
    ----------
    store, config
    clock : callable() -> datetime, optional
        Where "now" comes from (tests freeze it).
    live : bool
        Run live passes (the first at once, then every ``[ui] refresh_s`` seconds).
    install_signals : bool
        Exit cleanly on SIGHUP and SIGTERM (the command line sets this).
    ingest : callable(store, config) -> outcomes, optional
        Applies waiting drop files; ``process_inbox`` when the ingest layer is installed.
    """

    TITLE = "premium tracker"
    ENABLE_COMMAND_PALETTE = True
    COMMAND_PALETTE_BINDING = "p"          # a letter: modifier keys do not reach every SSH terminal
    BINDINGS = [
        Binding("q", "quit", "Quit", tooltip="Quit; an estimation in progress is abandoned before it writes anything"),
        Binding("question_mark", "help", "Help", tooltip="This help: keys, measures, warnings, cautions"),
        Binding("i", "inbox", "Inbox", tooltip="Recent drop files: outcome, rows, revisions, warnings, rejection reasons"),
        Binding("a", "assets", "Assets", show=False, tooltip="The assets view"),
        Binding("u", "check_now", "Check now", show=False, tooltip="Check the store now: apply waiting drop files, bring estimates up to date"),
        Binding("p", "command_palette", "Commands", show=False, tooltip="Command palette: every action by name"),
        Binding("ctrl+p", "command_palette", "Commands", show=False),
    ]

    def __init__(self, store: Store, config: Config, *, clock: Callable[[], datetime] | None = None,
                 live: bool = True, install_signals: bool = False, ingest: Ingest | None | object = _UNSET) -> None:
        super().__init__()
        self.store = store
        self.config = config
        self.clock = clock or datetime.now
        self.live_enabled = live
        self.install_signals = install_signals
        self.board: Board | None = None
        self.activity_text = "starting…"
        self.last_event = ""
        self.passes_done = 0
        self.live = LiveLoop(store, config, on_board=self._board_from_worker, on_activity=self._activity_from_worker,
                             ingest=DEFAULT_INGEST if ingest is _UNSET else ingest, clock=self.clock)
        self._pass_worker: Worker | None = None
        self._pass_again = False
        self._signals: list[int] = []

    # ---------------------------------------------------------------- start / stop

    def on_mount(self) -> None:
        from tracker.ui.board import BoardScreen

        self.push_screen(BoardScreen())
        if self.install_signals:
            self._install_signal_handlers()
        if self.live_enabled:
            self.call_after_refresh(self.action_check_now)     # the board is drawn before any work
            self.set_interval(self.config.ui.refresh_s, self.action_check_now, name="live")

    def _install_signal_handlers(self) -> None:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGHUP, signal.SIGTERM):
            try:
                loop.add_signal_handler(sig, self._exit_on_signal, sig)
                self._signals.append(sig)
            except (NotImplementedError, RuntimeError, ValueError):  # not the main thread, or no such signal
                pass

    def _exit_on_signal(self, sig: int) -> None:
        # Runs on the event loop thread (loop.add_signal_handler), so exit() is safe here.
        self.live.stop.set()
        self.exit(return_code=0)

    def on_unmount(self) -> None:
        self.live.stop.set()
        if self._signals:
            try:
                loop = asyncio.get_running_loop()
                for sig in self._signals:
                    loop.remove_signal_handler(sig)
            except RuntimeError:
                pass

    async def action_quit(self) -> None:
        self.live.stop.set()
        self.exit()

    # ---------------------------------------------------------------- the live pass

    def action_check_now(self) -> None:
        """Start a live pass now, or right after the one running."""
        if self._pass_worker is not None and self._pass_worker.state in (WorkerState.PENDING, WorkerState.RUNNING):
            self._pass_again = True
            return
        self._pass_again = False
        self._pass_worker = self.run_worker(self._run_pass, thread=True, group="live", name="live pass",
                                            exit_on_error=False)

    def request_refit(self, factors: set[str] | None) -> None:
        self.live.request_refit(factors)
        which = "all factors" if not factors else ", ".join(sorted(factors))
        self.notify(f"Refit of {which} queued; progress shows at the top right.")
        self.action_check_now()

    def _run_pass(self) -> None:
        report: PassReport = self.live.run_pass()
        self.post_message(PassFinished(report.checked_at, tuple(report.drops), report.estimation, report.error,
                                       report.applied, report.rejected))

    def _board_from_worker(self, board: Board) -> None:
        self.post_message(BoardLoaded(board))

    def _activity_from_worker(self, text: str, done: int, total: int, busy: bool) -> None:
        self.post_message(LiveActivity(text, done, total, busy))

    def on_board_loaded(self, message: BoardLoaded) -> None:
        self.board = message.board
        for screen in self.screen_stack:
            show = getattr(screen, "show_board", None)
            if show is not None:
                show(message.board)

    def on_live_activity(self, message: LiveActivity) -> None:
        text = message.text
        if message.total:
            filled = int(10 * message.done / max(1, message.total))
            text = f"{text} [{'#' * filled}{'.' * (10 - filled)}] {message.done}/{message.total}"
        self._set_activity(text)

    def on_pass_finished(self, message: PassFinished) -> None:
        self.passes_done += 1
        events = []
        if message.applied or message.rejected:
            events.append(f"{message.applied} drop file(s) applied, {message.rejected} rejected")
            for line in message.drops:           # applied files show on the activity line; rejections need a look
                if line.startswith("rejected"):
                    self.notify(f"{line} (i: inbox)", severity="warning", timeout=12)
        if message.estimation and message.estimation != "estimates are up to date":
            events.append(message.estimation)
        if events:
            self.last_event = f"{fmt.clock(message.checked_at)} " + "; ".join(events)
        if message.error:
            self.last_event = f"{fmt.clock(message.checked_at)} error: {message.error}"
        text = f"live · checked {fmt.clock(message.checked_at)}"
        if self.last_event:
            text += f" · last: {self.last_event}"
        self._set_activity(text)
        for screen in self.screen_stack:
            hook = getattr(screen, "pass_finished", None)
            if hook is not None:
                hook(message)
        if self._pass_again or self.live.refit_pending():
            self.action_check_now()

    def _set_activity(self, text: str) -> None:
        self.activity_text = text
        for screen in self.screen_stack:
            for line in screen.query(ActivityLine):
                line.update(text)

    # ---------------------------------------------------------------- screens

    def action_help(self) -> None:
        from tracker.ui.help import HelpScreen

        if not isinstance(self.screen, HelpScreen):
            self.push_screen(HelpScreen())

    def action_inbox(self) -> None:
        from tracker.ui.inbox import InboxScreen

        if not isinstance(self.screen, InboxScreen):
            self.push_screen(InboxScreen())

    def action_assets(self) -> None:
        from tracker.ui.assets import AssetsScreen

        if not isinstance(self.screen, AssetsScreen):
            self.push_screen(AssetsScreen())

    def get_system_commands(self, screen: Screen) -> Iterable[SystemCommand]:
        own = getattr(screen, "palette_commands", None)
        if own is not None:
            for title, help_text, callback in own():
                yield SystemCommand(title, help_text, callback)
        yield SystemCommand("Help: keys, measures and cautions", "Every key, a glossary and the cautions", self.action_help)
        yield SystemCommand("Inbox: recent drop files", "Outcome, rows, revisions, warnings, rejection reasons",
                            self.action_inbox)
        yield SystemCommand("Assets", "Expected excess returns of the assets", self.action_assets)
        yield SystemCommand("Check the store now", "Apply waiting drop files and bring estimates up to date",
                            self.action_check_now)
        yield from super().get_system_commands(screen)


def run_app(store: Store, config: Config) -> None:
    TrackerApp(store, config, install_signals=True).run()
