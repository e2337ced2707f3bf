"""The relabel view: a session's snippets, played, kept, dropped or given another label.

A snippet the two models of an A/B session disagreed on (``models_disagree``) shows both
predictions, A's above B's, in a row two lines high. Only the view's own keys work here (and
the footer shows no other): over a live session, none of the live view's keys.

Every change goes through `monitor.session.snippets` (keep, drop, relabel), which rewrites only that
snippet's sidecar, atomically; the audio is never touched. Playback runs on its own short
"playback" thread and reports back with `call_from_thread` (it may block: it is not the
compute thread).
"""

from __future__ import annotations

import threading
from pathlib import Path

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from monitor.base import palette as P
from monitor.base.files import terminal_safe
from monitor.session import snippets as S
from monitor.ui.screens.ask import AskLabel

# (heading, width): 76 cells with the table's padding, so the state column shows at 80
COLUMNS = (("from", 9), ("len", 5), ("label", 12), ("predicted", 12), ("reason", 10),
           ("conf", 4), ("state", 10))
REASONS = {"disagreement": "disagree", "models_disagree": "A≠B", "uncertain": "uncertain",
           "unfamiliar": "unfamiliar", "manual": "manual"}


def state_word(sn: S.SnippetFile) -> str:
    """One word for the review state: dropped, relabeled, kept, or new (not reviewed).

    Parameters
    ----------
    sn : SnippetFile
        The snippet.

    Returns
    -------
    str
        The word.
    """
    state = sn.state or ""
    if "dropped" in state:
        return "dropped"
    if "relabeled" in state:
        return "relabeled"
    return "kept" if "kept" in state else "new"


class RelabelScreen(Screen):
    """The snippets of a session (see module docstring).

    Parameters
    ----------
    session_dir : Path
        The session.
    classes : list of str
        Its classes.
    standalone : bool
        The app's only screen (its back key leaves the app).
    """

    BINDINGS = [
        Binding("space", "play", "play", id="relabel_play"),
        Binding("k", "keep", "keep", id="relabel_keep"),
        Binding("d", "drop", "drop", id="relabel_drop"),
        Binding("l", "label", "label…", id="relabel_label"),
        Binding("escape,r", "close", "back", id="relabel_back"),
        Binding("q", "close", "back", show=False, id="relabel_quit"),
    ]

    def __init__(self, session_dir: Path, classes: list[str], *, standalone: bool = False) -> None:
        super().__init__()
        self.session_dir = Path(session_dir)
        self.class_names = list(classes)  # not `classes`: textual's CSS classes live there
        self.standalone = standalone
        self.items: list[S.SnippetFile] = []
        self.played: list[Path] = []
        self.last_status = ""

    def compose(self) -> ComposeResult:
        """The title, the snippets table, the status line and the footer."""
        yield Static(Text(f" snippets of session {safe(self.session_dir.name)}"),
                     id="relabel_title")
        yield DataTable(id="snippets", cursor_type="row", zebra_stripes=True)
        yield Static("", id="relabel_status")
        yield Footer()

    def on_mount(self) -> None:
        """Add the table's columns and fill it."""
        table = self.query_one(DataTable)
        for name, width in COLUMNS:
            table.add_column(name, width=width, key=name)
        self.reload()

    def reload(self) -> None:
        """Read the snippets again and refill the table, keeping the cursor row.

        The table shows what the sidecars on disk say after each change; the status line counts
        the snippets.
        """
        table = self.query_one(DataTable)
        row = table.cursor_row
        table.clear()
        self.items = S.iter_snippets(self.session_dir)
        for sn in self.items:
            m = sn.meta
            conf = m.get("confidence")
            dur = m.get("duration_s")
            word = state_word(sn)
            b = sn.predicted_b
            if b is None:
                said = self._label(str(m.get("predicted")))
            else:  # both models' predictions, A above B
                said = Text("A ", style=P.MUTED) + self._label(str(m.get("predicted")), 10)
                said += Text("\nB ", style=P.MUTED) + self._label(b, 10)
            table.add_row(
                Text(f"{sn.t0:7.1f} s", justify="right"),
                Text(f"{dur:4.1f}" if isinstance(dur, (int, float)) else "-", justify="right"),
                self._label(sn.label), said,
                Text(REASONS.get(sn.reason, safe(sn.reason)[:10])),  # shown as written
                Text(f"{conf:.2f}" if isinstance(conf, (int, float)) else "-"),
                Text(word, style=P.MUTED if word == "dropped" else
                     f"bold {P.TEXT}" if word in ("kept", "relabeled") else ""),
                key=str(sn.sidecar), height=1 if b is None else 2)
        if self.items:
            table.move_cursor(row=min(row, len(self.items) - 1))
        self.status(f"{len(self.items)} snippet(s) · enter or space plays · state: new, kept, "
                    f"dropped, relabeled")

    def _label(self, label: str, width: int = 12) -> Text:
        return Text(safe(label)[:width], style=P.class_colour(self.class_names, label))

    def status(self, text: str) -> None:
        """Show `text` on the status line (kept in `last_status`)."""
        self.last_status = text
        self.query_one("#relabel_status", Static).update(Text(safe(text)))

    def current(self) -> S.SnippetFile | None:
        """The snippet under the cursor, or None when there is none."""
        if not self.items:
            return None
        return self.items[self.query_one(DataTable).cursor_row]

    def on_data_table_row_selected(self, event: DataTable.RowSelected) -> None:
        """Enter on a row (the table's own select key) plays it, as the footer says."""
        event.stop()
        self.action_play()

    def action_keep(self) -> None:
        """Key k: mark the snippet under the cursor reviewed and kept."""
        cur = self.current()
        if cur is not None:
            S.keep(cur, self.session_dir)
            self.reload()

    def action_drop(self) -> None:
        """Key d: mark the snippet under the cursor dropped (harvest leaves it out)."""
        cur = self.current()
        if cur is not None:
            S.drop(cur, self.session_dir)
            self.reload()

    def action_label(self) -> None:
        """Key l: ask for another label and relabel the snippet under the cursor.

        Its first label is kept in the sidecar's ``relabeled_from``.
        """
        cur = self.current()
        if cur is None:
            return

        def done(label: str | None) -> None:
            if label is not None:
                S.relabel(cur, self.session_dir, label, self.class_names)
                self.reload()

        self.app.push_screen(AskLabel(self.class_names, "What is this sound?"), done)

    def action_play(self) -> None:
        """Space or Enter: play the snippet under the cursor on the "playback" thread.

        The view does not wait; the status line says when it has played, or why it cannot.
        """
        cur = self.current()
        if cur is None:
            return
        self.played.append(cur.wav)
        self.status(f"playing {cur.wav.name} …")
        threading.Thread(target=self._play, args=(cur,), daemon=True, name="playback").start()

    def _play(self, snip: S.SnippetFile) -> None:
        try:
            import io

            import soundfile as sf

            from monitor.sound.sources import import_sounddevice

            data, why = S.verified_audio(snip, self.session_dir)
            if data is None:
                raise OSError(why)
            sd = import_sounddevice()
            x, sr = sf.read(io.BytesIO(data), dtype="float32", always_2d=True)
            # a stream of our own, closed here: sounddevice's play() keeps a global one that
            # its exit handler stops, which can hang a process that exits mid-playback
            with sd.OutputStream(samplerate=sr, channels=x.shape[1], dtype="float32") as out:
                out.write(x)
            msg = f"played {snip.wav.name}"
        except Exception as exc:  # noqa: BLE001 - shown, not fatal
            msg = f"cannot play {snip.wav.name}: {exc}"
        try:
            self.app.call_from_thread(self.status, msg)
        except RuntimeError:  # the app has closed meanwhile
            pass

    def action_close(self) -> None:
        """Escape, r or q: back to the live view, or leave the app when the view runs on its own."""
        if self.standalone:
            self.app.exit(0)
        else:
            self.app.pop_screen()


def safe(text: str) -> str:
    """User text (a label, a reason, a file name) as one line of plain characters: shown
    literally, never read as markup (it goes into a `Text`), never a control character.

    Parameters
    ----------
    text : str
        Text from a sidecar or a card.

    Returns
    -------
    str
        The text with line breaks and control characters spelled out as ``\\xNN``.
    """
    return terminal_safe(text, one_line=True)
