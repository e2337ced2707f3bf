"""The stage view, the relabel view and the label question."""

from __future__ import annotations

import json
import threading
from pathlib import Path

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen, Screen
from textual.widgets import DataTable, Footer, Static

from monitor.ui import widgets as W


class StageScreen(Screen):
    """Large and quiet, for demos: the decision, one confidence bar, the strip."""

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
        app = self.app
        st = app.state
        if st.classes is None:
            return
        d = st.decision
        word = d if d is not None else "listening"
        col = W.colour(st.classes, d) if d else "dim"
        self.query_one("#stage_word", Static).update(W.big_text(word, style=f"bold {col}"))
        p = float(max(st.smoothed)) if st.smoothed is not None else 0.0
        t = Text("confidence ")
        t.append_text(W.bar(p, 40, style=col))
        t.append(f" {p:.0%}")
        self.query_one("#stage_bar", Static).update(t)
        width = max(20, self.size.width - 14)
        self.query_one("#stage_strip", Static).update(
            W.strip_text(st.classes, st.keys, st.decisions, st.truths, width, st.hop_s))


class AskLabel(ModalScreen[str | None]):
    """Which class is this? Number keys pick one; 0 means unknown; Escape cancels."""

    BINDINGS = [Binding("escape", "cancel", "cancel", id="ask_cancel")]

    def __init__(self, classes, prompt: str) -> None:
        super().__init__()
        self.class_names, self.prompt = list(classes), prompt

    def compose(self) -> ComposeResult:
        lines = [self.prompt, ""] + [f"  {i + 1}  {c}" for i, c in enumerate(self.class_names)]
        lines += ["  0  unknown", "", "Esc: cancel"]
        yield Static("\n".join(lines), id="ask")

    def on_key(self, event) -> None:
        if event.key.isdigit():
            k = int(event.key)
            if k == 0:
                self.dismiss("unknown")
            elif 1 <= k <= len(self.class_names):
                self.dismiss(self.class_names[k - 1])
            event.stop()

    def action_cancel(self) -> None:
        self.dismiss(None)


def write_sidecar(path: Path, data: dict) -> None:
    from monitor.session import atomic_write, dumps

    atomic_write(path, dumps(data, indent=2).encode("utf-8"))


def load_snippets(session_dir: Path) -> list[tuple[Path, dict]]:
    out = []
    for side in sorted((session_dir / "snippets").glob("*/*.json")):
        try:
            out.append((side, json.loads(side.read_text(encoding="utf-8"))))
        except (OSError, ValueError):
            continue
    out.sort(key=lambda pm: pm[1].get("t0") or 0.0)
    return out


class RelabelScreen(Screen):
    """The snippets of a session: play one, keep it, drop it, or give it another label.

    Every change rewrites only that snippet's sidecar, atomically; the audio is never touched.
    """

    BINDINGS = [
        Binding("enter,space", "play", "play", id="relabel_play"),
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
        self.items: list[tuple[Path, dict]] = []

    def compose(self) -> ComposeResult:
        yield Static(f"snippets of {self.session_dir}", id="relabel_title")
        yield DataTable(id="snippets", cursor_type="row", zebra_stripes=True)
        yield Static("", id="relabel_status")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one(DataTable)
        table.add_columns("from", "length", "label", "predicted", "reason", "conf", "state")
        self.reload()

    def reload(self) -> None:
        table = self.query_one(DataTable)
        row = table.cursor_row
        table.clear()
        self.items = load_snippets(self.session_dir)
        for side, m in self.items:
            state = "dropped" if m.get("dropped") else "kept" if m.get("reviewed") else ""
            if m.get("relabeled_from") is not None:
                state = (state + " relabeled").strip()
            conf = m.get("confidence")
            table.add_row(f"{m.get('t0', 0):7.1f} s", f"{m.get('duration_s', 0):4.1f} s",
                          str(m.get("label")), str(m.get("predicted")), str(m.get("reason")),
                          "-" if conf is None else f"{conf:.2f}", state, key=str(side))
        if self.items:
            table.move_cursor(row=min(row, len(self.items) - 1))
        self.status(f"{len(self.items)} snippet(s). enter: play  k: keep  d: drop  l: label")

    def status(self, text: str) -> None:
        self.query_one("#relabel_status", Static).update(text)

    def current(self) -> tuple[Path, dict] | None:
        if not self.items:
            return None
        return self.items[self.query_one(DataTable).cursor_row]

    def _update(self, **changes) -> None:
        cur = self.current()
        if cur is None:
            return
        side, m = cur
        fresh = json.loads(side.read_text(encoding="utf-8"))  # never write a stale copy
        fresh.update(changes)
        write_sidecar(side, fresh)
        self.reload()

    def action_keep(self) -> None:
        self._update(reviewed=True, dropped=False)

    def action_drop(self) -> None:
        self._update(reviewed=True, dropped=True)

    def action_label(self) -> None:
        cur = self.current()
        if cur is None:
            return

        def done(label: str | None) -> None:
            if label is None:
                return
            side, m = cur
            fresh = json.loads(side.read_text(encoding="utf-8"))
            if label == fresh.get("label"):
                return
            changes = {"label": label, "reviewed": True, "in_classes": label in self.class_names}
            if fresh.get("relabeled_from") is None:
                changes["relabeled_from"] = fresh.get("label")
            self._update(**changes)

        self.app.push_screen(AskLabel(self.class_names, "What is this sound?"), done)

    def action_play(self) -> None:
        cur = self.current()
        if cur is None:
            return
        wav = cur[0].with_suffix(".wav")
        self.status(f"playing {wav.name} …")
        threading.Thread(target=self._play, args=(wav,), daemon=True, name="playback").start()

    def _play(self, wav: Path) -> None:
        try:
            import soundfile as sf

            from monitor.sources import import_sounddevice

            sd = import_sounddevice()
            data, sr = sf.read(str(wav), dtype="float32")
            sd.play(data, sr)
            sd.wait()
            msg = f"played {wav.name}"
        except Exception as exc:  # noqa: BLE001 - shown, not fatal
            msg = f"cannot play {wav.name}: {exc}"
        self.app.call_from_thread(self.status, msg)

    def action_close(self) -> None:
        if self.standalone:
            self.app.exit(0)
        else:
            self.app.pop_screen()
