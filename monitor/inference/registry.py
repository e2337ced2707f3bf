"""The runner registry: `load_runner` picks a runner for a model file.

By extension (``.keras``, ``.h5``, ``.tflite``, ``.onnx``) and runtime (LiteRT or the
microcontroller interpreter for ``.tflite``; ONNX Runtime for ``.onnx``); the file's first bytes are checked before any interpreter sees it. Each
runner keeps its heavy imports inside its constructor, so importing this module imports no
TensorFlow, and the modules of the microcontroller and ONNX runners are imported only for a
model that runs in them.
"""

from __future__ import annotations

from pathlib import Path

from monitor.base.errors import ModelError
from monitor.features.card import ModelCard
from monitor.inference.base import Runner
from monitor.inference.runners import KerasRunner, TFLiteRunner

RUNTIMES = ("litert", "micro")


def _check_magic(path: Path, ext: str) -> None:
    """Refuse a file whose first bytes are not the format its extension claims (cheaply,
    before any interpreter sees it)."""
    with open(path, "rb") as f:
        head = f.read(8)
    if ext == ".tflite" and (len(head) < 8 or head[4:8] != b"TFL3"):
        raise ModelError(f"{path}: not a TFLite model file (no TFL3 flatbuffer identifier)")
    if ext == ".keras" and not head.startswith(b"PK"):
        raise ModelError(f"{path}: not a Keras model file (a .keras file is a zip archive)")
    if ext == ".h5" and not head.startswith(b"\x89HDF\r\n\x1a\n"):
        raise ModelError(f"{path}: not a Keras model file (a .h5 file is HDF5)")
    if ext == ".onnx" and (not head or head[0] != 0x08):  # field 1 (ir_version), a varint
        raise ModelError(f"{path}: not an ONNX model file (it does not start with the "
                         f"model's ir_version field)")


def load_runner(path: str | Path, card: ModelCard, *, runtime: str = "litert",
                trust_model: bool = False, threads: int = 1) -> Runner:
    """Load a model file and check it against its card.

    Parameters
    ----------
    path : str or Path
        ``.keras``, ``.h5``, ``.tflite`` or ``.onnx``.
    card : ModelCard
        The card the model must fit (input shape, output size).
    trust_model : bool
        Allow Keras Lambda layers (their code runs on load).
    runtime : {"litert", "micro"}
        For a ``.tflite`` model: LiteRT's interpreter, or the microcontroller interpreter
        of the ``tflite-micro`` package (the firmware's own kernels). Keras models always
        run in TensorFlow.
    threads : int
        Compute threads for the model.

    Raises
    ------
    ModelError
        Missing, unreadable or mismatched model.

    Returns
    -------
    Runner
        The loaded model, warmed up.
    """
    path = Path(path)
    if not path.exists():
        raise ModelError(f"{path}: model file not found")
    if not path.is_file():
        raise ModelError(f"{path}: not a regular file")
    if path.stat().st_size == 0:
        raise ModelError(f"{path}: model file is empty")
    if runtime not in RUNTIMES:
        raise ModelError(f"{path}: runtime {runtime!r} is not one of {', '.join(RUNTIMES)}")
    ext = path.suffix.lower()
    if ext not in (".tflite", ".keras", ".h5", ".onnx"):
        raise ModelError(f"{path}: unknown model type {ext!r} (use .keras, .h5, .tflite or "
                         f".onnx)")
    _check_magic(path, ext)
    if ext == ".onnx":
        if runtime == "micro":
            raise ModelError(f"{path}: the microcontroller runtime runs .tflite models; an "
                             f".onnx model runs in ONNX Runtime")
        from monitor.inference.onnx import OnnxRunner

        return OnnxRunner(path, card, threads=threads)
    if ext == ".tflite":
        if runtime == "micro":
            from monitor.inference.micro import MicroRunner

            return MicroRunner(path, card)
        return TFLiteRunner(path, card, threads=threads)
    if runtime == "micro":
        raise ModelError(f"{path}: the microcontroller runtime runs .tflite models; convert "
                         f"this Keras model first (scenemon quantize)")
    return KerasRunner(path, card, trust_model=trust_model, threads=threads)
