"""The stage view: large and quiet, for a meeting room.

The decision in the stage font (`draw.big_text`), centred; how long it has held and one
confidence bar; the recent strip when there is room. With two models it shows A, B or both
(key `m`). Nothing technical.
"""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import Screen
from textual.widgets import Footer, Static

from monitor.base import palette as P
from monitor.ui import draw as D

SHOW = ("A", "B", "both")


def stage_text(st, show: str, width: int, height: int, names: tuple[str, ...] = ()) -> Text:
    """The stage view's content for a screen of `width` x `height` cells (pure).

    Parameters
    ----------
    st : ViewState
        What the UI shows.
    show : str
        Which model: "both", or one of A and B.
    width, height : int
        The screen's cells and lines.
    names : tuple of str
        The models' names.

    Returns
    -------
    rich.text.Text
        The content.
    """
    lanes = list(enumerate(st.lanes))
    if st.two and show != "both":
        lanes = [lanes[SHOW.index(show)]]
    out = Text(justify="center", no_wrap=True, overflow="crop")
    blocks = []
    for k, lane in lanes:
        d = lane.decision
        col = D.colour(st.classes, d) if d else P.MUTED
        word = d.replace("_", " ") if d else "listening"
        block = Text(justify="center")
        if st.two:
            label = f"model {'AB'[k]}" + (f" · {names[k]}" if k < len(names) else "")
            block.append(label + "\n", style=P.MUTED)
        block.append_text(D.big_text(word, max_width=width - 4, style=f"bold {col}"))
        block.append("\n\n")
        p = float(max(lane.smoothed)) if lane.smoothed is not None else 0.0
        if d:
            block.append(f"for {D.held(st.t1 - lane.since_t).strip()}   ", style=P.MUTED)
        block.append("confidence ", style=P.MUTED)
        block.append_text(D.bar(p, min(40, width - 40), style=col))
        block.append(f" {p:4.0%}")
        if lane.unfamiliar:
            block.append(f"\n{D.UNFAMILIAR} unfamiliar sound: not one the model was made for",
                         style=f"bold {P.ALERT}")
        blocks.append(block)
    used = sum(len(b.plain.split("\n")) for b in blocks) + len(blocks) - 1
    for i, b in enumerate(blocks):
        if i:
            out.append("\n\n")
        out.append_text(b)
    strip_rows = [("decision" if not st.two else "AB"[k], lane.decisions) for k, lane in lanes]
    strip_rows.append(("truth", st.truths))
    if height - used >= len(strip_rows) + 3:
        out.append("\n\n\n")
        out.append_text(D.strip_text(st.classes, st.keys, strip_rows, min(width - 8, 100),
                                     st.hop_s))
    return out


class StageScreen(Screen):
    """See the module docstring."""

    BINDINGS = [Binding("s", "app.pop_screen", "back", id="stage_back"),
                Binding("m", "show_next", "A/B/both", id="stage_models"),
                Binding("q", "app.quit_session", "quit", id="stage_quit")]

    def __init__(self) -> None:
        super().__init__()
        self.show = "A"

    def compose(self) -> ComposeResult:
        """The stage view's one panel and the footer."""
        with Vertical(id="stage"):
            yield Static(id="stage_view")
        yield Footer()

    def on_mount(self) -> None:
        """Show both models in an A/B session, then draw."""
        if self.app.state.two:
            self.show = "both"
        self.refresh_view()

    def on_resize(self, event) -> None:
        """Draw again for the new size."""
        self.refresh_view()

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Offer key m (A, B, both) only in an A/B session."""
        if action == "show_next":
            return self.app.state.two
        return True

    def action_show_next(self) -> None:
        """Key m: show model A, then B, then both."""
        self.show = SHOW[(SHOW.index(self.show) + 1) % len(SHOW)]
        self.refresh_view()

    def refresh_view(self) -> None:
        """Draw from the app's view state (the app calls it on each redraw while the view shows)."""
        st = self.app.state
        if st.classes is None:
            return
        h = self.app.handle
        names = tuple(m.plan.path.name for m in h.models) if h is not None else ()
        self.query_one("#stage_view", Static).update(
            stage_text(st, self.show, self.size.width, self.size.height - 1, names))
