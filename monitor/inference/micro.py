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
names the operator: `MicroRunner` raises `UnsupportedOperator`, one sentence that carries
the operator's name.

The package has no call that returns that log: it goes to file descriptor 2 with C stdio.
Pointing this process's fd 2 elsewhere to read it would also take whatever other threads
write there meanwhile, and the terminal UI draws its screen on fd 2 (textual's Linux driver
writes to ``sys.__stderr__`` from its own thread) while the model loads on the session
worker. So a child process loads the model first (`probe`), its fd 2 a pipe read here: it
finds an arena that works, reads the recorded figure and names what fails. The model is
then loaded in this process with that arena, which prints nothing, and fd 2 is never
touched here.

Thread: the runner is owned by the engine's compute thread.
"""

from __future__ import annotations

import re
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from monitor.base.errors import ModelError
from monitor.features.card import ModelCard
from monitor.inference.base import RunnerBase, file_sha256, softmax

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

    Returns
    -------
    module
        ``tflite_micro.runtime``.
    """
    try:
        from tflite_micro import runtime
    except ImportError:
        raise ModelError(INSTALL_HINT) from None
    return runtime


class UnsupportedOperator(ModelError):
    """The microcontroller runtime has no kernel for one of the model's operators.

    ``operator`` is its name as `list_operators` spells it ("GELU"; "CUSTOM:FlexErf" for a
    custom operator); the message is the one sentence the command prints.

    Parameters
    ----------
    message : str
        The sentence shown to the user.
    operator : str
        The operator's name.
    """

    def __init__(self, message: str, operator: str) -> None:
        super().__init__(message)
        self.operator = operator


def list_operators(data: bytes) -> list[str]:
    """The operator of every node of a `.tflite` flatbuffer, in order ("CONV_2D",
    "CUSTOM:FlexFoo"), read with the flatbuffer schema LiteRT ships (no interpreter).

    Parameters
    ----------
    data : bytes
        The ``.tflite`` file.

    Returns
    -------
    list of str
        One operator name per node.
    """
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
    """Inputs and outputs of the main subgraph.

    Parameters
    ----------
    data : bytes
        The ``.tflite`` file.

    Returns
    -------
    inputs, outputs : int
        Tensors of each.
    """
    from ai_edge_litert import schema_py_generated as fb

    sg = fb.Model.GetRootAs(data, 0).Subgraphs(0)
    return sg.InputsLength(), sg.OutputsLength()


PROBE_TIMEOUT_S = 300.0
# The child's whole program: load at the arena size given, then print the allocation record.
# A failure's log is already on its fd 2; the last line says what Python raised.
_PROBE = """\
import sys
from tflite_micro import runtime
try:
    interp = runtime.Interpreter.from_bytes(sys.stdin.buffer.read(), arena_size=int(sys.argv[1]))
except Exception as exc:
    lines = str(exc).strip().splitlines() or [type(exc).__name__]
    sys.stderr.write("\\nprobe failed: " + lines[0] + "\\n")
    sys.exit(3)
interp.print_allocations()
"""


@dataclass(frozen=True)
class Probe:
    """What a child process found loading a model in the microcontroller interpreter.

    Attributes
    ----------
    arena_size : int
        The tensor arena the model loaded with, in bytes.
    recorded_bytes : int
        What the interpreter recorded it used, in bytes.
    """

    arena_size: int  # an arena size the model loads with
    recorded_bytes: int  # the interpreter's allocation recording: the arena it used


def _run_probe(path: Path, data: bytes, arena: int) -> tuple[int, str]:
    """The child's exit code and everything it wrote on fd 2 (the interpreter's log)."""
    if not sys.executable:
        raise ModelError(f"{path}: no Python executable to load the model in the "
                         f"microcontroller runtime with")
    try:
        # -I: the child does not put the current folder first on its path (a file named
        # like the interpreter's package there must not run), nor read PYTHON* variables
        r = subprocess.run([sys.executable, "-I", "-c", _PROBE, str(arena)], input=bytes(data),
                           capture_output=True, timeout=PROBE_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        raise ModelError(f"{path}: the microcontroller runtime took over {PROBE_TIMEOUT_S:g} s "
                         f"to load the model") from None
    except OSError as exc:
        raise ModelError(f"{path}: cannot start a process to load the model in the "
                         f"microcontroller runtime ({exc.strerror or exc})") from None
    return r.returncode, r.stderr.decode("utf-8", errors="replace")


def probe(path: Path, data: bytes) -> Probe:
    """Load `data` in the microcontroller interpreter in a child process (module docstring).

    Starts with a generous arena and grows it while the log says it is short.

    Parameters
    ----------
    path : Path
        The model file, named in messages.
    data : bytes
        Its flatbuffer.

    Returns
    -------
    Probe
        An arena size that works and the arena the interpreter recorded using.

    Raises
    ------
    UnsupportedOperator
        The runtime has no kernel for one of the model's operators (builtin or custom).
    ModelError
        Any other failure to load (a malformed flatbuffer, a crash of the interpreter).
    """
    arena = max(MIN_ARENA, 16 * len(data))
    while True:
        code, text = _run_probe(path, data, arena)
        if code == 0:
            m = re.search(r"Arena allocation total (\d+) bytes", text)
            if not m:
                raise ModelError(f"{path}: the microcontroller runtime did not report its "
                                 f"arena use")
            return Probe(arena, int(m.group(1)))
        missing = re.findall(r"Didn't find op for builtin opcode '(\w+)'", text)
        if missing:
            raise UnsupportedOperator(
                f"{path}: the microcontroller runtime has no kernel for the operator "
                f"{missing[0]}; replace that layer before it can run on the board", missing[0])
        if "CUSTOM" in text:
            customs = [o for o in list_operators(data) if o.startswith("CUSTOM:")]
            name = customs[0] if customs else "CUSTOM"
            raise UnsupportedOperator(
                f"{path}: the microcontroller runtime cannot run the custom operator "
                f"{name[7:] or 'without a name'} (a TensorFlow op outside the built-in set)",
                name)
        if "allocate" in text and is_hybrid(data):
            from monitor.base import native

            said = re.findall(r"probe failed: (.*)", text)
            own = f" (the runtime said: {said[-1].strip()})" if native.DEBUG and said else ""
            raise ModelError(
                f"{path}: a dynamic-range (\"hybrid\") int8 model: int8 weights with float "
                f"activations, which the microcontroller runtime does not run; make a "
                f"full-integer model (int8 weights, activations, input and output) with "
                f"scenemon quantize, or run this one with --runtime litert{own}")
        if ("Failed to resize buffer" in text or "Failed to allocate" in text) \
                and arena < MAX_ARENA:
            arena *= 4
            continue
        if code < 0:  # killed by a signal: the interpreter crashed on this flatbuffer
            raise ModelError(f"{path}: cannot be loaded in the microcontroller runtime (the "
                             f"interpreter crashed on it, signal {-code})")
        said = re.findall(r"probe failed: (.*)", text)
        first = said[-1].strip() if said else f"exit code {code}"
        first = first.replace("TFLM ", "the runtime ")  # the name the README uses
        raise ModelError(f"{path}: cannot be loaded in the microcontroller runtime "
                         f"({first[:160]})")


def is_hybrid(data: bytes) -> bool:
    """True for a dynamic-range ("hybrid") quantised model: a convolution or fully connected
    layer whose weights are int8 while its input is float32.

    Parameters
    ----------
    data : bytes
        The ``.tflite`` file.

    Returns
    -------
    bool
        Whether such a layer exists (read with the flatbuffer schema, no interpreter).
    """
    from ai_edge_litert import schema_py_generated as fb

    try:
        model = fb.Model.GetRootAs(data, 0)
        sg = model.Subgraphs(0)
        ops = list_operators(data)
        for i in range(sg.OperatorsLength()):
            op = sg.Operators(i)
            if ops[op.OpcodeIndex()] not in ("FULLY_CONNECTED", "CONV_2D",
                                             "DEPTHWISE_CONV_2D"):
                continue
            ins = op.InputsAsNumpy()
            if len(ins) < 2 or ins[0] < 0 or ins[1] < 0:
                continue
            x, w = sg.Tensors(int(ins[0])), sg.Tensors(int(ins[1]))
            if x.Type() == fb.TensorType.FLOAT32 and w.Type() == fb.TensorType.INT8:
                return True
    except Exception:  # noqa: BLE001 - a damaged flatbuffer: not this case
        return False
    return False


class MicroRunner:
    """A float or int8 `.tflite` model in the microcontroller interpreter (module docstring).

    Evaluates one window per ``invoke`` with a fixed batch-1 input, like the other runners.

    Parameters
    ----------
    path : Path
        The model file.
    card : ModelCard
        The card the model must fit (input shape, output size, output kind).

    Raises
    ------
    ModelError
        The runtime cannot load the model (an operator it has no kernel for, a damaged file),
        or the model does not fit its card.
    """

    def __init__(self, path: Path, card: ModelCard) -> None:
        data = Path(path).read_bytes()
        self.path = Path(path)
        self.card = card
        n_in, n_out = io_counts(data)
        rt = import_micro()
        found = probe(self.path, data)  # in a child: this process's fd 2 is left alone
        try:
            interp = rt.Interpreter.from_bytes(bytes(data), arena_size=found.arena_size)
        except Exception as exc:  # noqa: BLE001 - loaded in the child, so not expected here
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            raise ModelError(f"{self.path}: cannot be loaded in the microcontroller runtime "
                             f"({first[:160]})") from None
        ins = interp.get_input_details(0) if n_in else {}
        outs = interp.get_output_details(0) if n_out else {}
        shape = tuple(int(v) for v in ins.get("shape", ()))[1:]
        n_outputs = int(outs["shape"][-1]) if n_out else 0
        RunnerBase.check_io(self.path, card, shape, n_outputs, n_in, n_out)
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
        self.arena_bytes = found.recorded_bytes
        self.operators = list_operators(data)
        RunnerBase.check_outputs(self)

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
        return softmax(out) if self.card.output == "logits" else out
