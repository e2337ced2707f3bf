"""Captured snippets: the one owner of ``SESSION/snippets/<label>/<name>.wav`` + ``.json``.

A snippet is a short WAV (16-bit PCM at the model rate) and its sidecar. The sidecar is the
truth about the snippet: what the sound truly is (``label``, or "unknown"), what the model
said, why it was kept (``reason``), the model and audio sha256, and the review state the
relabel view sets (``reviewed``, ``dropped``, ``relabeled_from``). Writing, reading,
relabeling, dropping and checking all happen here; the session writer, the relabel view,
report, harvest and repair use these functions and parse nothing themselves.

Snippet audio from a session received from someone else is not trusted: `verified_audio`
reads it only when it is a regular file inside the session (opened without following a
symbolic link), a real WAV, and matches its sidecar (sha256, sample rate, length).
"""

from __future__ import annotations

import io
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from monitor.base.files import atomic_write, dumps, read_regular_bytes, sha256_hex
from monitor.sound.samples import to_pcm16

REASONS = ("disagreement", "uncertain", "manual", "models_disagree", "unfamiliar")
_SAFE = re.compile(r"[^A-Za-z0-9_-]+")
MAX_LABEL = 64
_MAX_SIDECAR_BYTES = 1 << 20


def safe_label(label: str | None) -> str:
    """A label as a folder name: letters, digits, ``_`` and ``-`` only, no leading dot or
    dash, at most 64 characters; anything else becomes ``_`` ("unknown" when empty).

    Parameters
    ----------
    label : str or None
        A label from a card or a sidecar.

    Returns
    -------
    str
        A folder name.
    """
    text = _SAFE.sub("_", str(label or "")).strip("_-.")[:MAX_LABEL]
    return text or "unknown"


@dataclass(frozen=True)
class SnippetFile:
    """One snippet on disk: its sidecar path and the sidecar's fields.

    Attributes
    ----------
    sidecar : Path
        The snippet's ``.json``.
    meta : dict
        The sidecar's fields.
    """

    sidecar: Path
    meta: dict[str, Any]

    @property
    def wav(self) -> Path:
        """The audio file beside the sidecar (same stem, ``.wav``)."""
        return self.sidecar.with_suffix(".wav")

    @property
    def label(self) -> str:
        """What the sound truly is: the sidecar's ``label`` (after a relabel), else "unknown"."""
        return str(self.meta.get("label") or "unknown")

    @property
    def reason(self) -> str:
        """Why it was kept (one of `REASONS`), as text ("None" when the sidecar names no reason)."""
        return str(self.meta.get("reason"))

    @property
    def t0(self) -> float:
        """Where the snippet starts, in session seconds (0.0 when the sidecar holds no number)."""
        v = self.meta.get("t0")
        return float(v) if isinstance(v, (int, float)) else 0.0

    @property
    def predicted_b(self) -> str | None:
        """Model B's prediction of a ``models_disagree`` snippet (its sidecar's
        ``model_b.predicted``, as text); None for any other snippet (only those hold it)."""
        b = self.meta.get("model_b")
        if self.reason != "models_disagree" or not isinstance(b, dict) \
                or b.get("predicted") is None:
            return None
        return str(b["predicted"])

    @property
    def dropped(self) -> bool:
        """True only when the sidecar's ``dropped`` is JSON true (harvest then leaves it out)."""
        return self.meta.get("dropped") is True

    @property
    def state(self) -> str:
        """"dropped", "kept", "relabeled", "kept, relabeled" or "" (not reviewed)."""
        parts = []
        if self.dropped:
            parts.append("dropped")
        elif self.meta.get("reviewed"):
            parts.append("kept")
        if self.meta.get("relabeled_from") is not None:
            parts.append("relabeled")
        return ", ".join(parts)


def encode_wav(audio: np.ndarray, sample_rate: int) -> bytes:
    """A float32 snippet as 16-bit PCM WAV bytes.

    Parameters
    ----------
    audio : numpy.ndarray
        float32 samples.
    sample_rate : int
        Hz.

    Returns
    -------
    bytes
        The WAV file.
    """
    import soundfile as sf

    buf = io.BytesIO()
    sf.write(buf, to_pcm16(audio), int(sample_rate), subtype="PCM_16", format="WAV")
    return buf.getvalue()


def write_snippet(session_dir: Path, snippet: dict[str, Any], *, session_id: str,
                  model_sha256: str | None, sample_rate: int) -> Path:
    """Write one captured snippet (audio first, then the sidecar, each atomically).

    Parameters
    ----------
    session_dir : Path
        The session directory.
    snippet : dict
        From the capture policy: ``audio`` (float32 at the model rate), ``reason``,
        ``label``, ``predicted``, ``t0``, ``t1``, probabilities and anything else to keep.
    session_id : str
        Written into the sidecar as ``session``.
    model_sha256 : str or None
        Written into the sidecar.
    sample_rate : int
        Hz of ``audio``.

    Returns
    -------
    Path
        The sidecar written (its presence commits the snippet).
    """
    label_dir = Path(session_dir) / "snippets" / safe_label(snippet["label"])
    label_dir.mkdir(parents=True, exist_ok=True)
    stem = f"s{int(round(snippet['t0'] * 1000)):09d}-{snippet['reason']}"
    name, k = stem, 1
    while (label_dir / f"{name}.json").exists() or (label_dir / f"{name}.wav").exists():
        k += 1
        name = f"{stem}-{k}"
    data = encode_wav(snippet["audio"], sample_rate)
    side = {key: v for key, v in snippet.items() if key != "audio"}
    side.update({
        "session": session_id, "file": f"{name}.wav", "sample_rate": int(sample_rate),
        "duration_s": round(len(snippet["audio"]) / sample_rate, 4),
        "model_sha256": model_sha256, "audio_sha256": sha256_hex(data),
    })
    atomic_write(label_dir / f"{name}.wav", data)  # audio first: the sidecar is the commit
    atomic_write(label_dir / f"{name}.json", dumps(side, indent=2).encode())
    return label_dir / f"{name}.json"


def iter_snippets(session_dir: Path) -> list[SnippetFile]:
    """Every readable sidecar of a session, in time order (unreadable ones are left out).

    A sidecar that is not a regular file, is larger than 1 MiB, is not a JSON object or
    holds a field of the wrong type (`sidecar_problem`) is skipped; `count_unreadable` says
    how many.

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    list of SnippetFile
        In time order.
    """
    out = []
    root = Path(session_dir) / "snippets"
    if not root.is_dir() or root.is_symlink():
        return out
    for side in sorted(root.glob("*/*.json")):
        meta = _read_sidecar(side, session_dir)
        if meta is not None:
            out.append(SnippetFile(side, meta))
    return sorted(out, key=lambda s: (s.t0, s.label, s.sidecar.name))


def unreadable_sidecars(session_dir: Path) -> list[Path]:
    """The sidecars `iter_snippets` leaves out, by path.

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    list of Path
        Sidecars that are links, not regular files, too large, not a JSON object, or hold a
        field of the wrong type (`sidecar_problem`).
    """
    root = Path(session_dir) / "snippets"
    if not root.is_dir() or root.is_symlink():
        return []
    return [side for side in sorted(root.glob("*/*.json"))
            if _read_sidecar(side, session_dir) is None]


def count_unreadable(session_dir: Path) -> int:
    """Sidecars `iter_snippets` leaves out (`unreadable_sidecars`, counted).

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    int
        How many there are.
    """
    return len(unreadable_sidecars(session_dir))


# the fields a reader relies on, and the JSON types each may have (None: may be null)
_FIELDS: dict[str, tuple[type, ...]] = {
    "label": (str, type(None)), "predicted": (str, type(None)), "reason": (str,),
    "t0": (int, float), "t1": (int, float), "duration_s": (int, float, type(None)),
    "dropped": (bool,), "reviewed": (bool,), "relabeled_from": (str, type(None)),
    "audio_sha256": (str,), "session": (str, type(None)), "sample_rate": (int,),
    "confidence": (int, float, type(None)), "model_b": (dict, type(None)),
}


def sidecar_problem(meta: dict[str, Any]) -> str | None:
    """What is wrong with a sidecar's fields, or None when a reader can trust their types.

    Parameters
    ----------
    meta : dict
        The sidecar, as read.

    Returns
    -------
    str or None
        The first field whose JSON type is not the sidecar format's, or whose number is not
        finite.
    """
    for name, types in _FIELDS.items():
        if name not in meta:
            continue
        v = meta[name]
        if isinstance(v, bool) and bool not in types:
            return f"{name} is {v!r}"
        if not isinstance(v, types):
            return f"{name} is a {type(v).__name__}"
        if isinstance(v, float) and not math.isfinite(v):
            return f"{name} is not finite"
    return None


def _read_sidecar(side: Path, session_dir: Path) -> dict | None:
    try:
        data = read_regular_bytes(side, inside=Path(session_dir) / "snippets")
        if len(data) > _MAX_SIDECAR_BYTES:
            return None
        meta = json.loads(data.decode("utf-8"))
    except (OSError, ValueError, UnicodeDecodeError, RecursionError):
        return None
    if not isinstance(meta, dict) or sidecar_problem(meta) is not None:
        return None
    return meta


def verified_audio(snip: SnippetFile, session_dir: Path) -> tuple[bytes | None, str | None]:
    """The snippet's WAV bytes when they can be trusted, else ``(None, why)``.

    Trusted means: a regular file inside the session's ``snippets/`` folder, opened without
    following a link; a WAV that libsndfile reads; its sha256, sample rate and length match
    the sidecar.

    Parameters
    ----------
    snip : SnippetFile
        The snippet.
    session_dir : Path
        Its session directory.

    Returns
    -------
    data : bytes or None
        The WAV bytes, or None.
    why : str or None
        Why they cannot be trusted, or None.
    """
    import soundfile as sf

    try:
        data = read_regular_bytes(snip.wav, inside=Path(session_dir) / "snippets")
    except OSError as exc:
        return None, f"{snip.wav}: {exc.strerror or exc}; skipped"
    digest = sha256_hex(data)
    if snip.meta.get("audio_sha256") != digest:
        return None, f"{snip.wav}: audio does not match its sidecar's sha256; skipped"
    try:
        info = sf.info(io.BytesIO(data))
    except (sf.LibsndfileError, RuntimeError, TypeError):
        return None, f"{snip.wav}: not a readable WAV; skipped"
    if info.format != "WAV":
        return None, f"{snip.wav}: not a WAV file; skipped"
    rate = snip.meta.get("sample_rate")
    if isinstance(rate, int) and info.samplerate != rate:
        return None, f"{snip.wav}: sample rate {info.samplerate} Hz, its sidecar says {rate}; skipped"
    dur = snip.meta.get("duration_s")
    if isinstance(dur, (int, float)) and abs(info.frames / info.samplerate - dur) > 0.01:
        return None, f"{snip.wav}: {info.frames / info.samplerate:.3f} s long, its sidecar says {dur}; skipped"
    return data, None


def _rewrite(snip: SnippetFile, session_dir: Path, **changes: Any) -> SnippetFile:
    fresh = _read_sidecar(snip.sidecar, session_dir)  # never write a stale copy
    if fresh is None:
        raise OSError(f"{snip.sidecar}: cannot be read back")
    fresh.update(changes)
    atomic_write(snip.sidecar, dumps(fresh, indent=2).encode("utf-8"))
    return SnippetFile(snip.sidecar, fresh)


def keep(snip: SnippetFile, session_dir: Path) -> SnippetFile:
    """Mark the snippet reviewed and kept (only its sidecar changes).

    Parameters
    ----------
    snip : SnippetFile
        The snippet.
    session_dir : Path
        Its session directory.

    Returns
    -------
    SnippetFile
        The snippet as its sidecar now says.

    Raises
    ------
    OSError
        The sidecar can no longer be read back, or cannot be written.
    """
    return _rewrite(snip, session_dir, reviewed=True, dropped=False)


def drop(snip: SnippetFile, session_dir: Path) -> SnippetFile:
    """Mark the snippet dropped: harvest leaves it out (only its sidecar changes).

    Parameters
    ----------
    snip : SnippetFile
        The snippet.
    session_dir : Path
        Its session directory.

    Returns
    -------
    SnippetFile
        The snippet as its sidecar now says.

    Raises
    ------
    OSError
        The sidecar can no longer be read back, or cannot be written.
    """
    return _rewrite(snip, session_dir, reviewed=True, dropped=True)


def relabel(snip: SnippetFile, session_dir: Path, label: str,
            classes: list[str]) -> SnippetFile:
    """Give the snippet another label, remembering the first one in ``relabeled_from``.

    Parameters
    ----------
    snip : SnippetFile
        The snippet.
    session_dir : Path
        Its session directory.
    label : str
        The new label.
    classes : list of str
        The model's classes (the sidecar notes whether the label is one of them).

    Returns
    -------
    SnippetFile
        The snippet as its sidecar now says.

    Raises
    ------
    OSError
        The sidecar can no longer be read back, or cannot be written.
    """
    fresh = _read_sidecar(snip.sidecar, session_dir) or snip.meta
    if label == fresh.get("label"):
        return SnippetFile(snip.sidecar, fresh)
    changes: dict[str, Any] = {"label": label, "reviewed": True, "in_classes": label in classes}
    if fresh.get("relabeled_from") is None:
        changes["relabeled_from"] = fresh.get("label")
    return _rewrite(snip, session_dir, **changes)


def verify_all(session_dir: Path) -> list[str]:
    """Problems with the session's snippets (empty when every one is whole and trusted).

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    list of str
        One sentence per problem.
    """
    problems = []
    for snip in iter_snippets(session_dir):
        _, why = verified_audio(snip, session_dir)
        if why:
            problems.append(why)
    n = count_unreadable(session_dir)
    if n:
        problems.append(f"{n} unreadable snippet sidecar(s)")
    return problems
