"""The stage view: large and quiet, for demos."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import Screen
from textual.widgets import Footer, Static

from monitor.ui import draw as D


class StageScreen(Screen):
    """The decision in large letters, one confidence bar, the strip; nothing technical."""

    BINDINGS = [Binding("s", "app.pop_screen", "back", id="stage_back"),
                Binding("q", "app.quit_session", "quit", id="stage_quit")]

    def compose(self) -> ComposeResult:
        with Vertical(id="stage"):
            yield Static(id="stage_word")
            yield Static(id="stage_bar")
            yield Static(id="stage_strip")
        yield Footer()

    def on_mount(self) -> None:
        self.refresh_view()

    def refresh_view(self) -> None:
        st = self.app.state
        if st.classes is None:
            return
        d = st.decision
        word = d if d is not None else "listening"
        col = D.colour(st.classes, d) if d else "dim"
        self.query_one("#stage_word", Static).update(D.big_text(word, style=f"bold {col}"))
        p = float(max(st.smoothed)) if st.smoothed is not None else 0.0
        t = Text("confidence ")
        t.append_text(D.bar(p, 40, style=col))
        t.append(f" {p:.0%}")
        self.query_one("#stage_bar", Static).update(t)
        width = max(20, self.size.width - 14)
        self.query_one("#stage_strip", Static).update(
            D.strip_text(st.classes, st.keys, st.decisions, st.truths, width, st.hop_s))
