"""The microcontroller runtime: a `.tflite` model in TensorFlow Lite for Microcontrollers.

The firmware will run the model with the microcontroller interpreter and its reference
kernels, which are not the laptop's (LiteRT's default delegate computes int8 convolutions
differently in the last step). `MicroRunner` runs the very interpreter of the
``tflite-micro`` package (``from tflite_micro import runtime``; an optional extra,
``pip install 'scenemon[micro]'``), so golden vectors and decisions are the firmware's.

The interpreter allocates every tensor in one arena it is given. It records what it used
(its allocation recording), printed by ``print_allocations()`` on file descriptor 2; that
figure is the smallest arena that works on this machine (pointer sizes differ on a 32-bit
part). A model with an operator the runtime has no kernel for fails at load, and the log
names the operator: `MicroRunner` says it in one sentence.

Thread: the runner is owned by the engine's compute thread; loading swaps file descriptor 2
for a moment (to read the interpreter's log), which is why it happens before the session's
threads start.
"""

from __future__ import annotations

import contextlib
import os
import re
import tempfile
from pathlib import Path

import numpy as np

from monitor.card import ModelCard
from monitor.errors import ModelError

INSTALL_HINT = ("the microcontroller runtime needs the tflite-micro package: "
                ".venv/bin/pip install 'scenemon[micro]' (or pip install tflite-micro)")
MIN_ARENA = 64 * 1024  # an arena under about 500 bytes crashes the interpreter outright
MAX_ARENA = 512 * 1024 * 1024


def import_micro():
    """The ``tflite_micro.runtime`` module, imported only when the micro runtime is asked for.

    Raises
    ------
    ModelError
        The optional ``tflite-micro`` package is not installed (the message says how to get it).
    """
    try:
        from tflite_micro import runtime
    except ImportError:
        raise ModelError(INSTALL_HINT) from None
    return runtime


@contextlib.contextmanager
def capture_fd2():
    """Collect what native code writes on file descriptor 2 while the block runs."""
    box = {"text": ""}
    saved = os.dup(2)
    with tempfile.TemporaryFile() as tmp:
        os.dup2(tmp.fileno(), 2)
        try:
            yield box
        finally:
            os.dup2(saved, 2)
            os.close(saved)
            tmp.seek(0)
            box["text"] = tmp.read().decode("utf-8", errors="replace")


def list_operators(data: bytes) -> list[str]:
    """The operator of every node of a `.tflite` flatbuffer, in order ("CONV_2D",
    "CUSTOM:FlexFoo"), read with the flatbuffer schema LiteRT ships (no interpreter)."""
    from ai_edge_litert import schema_py_generated as fb

    names = {v: k for k, v in vars(fb.BuiltinOperator).items() if not k.startswith("_")}
    model = fb.Model.GetRootAs(data, 0)
    codes = []
    for i in range(model.OperatorCodesLength()):
        oc = model.OperatorCodes(i)
        code = max(oc.BuiltinCode(), oc.DeprecatedBuiltinCode())
        name = names.get(code, str(code))
        if code == fb.BuiltinOperator.CUSTOM:
            name = "CUSTOM:" + (oc.CustomCode() or b"").decode()
        codes.append(name)
    out = []
    for s in range(model.SubgraphsLength()):
        sg = model.Subgraphs(s)
        for k in range(sg.OperatorsLength()):
            out.append(codes[sg.Operators(k).OpcodeIndex()])
    return out


def io_counts(data: bytes) -> tuple[int, int]:
    """Inputs and outputs of the main subgraph."""
    from ai_edge_litert import schema_py_generated as fb

    sg = fb.Model.GetRootAs(data, 0).Subgraphs(0)
    return sg.InputsLength(), sg.OutputsLength()


def load_interpreter(path: Path, data: bytes):
    """A microcontroller interpreter for `data`, with the smallest arena size tried that
    works (starting generously, growing when the log says it is short)."""
    rt = import_micro()
    arena = max(MIN_ARENA, 16 * len(data))
    while True:
        with capture_fd2() as log:
            try:
                interp = rt.Interpreter.from_bytes(bytes(data), arena_size=arena)
                err = None
            except (RuntimeError, ValueError, TypeError) as exc:
                interp, err = None, exc
            except Exception as exc:  # noqa: BLE001 - a malformed flatbuffer (struct.error)
                interp, err = None, exc
        if err is None:
            return interp
        text = log["text"]
        missing = re.findall(r"Didn't find op for builtin opcode '(\w+)'", text)
        if missing:
            raise ModelError(f"{path}: the microcontroller runtime has no kernel for the "
                             f"operator {missing[0]}; replace that layer before it can run on "
                             f"the board") from None
        if "CUSTOM" in text:
            customs = [o for o in list_operators(data) if o.startswith("CUSTOM:")]
            name = customs[0][7:] if customs else "a custom operator"
            raise ModelError(f"{path}: the microcontroller runtime cannot run the custom "
                             f"operator {name} (a TensorFlow op outside the built-in set)") from None
        if ("Failed to resize buffer" in text or "Failed to allocate" in text) \
                and arena < MAX_ARENA:
            arena *= 4
            continue
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise ModelError(f"{path}: cannot be loaded in the microcontroller runtime "
                         f"({first[:160]})") from None


def arena_used_bytes(interp) -> int:
    """The arena bytes the interpreter recorded using (its allocation recording)."""
    with capture_fd2() as log:
        interp.print_allocations()
    m = re.search(r"Arena allocation total (\d+) bytes", log["text"])
    if not m:
        raise ModelError("the microcontroller runtime did not report its arena use")
    return int(m.group(1))


class MicroRunner:
    """A float or int8 `.tflite` model in the microcontroller interpreter (module docstring).

    Evaluates one window per ``invoke`` with a fixed batch-1 input, like the other runners.
    """

    def __init__(self, path: Path, card: ModelCard) -> None:
        from monitor.runners import _Base, file_sha256

        data = Path(path).read_bytes()
        self.path = Path(path)
        self.card = card
        n_in, n_out = io_counts(data)
        interp = load_interpreter(self.path, data)
        ins = interp.get_input_details(0) if n_in else {}
        outs = interp.get_output_details(0) if n_out else {}
        shape = tuple(int(v) for v in ins.get("shape", ()))[1:]
        n_outputs = int(outs["shape"][-1]) if n_out else 0
        _Base.check_io(self.path, card, shape, n_outputs, n_in, n_out)
        self.input_shape, self.n_outputs = shape, n_outputs
        self._one_shape = (1, *shape)
        self.sha256 = file_sha256(self.path)
        self.interp = interp
        self.in_dtype, self.out_dtype = np.dtype(ins["dtype"]), np.dtype(outs["dtype"])
        qi, qo = ins["quantization_parameters"], outs["quantization_parameters"]
        self.in_scale = float(qi["scales"][0]) if len(qi["scales"]) else 0.0
        self.in_zero = int(qi["zero_points"][0]) if len(qi["zero_points"]) else 0
        self.out_scale = float(qo["scales"][0]) if len(qo["scales"]) else 0.0
        self.out_zero = int(qo["zero_points"][0]) if len(qo["zero_points"]) else 0
        self.model_kind = "tflite-int8" if self.in_dtype == np.int8 else "tflite-float"
        self.runtime = "micro"
        self.arena_bytes = arena_used_bytes(interp)
        self.operators = list_operators(data)
        _Base.check_outputs(self)

    # the same quantisation rules as LiteRT's runner (TFLite int8 quantization spec)
    def quantize_input(self, x: np.ndarray) -> np.ndarray:
        """Features in the input tensor's type (int8: quantised with its scale and zero point).

        For int8, ``q = clip(round(x / scale) + zero_point, -128, 127)``: the same rule as
        LiteRT's runner (the TFLite int8 quantization specification), so both runtimes are given
        identical int8 inputs.
        """
        if self.in_dtype != np.int8:
            return np.asarray(x, self.in_dtype)
        q = np.round(np.asarray(x, np.float32) / np.float32(self.in_scale)) + self.in_zero
        return np.clip(q, -128, 127).astype(np.int8)

    def dequantize_output(self, q: np.ndarray) -> np.ndarray:
        """The output tensor as float32: ``scale * (q - zero_point)`` for int8, else a cast."""
        if self.out_dtype != np.int8:
            return q.astype(np.float32)
        return np.float32(self.out_scale) * (q.astype(np.float32) - self.out_zero)

    def raw(self, feature: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """One window's raw input and output tensors (int8 for an int8 model)."""
        q = self.quantize_input(np.asarray(feature, np.float32).reshape(self._one_shape))
        self.interp.set_input(q, 0)  # before every invoke: the arena reuses the input buffer
        self.interp.invoke()
        return q.reshape(-1), self.interp.get_output(0).reshape(-1)

    def predict(self, features: np.ndarray) -> np.ndarray:
        """Probabilities ``(n, n_outputs)``, float32, for features ``(n, *card.feature_shape)``.

        One ``invoke`` per window at batch 1, like the other runners; a ``"logits"`` card's
        outputs go through a softmax.
        """
        feats = np.asarray(features, np.float32)
        out = np.empty((feats.shape[0], self.n_outputs), np.float32)
        for i in range(feats.shape[0]):
            _, y = self.raw(feats[i])
            out[i] = self.dequantize_output(y)
        from monitor.runners import softmax

        return softmax(out) if self.card.output == "logits" else out
