"""`scenemon` command line: parses the flags, builds plans, dispatches to the modules.

Exit codes (`errors.ExitCode`): 0 ok, 1 runtime failure, 2 bad input (file, card, flag) with
one sentence on stderr naming the file and the problem; no traceback unless --debug.

Owns: the entry point, the flag groups (`flags`) and one module per command beside them.
May import: everything below it.
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import importlib
import os
import sys
import warnings
from types import ModuleType

from monitor import __version__
from monitor.base.errors import ExitCode, exit_code_for, one_sentence
from monitor.cli.flags import Parser, subcommand

# every command, in the order `scenemon --help` lists them; each has its module here, which
# owns its name, help, examples, flags (`add_arguments`) and handler (`run`). A run imports
# only its own command's module (and what that needs), so start-up does not pay for the rest.
COMMAND_NAMES = ("replay", "live", "field", "status", "devices", "demo", "report", "tune",
                 "harvest", "relabel", "quantize", "compare", "vectors", "emulate", "repair", "score",
                 "bench", "profile", "budget", "card")


def command_module(name: str) -> ModuleType:
    """The module of command `name` (``monitor.cli.<name>``).

    Parameters
    ----------
    name : str
        One of `COMMAND_NAMES`.

    Returns
    -------
    module
        The command's module, imported on first use.
    """
    return importlib.import_module(f"monitor.cli.{name}")


def command_of(argv: list[str]) -> str | None:
    """The command `argv` names, when its first word that is not an option is one.

    Parameters
    ----------
    argv : list of str
        The arguments after the program name.

    Returns
    -------
    str or None
        The command, or None (no command, a misspelt one, or only top-level options).
    """
    for word in argv:
        if word.startswith("-"):
            continue
        return word if word in COMMAND_NAMES else None
    return None


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The `scenemon` parser: every command module's flags, help and examples.

    Parameters
    ----------
    only : str, optional
        Build only this command's sub-parser (the command being run); every command's
        otherwise (top-level help, a misspelt command).

    Returns
    -------
    argparse.ArgumentParser
        The parser, with one sub-parser per command.
    """
    ap = Parser(prog="scenemon",
                 description="Watch a small audio classifier decide on live or recorded sound, "
                             "record the session, and check it against the truth.",
                 epilog="example: scenemon replay recordings/demo/tour.wav --model "
                        "models/demo.tflite --truth recordings/demo/tour.tsv --fast --headless",
                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--version", action="version", version=f"scenemon {__version__}")
    ap.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)
    for name in COMMAND_NAMES if only is None else (only,):
        m = command_module(name)
        m.add_arguments(subcommand(sub, m.NAME, m.HELP, m.DESCRIPTION, m.EXAMPLES))
    for p in sub.choices.values():  # --debug also after the command; SUPPRESS keeps the top one
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show tracebacks")
    return ap


def main(argv: list[str] | None = None) -> int:
    """Run `scenemon` with `argv` (default: the process's arguments); return the exit code.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after the program name.

    Returns
    -------
    int
        0 ok, 1 runtime failure, 2 bad input (`errors.ExitCode`); every error is one sentence
        on stderr, with a traceback only under ``--debug``.
    """
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    if argv is None:
        argv = sys.argv[1:]
    with _long_lived():
        ap = build_parser(command_of(argv))
        args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return ExitCode.BAD_INPUT
    debug = getattr(args, "debug", False)
    from monitor.base.native import keep_freed_memory, quiet_tensorflow

    quiet_tensorflow(debug)
    keep_freed_memory()
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = _show_warning
        try:
            return int(command_module(args.command).run(args))
        except (Exception, KeyboardInterrupt) as exc:
            if debug and not isinstance(exc, KeyboardInterrupt):
                raise
            if not isinstance(exc, KeyboardInterrupt):
                from monitor.base.files import terminal_safe

                sys.stderr.write(terminal_safe(f"scenemon: {one_sentence(exc)}\n"))
            return exit_code_for(exc)


@contextlib.contextmanager
def _long_lived():
    """No garbage collection inside, and what was made inside frozen after (see `gc.freeze`).

    Building the parser imports most of what a command needs (NumPy, the card, the plans):
    many objects that live as long as the process. The collector's passes over them find no
    garbage and cost about 5 ms of start-up; frozen, its later passes skip them too (as
    `run_session` does with the session's own start-up).
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        gc.freeze()
        if was:
            gc.enable()


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    if issubclass(category, (DeprecationWarning, FutureWarning)):
        return
    sys.stderr.write(f"scenemon: warning: {message}\n")


if __name__ == "__main__":
    sys.exit(main())
