"""The label question: which class is this sound?"""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.screen import ModalScreen
from textual.widgets import Static

from monitor.base.files import terminal_safe


class AskLabel(ModalScreen[str | None]):
    """Which class is this? Number keys pick one; 0 means unknown; Escape cancels.

    Parameters
    ----------
    classes : sequence of str
        The classes, numbered from 1.
    prompt : str
        The question.
    """

    BINDINGS = [Binding("escape", "cancel", "cancel", id="ask_cancel")]

    def __init__(self, classes, prompt: str) -> None:
        super().__init__()
        self.class_names, self.prompt = list(classes), prompt

    def compose(self) -> ComposeResult:
        """The question, a numbered line per class, 0 for unknown, and how to cancel."""
        lines = [self.prompt, ""] + [f"  {i + 1}  {terminal_safe(c, one_line=True)}"
                                     for i, c in enumerate(self.class_names)]
        lines += ["  0  unknown", "", "Esc: cancel"]
        yield Static(Text("\n".join(lines)), id="ask")  # class names shown as written

    def on_key(self, event) -> None:
        """A digit answers: 0 with "unknown", 1 to N with that class; every digit key stops here."""
        if event.key.isdigit():
            k = int(event.key)
            if k == 0:
                self.dismiss("unknown")
            elif 1 <= k <= len(self.class_names):
                self.dismiss(self.class_names[k - 1])
            event.stop()

    def action_cancel(self) -> None:
        """Escape: dismiss with None (no label)."""
        self.dismiss(None)
