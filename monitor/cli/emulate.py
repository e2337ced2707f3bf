"""`scenemon emulate`: a vectors folder's check on Cortex-M cores in system emulation.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = 'emulate'
HELP = "run a vectors folder's check on Cortex-M cores in emulation, bit for bit"
DESCRIPTION = ("Build the check program that `scenemon vectors` wrote (its check.c and frontend.c, "
               "or frontend_q15.c for a q15 card, unchanged) for each Cortex-M core, run it in QEMU's system emulation with "
               "semihosting, and on this machine; say whether each passed and whether its "
               "features are bit-identical to this machine's. Needs arm-none-eabi-gcc with newlib "
               "and qemu-system-arm. Exit 0 when every check passes with the same bits.")
EXAMPLES = ('examples:\n  scenemon vectors --model models/demo.int8.tflite recordings/demo/tour.wav '
            '--out golden --count 20\n  scenemon emulate golden --target cortex-m4,cortex-m33\n'
            '  scenemon emulate golden --target all --json')


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon emulate`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("folder", metavar="DIR", help="a folder scenemon vectors wrote")
    p.add_argument("--target", required=True, metavar="CORE[,CORE...]",
                   help="Cortex-M cores: cortex-m3, cortex-m4, cortex-m7, cortex-m33, "
                        "cortex-m55, or all")
    p.add_argument("--json", action="store_true", help="print the runs as JSON")


def run(args: argparse.Namespace) -> int:
    """`scenemon emulate`: a vectors folder's check on Cortex-M cores in emulation.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon emulate`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.device.target.checks import run_emulate

    return run_emulate(Path(args.folder), args.target, as_json=args.json)
