"""`scenemon devices`: the input devices, one line each.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
import sys

NAME = 'devices'
HELP = 'list the audio input devices'
DESCRIPTION = 'List input devices: index, name, host API, channels, default rate; * marks the default.'
EXAMPLES = 'example:\n  scenemon devices\n  scenemon live --model m.tflite --input 3'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """`scenemon devices` takes no arguments of its own.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """


def run(args: argparse.Namespace) -> int:
    """`scenemon devices`: the input devices, one line each.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon devices`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.sound.sources import device_table

    sys.stdout.write(device_table())
    return 0
