"""`scenemon budget`: what a model and its front end cost on the target, each figure with
where it comes from.

- RAM: the interpreter's arena as the microcontroller runtime records it (its allocation
  recording; measured on this machine, so pointer-sized parts differ a little on a 32-bit
  part), the front end's static buffers (`frontend.c`'s arrays for this card), one window
  of int16 PCM and the feature tensor the caller holds, and the total.
- flash: the model flatbuffer, the front end's constant tables (window, mel table, scaling),
  and the total.
- operators: every node's operator, and the ones the microcontroller runtime cannot run
  (found by loading the model there: the most common reason a model never reaches a board).
- work per window: multiply-accumulates of each layer, the usual count ``H_out * W_out *
  C_out * K_h * K_w * C_in / groups`` (a fully connected layer: inputs x outputs; pooling
  and mean layers: their comparisons or additions, listed but not MACs), and the front end's
  operations per hop (FFT butterflies, mel weights, logs). With a clock, a duty-cycle
  estimate from a cycles-per-operation figure that is an assumption, not a measurement.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
import textwrap
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from monitor.assembly.plan import ModelPlan
from monitor.base.errors import ExitCode, ModelError, ScenemonError
from monitor.features.card import ModelCard
from monitor.inference.base import Runner, RunnerBase

# Assumptions for the duty-cycle estimate (common practice for Cortex-M class parts with
# SIMD kernels; not measured here): cycles per int8 MAC, per float MAC, per front-end op.
CYCLES_PER_INT8_MAC = 1.0
CYCLES_PER_FLOAT_MAC = 2.0
CYCLES_PER_FRONTEND_OP = 2.0
WIDTH = 80  # columns of the printed budget: every line fits a standard terminal


@dataclass
class Layer:
    """One node of the model: its operator, shapes and work per window (see module docstring).

    ``filter`` is the weight tensor's shape for convolutions and fully connected layers, else
    None; ``other_ops`` counts the comparisons of pooling or the additions of a mean.

    Attributes
    ----------
    index : int
        The node's place in execution order.
    op : str
        Its operator.
    input, output : tuple of int
        Shapes of its first input and its output.
    filter : tuple of int or None
        The weight tensor's shape, for convolutions and fully connected layers.
    macs : int
        Multiply-accumulates per window.
    other_ops : int
        Other operations per window.
    """

    index: int
    op: str
    input: tuple[int, ...]
    output: tuple[int, ...]
    filter: tuple[int, ...] | None
    macs: int  # multiply-accumulates (0 for layers without them)
    other_ops: int = 0  # comparisons (pooling) or additions (mean)


@dataclass
class Budget:
    """What a model and its front end cost on the target, as `budget` measured and counted it.

    ``arena_bytes`` is None when the model does not load in the microcontroller runtime
    (``unsupported_ops`` then names the operator). ``frontend_ram`` also holds the caller's
    buffers (one window of int16 PCM, the feature tensor), not only the front end's own.

    Attributes
    ----------
    model : str
        The model file's name.
    runtime : str
        The runtime measured ("micro").
    arena_bytes : int or None
        The interpreter's recorded arena.
    frontend_ram, frontend_flash : dict
        Bytes of the front end's buffers and tables, by name.
    model_bytes : int
        The flatbuffer's size.
    layers : list of Layer
        Every node.
    ops, unsupported_ops : list of str
        The model's operators, and those the microcontroller runtime has no kernel for.
    frontend_ops_per_hop : dict
        The front end's operations per hop, by stage.
    hop_s : float
        Seconds per hop.
    int8 : bool
        The model's input is int8.
    notes : list of str
        What the figures rest on.
    """

    model: str
    runtime: str
    arena_bytes: int | None
    frontend_ram: dict[str, int]
    frontend_flash: dict[str, int]
    model_bytes: int
    layers: list[Layer]
    ops: list[str]
    unsupported_ops: list[str]
    frontend_ops_per_hop: dict[str, int]
    hop_s: float
    int8: bool
    notes: list[str] = field(default_factory=list)

    @property
    def macs(self) -> int:
        """Multiply-accumulates of one inference (all layers)."""
        return sum(x.macs for x in self.layers)

    @property
    def ram_bytes(self) -> int:
        """RAM in all: the arena (0 when unknown) and every entry of ``frontend_ram``."""
        return (self.arena_bytes or 0) + sum(self.frontend_ram.values())

    @property
    def flash_bytes(self) -> int:
        """Flash in all: the model flatbuffer and the front end's constant tables."""
        return self.model_bytes + sum(self.frontend_flash.values())

    def duty_cycle(self, clock_mhz: float) -> dict[str, float]:
        """An estimate of the share of the core one hop's work takes at `clock_mhz`.

        One inference plus the front end's operations per hop, at the assumed cycles per MAC (int8
        or float) and per front-end operation, over the cycles of one hop. An assumption, not a
        measurement.

        Parameters
        ----------
        clock_mhz : float
            The core clock in MHz, > 0.

        Returns
        -------
        dict
            The clock, the cycle figures assumed, the model's and the front end's cycles, and
            ``duty_cycle`` (a fraction; above 1 the core cannot keep up).
        """
        cpm = CYCLES_PER_INT8_MAC if self.int8 else CYCLES_PER_FLOAT_MAC
        model_cycles = self.macs * cpm
        fe_cycles = sum(self.frontend_ops_per_hop.values()) * CYCLES_PER_FRONTEND_OP
        per_hop = model_cycles + fe_cycles
        budget = clock_mhz * 1e6 * self.hop_s
        return {"clock_mhz": clock_mhz, "cycles_per_mac_assumed": cpm,
                "cycles_per_frontend_op_assumed": CYCLES_PER_FRONTEND_OP,
                "model_cycles": model_cycles, "frontend_cycles": fe_cycles,
                "duty_cycle": per_hop / budget}

    def to_dict(self, clock_mhz: float | None = None) -> dict[str, Any]:
        """The budget as JSON-ready data (``budget --json``); with a clock, its estimate too."""
        d = {"model": self.model, "runtime": self.runtime, "arena_bytes": self.arena_bytes,
             "ram_bytes": self.ram_bytes, "flash_bytes": self.flash_bytes,
             "model_bytes": self.model_bytes, "macs": self.macs, "ops": self.ops,
             "unsupported_ops": self.unsupported_ops, "frontend_ram": self.frontend_ram,
             "frontend_flash": self.frontend_flash,
             "frontend_ops_per_hop": self.frontend_ops_per_hop,
             "layers": [vars(x) for x in self.layers], "notes": self.notes}
        if clock_mhz:
            d["estimate"] = self.duty_cycle(clock_mhz)
        return d


def layers_of(path: Path) -> list[Layer]:
    """Every node of a `.tflite` model with its shapes and work (see module docstring).

    Parameters
    ----------
    path : Path
        The ``.tflite`` model.

    Returns
    -------
    list of Layer
        In execution order.

    Raises
    ------
    ModelError
        The file's operators cannot be read (a damaged file).
    """
    from ai_edge_litert import schema_py_generated as fb
    from ai_edge_litert.interpreter import Interpreter, OpResolverType

    from monitor.base.native import litert_nodes, quiet_native_stderr

    try:  # a damaged file can pass a loader and fail while its nodes are read
        with quiet_native_stderr():
            interp = Interpreter(model_path=str(path), experimental_op_resolver_type=
                                 OpResolverType.BUILTIN_WITHOUT_DEFAULT_DELEGATES)
        tensors = {t["index"]: tuple(int(v) for v in t["shape"])
                   for t in interp.get_tensor_details()}
        nodes = litert_nodes(interp)
    except (ValueError, RuntimeError, IndexError) as exc:  # UnicodeDecodeError too
        raise ModelError(f"{path}: its operators cannot be read "
                         f"({type(exc).__name__}); is the file damaged?") from None
    model = fb.Model.GetRootAs(Path(path).read_bytes(), 0)
    sg = model.Subgraphs(0)
    out = []
    for k, op in enumerate(nodes):
        name = op["op_name"]
        ins = [int(i) for i in op["inputs"] if int(i) >= 0]
        outs = [int(i) for i in op["outputs"]]
        x = tensors.get(ins[0], ()) if ins else ()
        y = tensors.get(outs[0], ()) if outs else ()
        w = tensors.get(ins[1]) if len(ins) > 1 and name in (
            "CONV_2D", "DEPTHWISE_CONV_2D", "FULLY_CONNECTED") else None
        macs = other = 0
        if name == "CONV_2D" and w:  # filter (C_out, K_h, K_w, C_in)
            macs = math.prod(y[1:]) * w[1] * w[2] * w[3]
        elif name == "DEPTHWISE_CONV_2D" and w:  # filter (1, K_h, K_w, C_out): groups = C_in
            macs = math.prod(y[1:]) * w[1] * w[2]
        elif name == "FULLY_CONNECTED" and w:  # filter (outputs, inputs)
            macs = (math.prod(y) // max(1, w[0])) * w[0] * w[1]
        elif name in ("MAX_POOL_2D", "AVERAGE_POOL_2D"):
            node = sg.Operators(k)
            opt = fb.Pool2DOptions()
            table = node.BuiltinOptions()
            if table is not None:
                opt.Init(table.Bytes, table.Pos)
                other = math.prod(y[1:]) * opt.FilterHeight() * opt.FilterWidth()
        elif name == "MEAN":
            other = math.prod(x[1:]) if x else 0
        out.append(Layer(k, name, x, y, w, int(macs), int(other)))
    return out


def frontend_ops_per_hop(card: ModelCard) -> dict[str, int]:
    """Operations the front end does for each new hop of audio, stage by stage (frames shared
    across windows computed once, as the streaming C call does).

    Parameters
    ----------
    card : ModelCard
        The card.

    Returns
    -------
    dict
        Operation name to count per hop.
    """

    stages = card.stages()
    framing = next((s for s in stages if s.name == "framing"), None)
    new = 0
    if framing is not None:
        lo, hi = framing.shared
        new = framing.frames - (hi - lo + 1 - framing.share_step if framing.share_step else 0)
    out: dict[str, int] = {}
    for s in stages:
        if s.active:
            out.update(s.ops(new))
    return out


def _check_without_interpreter(path: Path, data: bytes, card: ModelCard) -> bool:
    """For a model the micro runtime cannot load: refuse it when it does not fit `card` (the
    runners' rule, from the flatbuffer's tensor shapes); True when its input is int8."""
    from ai_edge_litert import schema_py_generated as fb

    sg = fb.Model.GetRootAs(data, 0).Subgraphs(0)
    n_in, n_out = sg.InputsLength(), sg.OutputsLength()
    x = sg.Tensors(sg.Inputs(0)) if n_in else None
    y = sg.Tensors(sg.Outputs(0)) if n_out else None
    shape = tuple(int(v) for v in x.ShapeAsNumpy())[1:] if x is not None else ()
    n_outputs = int(y.ShapeAsNumpy()[-1]) if y is not None and y.ShapeLength() else 0
    RunnerBase.check_io(path, card, shape, n_outputs, n_in, n_out)
    return x is not None and x.Type() == fb.TensorType.INT8


def budget(plan: ModelPlan, card: ModelCard, *, runner: Runner | None = None) -> Budget:
    """Measure and count what `plan`'s model costs on the target (see module docstring).

    Parameters
    ----------
    plan : ModelPlan
        The ``.tflite`` model (its ``runtime`` aside: the budget is the microcontroller's).
    card : ModelCard
        Its card.
    runner : Runner, optional
        The model already loaded in the microcontroller runtime (``vectors`` passes its own);
        otherwise it is loaded here, once, through `assemble.load_model`.

    Returns
    -------
    Budget
        The figures.

    Raises
    ------
    ModelError
        Not a ``.tflite`` model, or one that does not load for another reason than an
        operator the runtime lacks (that one is recorded in ``unsupported_ops``), or does
        not fit its card.
    """
    from monitor.assembly.assemble import load_model
    from monitor.device.constants import c_buffers, c_tables
    from monitor.inference.micro import UnsupportedOperator, list_operators

    path = plan.path
    if path.suffix.lower() != ".tflite":
        raise ModelError(f"{path}: budget needs the .tflite model the board will run")
    unsupported, notes = [], []
    if runner is None or runner.runtime != "micro":
        try:
            runner = load_model(dataclasses.replace(plan, runtime="micro"), card).runner
        except UnsupportedOperator as exc:
            runner = None
            unsupported, notes = [exc.operator], [str(exc)]
    data = path.read_bytes()
    int8 = runner.model_kind == "tflite-int8" if runner is not None \
        else _check_without_interpreter(path, data, card)
    arena = getattr(runner, "arena_bytes", None)
    ram = {f"front end: {k}": v for k, v in c_buffers(card).items()}
    ram["one window of int16 PCM"] = 2 * card.window_samples
    ram["feature tensor (float32)"] = 4 * int(np.prod(card.feature_shape))
    flash = {f"front end: {k}": v for k, v in c_tables(card).items()}
    return Budget(path.name, "micro", arena, ram, flash, len(data), layers_of(path),
                  list_operators(data), unsupported, frontend_ops_per_hop(card), card.hop_s,
                  int8, notes)


def _row(name: str, value: object, tail: str = "", *, width: int = 30) -> list[str]:
    """A table row: the name, the figure right-aligned, then where it comes from. A name
    longer than its column gets a line of its own above the figure (nothing is cut)."""
    head: list[str] = []
    if len(name) > width:
        head, name = [f"  {name}"], ""
    return head + [f"  {name:<{width}} {value!s:>10}   {tail}".rstrip()]


def _wrapped(text: str, first: str, rest: str) -> list[str]:
    """`text` wrapped to `WIDTH` columns after `first` (then `rest`); names are never split."""
    return textwrap.wrap(text, WIDTH, initial_indent=first, subsequent_indent=rest,
                         break_long_words=False, break_on_hyphens=False)


def _cycles(n: float) -> str:
    return f"{n:g} cycle{'' if n == 1 else 's'}"


def budget_text(b: Budget, clock_mhz: float | None = None) -> str:
    """The budget as tables for the terminal, every line at most `WIDTH` columns.

    Each RAM and flash figure with where it comes from, the work per layer and per hop, the
    operators (and those the runtime cannot run), and the estimate when a clock is given,
    its assumed cycle figures on a line of their own.

    Parameters
    ----------
    b : Budget
        The figures.
    clock_mhz : float, optional
        The target's clock, for a duty-cycle estimate.

    Returns
    -------
    str
        The tables.
    """
    def kb(n: int | None) -> str:
        return "-" if n is None else f"{n / 1024:,.1f} KiB"

    lines = _wrapped(f"budget of {b.model} (microcontroller runtime)", "", "  ")
    lines += ["", *_row("RAM", "bytes", "from")]
    arena = "-" if b.arena_bytes is None else str(b.arena_bytes)
    lines += _row("interpreter arena", arena, "the runtime's allocation record")
    for k, v in b.frontend_ram.items():
        name, where = (k[len("front end: "):], "frontend.c") if k.startswith("front end: ") \
            else (k, "the caller")
        lines += _row(name, v, where)
    lines += _row("total", b.ram_bytes, f"({kb(b.ram_bytes)})")
    lines += ["", *_row("flash", "bytes", "from")]
    lines += _row("model flatbuffer", b.model_bytes, "the .tflite file")
    for k, v in b.frontend_flash.items():
        lines += _row(k[len("front end: "):], v, "frontend_constants.h")
    lines += _row("total", b.flash_bytes, f"({kb(b.flash_bytes)})")
    lines += ["", "work per window                 MACs   other   shapes (in -> out)"]
    for x in b.layers:
        op = x.op
        if len(op) > 20:
            lines.append(f"  {x.index:>2} {op}")
            op = ""
        row = f"  {x.index:>2} {op:<20} {x.macs:>10} {x.other_ops:>7}"
        shape = f"{'x'.join(map(str, x.input[1:]))} -> {'x'.join(map(str, x.output[1:]))}"
        if len(row) + 3 + len(shape) <= WIDTH:
            lines.append(f"{row}   {shape}".rstrip())
        else:
            lines += [row, f"{'':8}{shape}"]
    lines += _row("model total", b.macs, width=23)
    lines += ["", "front end per hop"]
    for k, v in b.frontend_ops_per_hop.items():
        lines += _row(k, v, width=34)
    lines += ["", *_wrapped(", ".join(sorted(set(b.ops))), "operators  ", " " * 11)]
    if b.unsupported_ops:
        lines += _wrapped(f"NOT RUNNABLE on the microcontroller runtime: "
                          f"{', '.join(b.unsupported_ops)}", "", "  ")
    else:
        lines.append("           all run in the microcontroller runtime")
    if clock_mhz:
        d = b.duty_cycle(clock_mhz)
        mac = "int8 MAC" if b.int8 else "float MAC"
        lines += ["", f"estimate at {clock_mhz:g} MHz",
                  f"  assumed, not measured: {_cycles(d['cycles_per_mac_assumed'])} per {mac}, "
                  f"{_cycles(d['cycles_per_frontend_op_assumed'])} per front-end operation",
                  f"  {d['model_cycles'] + d['frontend_cycles']:,.0f} cycles per hop of "
                  f"{b.hop_s * 1000:g} ms: about {d['duty_cycle']:.1%} of the core"]
    return "\n".join(lines) + "\n"


def run_budget(plan: ModelPlan, *, clock_mhz: float | None, as_json: bool) -> int:
    """`scenemon budget`; exit 1 when the model cannot run in the microcontroller runtime.

    Parameters
    ----------
    plan : ModelPlan
        The ``.tflite`` model.
    clock_mhz : float or None
        The target's clock in MHz.
    as_json : bool
        Print JSON.

    Returns
    -------
    int
        0, or 1 when the model cannot run in the microcontroller runtime.

    Raises
    ------
    ScenemonError
        A clock that is not above 0, or a model or card that cannot be used.
    """
    from monitor.assembly.assemble import card_of

    card = card_of(plan)
    if clock_mhz is not None and not clock_mhz > 0:
        raise ScenemonError(f"--clock-mhz {clock_mhz} must be above 0")
    b = budget(plan, card)
    sys.stdout.write(json.dumps(b.to_dict(clock_mhz), indent=2) + "\n" if as_json
                     else budget_text(b, clock_mhz))
    if b.unsupported_ops:
        sys.stderr.write(f"scenemon: {b.notes[0]}\n")
        return ExitCode.FAILURE
    return ExitCode.OK
