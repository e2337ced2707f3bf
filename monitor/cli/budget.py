"""`scenemon budget`: RAM, flash, operators and work per window on the target.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse

from monitor.cli.flags import add_model_flags, model_plans, positive

NAME = 'budget'
HELP = 'what the model and its front end cost on the microcontroller'
DESCRIPTION = "RAM (the interpreter's recorded arena, the front end's buffers), flash (model and tables), every operator and the ones the microcontroller runtime cannot run, and the work per window; with --clock-mhz an estimated duty cycle. With --target, per Cortex-M core: the front end cross-compiled (its flash and RAM measured), its instructions per hop counted in emulation, and with --clock-mhz a duty cycle per core (needs arm-none-eabi-gcc with newlib and qemu-system-arm)."
EXAMPLES = 'examples:\n  scenemon budget --model models/demo.int8.tflite\n  scenemon budget --model models/demo.int8.tflite --clock-mhz 80 --json\n  scenemon budget --model models/demo.int8.tflite --clock-mhz 80 --target cortex-m4,cortex-m33\n  scenemon budget --model models/demo.int8.tflite --clock-mhz 80 --target all'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon budget`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, runtime=None)  # the microcontroller runtime's budget: no other runtime
    p.add_argument("--clock-mhz", type=positive, metavar="MHZ",
                   help="the target's clock, for a duty-cycle estimate (an assumption of "
                        "cycles per operation, not a measurement)")
    p.add_argument("--target", metavar="CORE[,CORE...]",
                   help="Cortex-M cores (cortex-m3, cortex-m4, cortex-m7, cortex-m33, "
                        "cortex-m55, or all): the front end cross-compiled for each and run "
                        "in QEMU; flash and RAM measured, instructions per hop counted")
    p.add_argument("--json", action="store_true",
                   help="print arena_bytes, ram_bytes, flash_bytes, macs, ops, "
                        "unsupported_ops and the rest as JSON")


def run(args: argparse.Namespace) -> int:
    """`scenemon budget`: RAM, flash, operators and work per window on the target.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon budget`.

    Returns
    -------
    int
        The exit code.
    """
    import dataclasses

    from monitor.device.budget import run_budget

    plan = dataclasses.replace(model_plans(args)[0], runtime="micro")
    return run_budget(plan, clock_mhz=args.clock_mhz, as_json=args.json,
                      targets=args.target)
