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
- per core (``--target``, `target_figures`): the front end cross-compiled for each Cortex-M
  core (``monitor.device.target``): its object's flash and RAM (measured: the object's
  sections), its instructions per hop and per window (counted in emulation: instructions,
  not cycles), and the model's cycles from per-kernel figures per core (recalled, each
  saying so); with a clock a duty-cycle table per core, beside the estimate above.
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
from monitor.device.target.cores import Core
from monitor.features.card import ModelCard
from monitor.inference.base import Runner, RunnerBase

# Assumptions for the duty-cycle estimate (common practice for Cortex-M class parts with
# SIMD kernels; not measured here): cycles per int8 MAC, per float MAC, per front-end op.
CYCLES_PER_INT8_MAC = 1.0
CYCLES_PER_FLOAT_MAC = 2.0
CYCLES_PER_FRONTEND_OP = 2.0
# per core: cycles per counted instruction (assumed, common practice for a single-issue
# Cortex-M pipeline: most instructions take one cycle, loads, divides and taken branches
# more, the M7's dual issue less)
CYCLES_PER_INSTRUCTION = 1.0
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
    targets : list of TargetFigures
        Per core, with ``--target``.
    frontend_source : str
        The C front end whose buffers and tables the figures are (``frontend.c`` or
        ``frontend_q15.c``).
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
    targets: list[TargetFigures] = field(default_factory=list)
    frontend_source: str = "frontend.c"  # or frontend_q15.c: whose buffers and tables these are

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
        if self.targets:
            d["targets"] = [t.to_dict(self, clock_mhz) for t in self.targets]
        return d


@dataclass(frozen=True, kw_only=True)
class TargetFigures:
    """The front end on one Cortex-M core: measured flash and RAM, counted instructions.

    Attributes
    ----------
    core : Core
        The core (its board, FPU and per-kernel figures).
    flash, ram : int
        Bytes of the cross-compiled ``frontend.o``: text and data (flash), data and bss
        (static RAM), measured from its sections.
    linked_flash : int
        Bytes of flash the front end adds to a linked program, the library routines it calls
        included (`cross.linked_flash`: two programs measured).
    hop_instructions : int or None
        Instructions of a steady `sm_push_hop` (one after the first window), counted in
        emulation; None when the counted samples hold fewer than two windows of the stream.
    window_instructions : int
        Instructions of `sm_features_i16` on one window, counted.
    resolution : float
        The counts are good to about this many instructions (one SysTick tick).
    """

    core: Core
    flash: int
    ram: int
    linked_flash: int
    hop_instructions: int | None
    window_instructions: int
    resolution: float

    @property
    def per_hop(self) -> float:
        """Counted instructions per hop: a steady hop, or a whole window without one."""
        return self.hop_instructions if self.hop_instructions is not None \
            else self.window_instructions

    def duty_cycle(self, b: Budget, clock_mhz: float) -> dict[str, float]:
        """Front end and model per hop on this core at `clock_mhz`, against the hop's cycles.

        Front end: counted instructions x `CYCLES_PER_INSTRUCTION` (assumed); model: the
        model's MACs x the core's cycles per MAC (recalled).

        Parameters
        ----------
        b : Budget
            The model's figures (MACs, int8 or float, hop).
        clock_mhz : float
            The core clock in MHz, > 0.

        Returns
        -------
        dict
            ``frontend_cycles``, ``model_cycles``, ``cycles_per_hop`` (available) and
            ``duty_cycle`` (a fraction; above 1 the core cannot keep up).
        """
        cpm = self.core.int8_cycles_per_mac if b.int8 else self.core.float_cycles_per_mac
        fe = self.per_hop * CYCLES_PER_INSTRUCTION
        model = b.macs * cpm
        avail = clock_mhz * 1e6 * b.hop_s
        return {"clock_mhz": clock_mhz, "frontend_cycles": fe, "model_cycles": model,
                "cycles_per_mac_from_memory": cpm,
                "cycles_per_instruction_assumed": CYCLES_PER_INSTRUCTION,
                "cycles_per_hop": avail, "duty_cycle": (fe + model) / avail}

    def to_dict(self, b: Budget, clock_mhz: float | None = None) -> dict[str, Any]:
        """JSON-ready figures, each with how it was obtained; with a clock, the duty cycle."""
        c = self.core
        d: dict[str, Any] = {
            "core": c.name, "machine": c.machine, "fpu": c.fpu,
            "frontend_flash_bytes": self.flash, "frontend_ram_bytes": self.ram,
            "frontend_linked_flash_bytes": self.linked_flash,
            "flash_bytes": b.model_bytes + self.linked_flash,
            "ram_bytes": (b.arena_bytes or 0) + self.ram + b.frontend_ram.get(
                "one window of int16 PCM", 0) + b.frontend_ram.get("feature tensor (float32)", 0),
            "hop_instructions": self.hop_instructions,
            "window_instructions": self.window_instructions,
            "instructions_resolution": self.resolution,
            "int8_cycles_per_mac": c.int8_cycles_per_mac,
            "float_cycles_per_mac": c.float_cycles_per_mac,
            "how": {"frontend_flash_bytes": "measured: the object's sections",
                    "frontend_ram_bytes": "measured: the object's sections",
                    "frontend_linked_flash_bytes": "measured: two linked programs, with and "
                                                   "without the front end",
                    "arena_bytes": "recorded by the microcontroller runtime",
                    "hop_instructions": "counted in emulation (instructions, not cycles)",
                    "window_instructions": "counted in emulation (instructions, not cycles)",
                    "cycles_per_mac": c.mac_source,
                    "cycles_per_instruction": "assumed (common practice)"}}
        if clock_mhz:
            d["estimate"] = self.duty_cycle(b, clock_mhz)
        return d


def target_figures(card: ModelCard, cores: list[Core], *, work: Path | None = None
                   ) -> list[TargetFigures]:
    """Cross-compile `card`'s front end for each core: flash and RAM of its object, and its
    instructions counted in emulation (`monitor.device.target`).

    Parameters
    ----------
    card : ModelCard
        The card (its ``frontend_constants.h`` is written for the build).
    cores : list of Core
        The cores.
    work : Path, optional
        A folder for the builds (a temporary one by default).

    Returns
    -------
    list of TargetFigures
        One per core, in order.

    Raises
    ------
    ScenemonError
        The toolchain or QEMU is missing (one sentence naming the package to install).
    EmulationFailed
        A build, a run or a count failed.
    """
    import tempfile

    from monitor.device.constants import header
    from monitor.device.target.count import count_card
    from monitor.device.target.cross import (
        compile_object,
        find_toolchain,
        linked_flash,
        object_sizes,
    )

    tc = find_toolchain()
    with tempfile.TemporaryDirectory(prefix="scenemon-target-") as tmp:
        root = Path(work) if work is not None else Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        (root / "frontend_constants.h").write_text(header(card))
        from monitor.device import c_sources

        out = []
        for core in cores:
            obj = compile_object(core=core, source=c_sources(card)[0], include=[root],
                                 out=root / core.name / "frontend.o", toolchain=tc)
            sec = object_sizes(obj)
            linked = linked_flash(core=core, source=c_sources(card)[0],
                                  include=[root, c_sources(card)[0].parent],
                                  work=root / core.name, toolchain=tc)
            counts = count_card(card, core, work=root / core.name, toolchain=tc)
            hop = None if counts.hop is None else round(counts.hop)
            out.append(TargetFigures(core=core, flash=sec.flash, ram=sec.ram,
                                     linked_flash=linked,
                                     hop_instructions=hop,
                                     window_instructions=round(counts.window),
                                     resolution=round(counts.per_tick, 2)))
        return out


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
    if card.frontend.pcm.arithmetic == "micro-signal":  # the front end is a graph, not C
        from monitor.features.signalgraph import card_graph

        ram = {}
        flash = {"front end: the signal operators' graph": len(card_graph(card).model)}
    else:
        ram = {f"front end: {k}": v for k, v in c_buffers(card).items()}
        flash = {f"front end: {k}": v for k, v in c_tables(card).items()}
    ram["one window of int16 PCM"] = 2 * card.window_samples
    ram["feature tensor (float32)"] = 4 * int(np.prod(card.feature_shape))
    from monitor.device import c_sources

    return Budget(path.name, "micro", arena, ram, flash, len(data), layers_of(path),
                  list_operators(data), unsupported, frontend_ops_per_hop(card), card.hop_s,
                  int8, notes, frontend_source=c_sources(card)[0].name)


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
        name, where = (k[len("front end: "):], b.frontend_source) if k.startswith("front end: ") \
            else (k, "the caller")
        lines += _row(name, v, where)
    lines += _row("total", b.ram_bytes, f"({kb(b.ram_bytes)})")
    lines += ["", *_row("flash", "bytes", "from")]
    lines += _row("model flatbuffer", b.model_bytes, "the .tflite file")
    for k, v in b.frontend_flash.items():
        name = k[len("front end: "):]
        lines += _row(name, v, "frontend_signal.tflite" if "graph" in name
                      else "frontend_constants.h")
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
    if b.targets:
        lines += ["", *target_text(b, clock_mhz)]
    return "\n".join(lines) + "\n"


def _m(n: float) -> str:
    """A count in millions (or thousands) to three figures."""
    return f"{n / 1e6:.3g} M" if n >= 1e5 else f"{n / 1e3:.3g} k"


def target_text(b: Budget, clock_mhz: float | None = None) -> list[str]:
    """The per-core tables of ``budget --target`` (each line at most `WIDTH` columns).

    Parameters
    ----------
    b : Budget
        The figures, with ``targets``.
    clock_mhz : float, optional
        The clock of the duty-cycle table.

    Returns
    -------
    list of str
        The lines.
    """
    lines = _wrapped("per core: the front end cross-compiled (arm-none-eabi-gcc -O2 "
                     "-ffp-contract=off) and run in QEMU", "", "  ")
    head = (f"{'core':<11} {'flash':>7} {'linked':>7} {'RAM':>7} {'per hop':>13} "
            f"{'per window':>12}")
    lines += ["", f"{'':<11}{'front end (measured)':>23}   {'instructions (counted)':>26}", head]
    for t in b.targets:
        hop = "-" if t.hop_instructions is None else f"{t.hop_instructions:,.0f}"
        lines.append(f"{t.core.name:<11} {t.flash:>7,} {t.linked_flash:>7,} {t.ram:>7,} "
                     f"{hop:>13} {t.window_instructions:>12,.0f}")
    res = max(t.resolution for t in b.targets)
    obj = Path(b.frontend_source).with_suffix(".o").name
    lines += _wrapped(f"bytes of {obj}'s sections: flash = text + data, RAM = data + bss; "
                      f"linked: the flash it adds to a linked program with the library "
                      f"routines it calls (soft float, 64-bit arithmetic, sqrtf), two programs "
                      f"measured; instructions, not cycles, counted with QEMU's instruction "
                      f"counter, each within {res:.0f}; a hop after the first window reuses "
                      f"the frames it shares", "  ", "  ")
    caller = b.frontend_ram.get("one window of int16 PCM", 0) + b.frontend_ram.get(
        "feature tensor (float32)", 0)
    arena = "-" if b.arena_bytes is None else f"{b.arena_bytes:,} (recorded)"
    lines += ["", f"{'core':<11} {'RAM in all':>12} {'flash in all':>13}"]
    for t in b.targets:
        lines.append(f"{t.core.name:<11} {(b.arena_bytes or 0) + t.ram + caller:>12,} "
                     f"{b.model_bytes + t.linked_flash:>13,}")
    lines += _wrapped(f"RAM = interpreter arena {arena} + front end (measured) + "
                      f"{caller:,} (the caller's window of PCM and features); flash = model "
                      f"{b.model_bytes:,} (the file) + front end as linked (measured)", "  ",
                      "  ")
    if clock_mhz:
        mac = "int8 MAC" if b.int8 else "float MAC"
        lines += ["", f"duty cycle at {clock_mhz:g} MHz, per hop of {b.hop_s * 1000:g} ms "
                      f"({clock_mhz * 1e6 * b.hop_s:,.0f} cycles)",
                  f"{'core':<11} {'front end':>10} {'model':>11}   {'cycles per':>10} "
                  f"{'total':>12} {'share':>8}",
                  f"{'':<11} {'cycles (1)':>10} {'cycles (2)':>11}   {mac:>10} "
                  f"{'cycles':>12} {'of core':>8}"]
        for t in b.targets:
            d = t.duty_cycle(b, clock_mhz)
            lines.append(f"{t.core.name:<11} {_m(d['frontend_cycles']):>10} "
                         f"{_m(d['model_cycles']):>11}   {d['cycles_per_mac_from_memory']:>10g} "
                         f"{_m(d['frontend_cycles'] + d['model_cycles']):>12} "
                         f"{d['duty_cycle']:>8.1%}")
        lines += _wrapped(f"(1) counted instructions x {CYCLES_PER_INSTRUCTION:g} cycle each "
                          f"(assumed); (2) {b.macs:,} MACs x the core's cycles per {mac} "
                          f"(from memory, below)", "  ", "      ")
        for t in b.targets:
            lines += _wrapped(t.core.mac_source, f"  {t.core.name}: ", "      ")
        old = b.duty_cycle(clock_mhz)["duty_cycle"]
        lines += [""] + _wrapped(
            f"the single-figure estimate above (one assumed cost per operation for every core) "
            f"says {old:.1%}; per core, from counted instructions, "
            + ", ".join(f"{t.core.name} {t.duty_cycle(b, clock_mhz)['duty_cycle']:.1%}"
                        for t in b.targets) + ".", "", "")
    return lines


def run_budget(plan: ModelPlan, *, clock_mhz: float | None, as_json: bool,
               targets: str | None = None) -> int:
    """`scenemon budget`; exit 1 when the model cannot run in the microcontroller runtime.

    Parameters
    ----------
    plan : ModelPlan
        The ``.tflite`` model.
    clock_mhz : float or None
        The target's clock in MHz.
    as_json : bool
        Print JSON.
    targets : str, optional
        ``--target``: Cortex-M cores, comma-separated (see `target_figures`).

    Returns
    -------
    int
        0, or 1 when the model cannot run in the microcontroller runtime.

    Raises
    ------
    ScenemonError
        A clock that is not above 0, an unknown core, the toolchain or QEMU missing, or a
        model or card that cannot be used.
    """
    from monitor.assembly.assemble import card_of

    cores = None
    if targets is not None:
        from monitor.device.target.cores import cores_of
        from monitor.device.target.cross import find_toolchain

        cores = cores_of(targets)
        find_toolchain()  # before the model loads: a missing part is said at once
    card = card_of(plan)
    if cores and card.frontend.pcm.arithmetic == "micro-signal":
        raise ScenemonError(f'{card.name}: arithmetic = "micro-signal" runs the front end as a '
                            f"graph of the microcontroller runtime's signal operators, not as "
                            f"C; --target measures the C front ends (float32 or q15)")
    if clock_mhz is not None and not clock_mhz > 0:
        raise ScenemonError(f"--clock-mhz {clock_mhz} must be above 0")
    b = budget(plan, card)
    if cores:
        b.targets.extend(target_figures(card, cores))
    sys.stdout.write(json.dumps(b.to_dict(clock_mhz), indent=2) + "\n" if as_json
                     else budget_text(b, clock_mhz))
    if b.unsupported_ops:
        sys.stderr.write(f"scenemon: {b.notes[0]}\n")
        return ExitCode.FAILURE
    return ExitCode.OK
