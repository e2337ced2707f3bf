"""`scenemon field`: an unattended run into a run folder, restarted by the service manager.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

from monitor.cli.flags import (
    add_capture_flags,
    add_decision_flags,
    add_model_flags,
    blocksize,
    latency,
    positive,
    positive_int,
    segment_minutes,
    session_plan,
)

NAME = "field"
HELP = "record unattended for days into a run folder, within a disk budget"
DESCRIPTION = ("Run the model on an input device with no screen, one session after another "
               "in RUN. At start it repairs what a kill or a power cut left and starts a new "
               "session; a lost device is waited for and reopened by name; RUN/status.json is "
               "rewritten every few seconds (read it with scenemon status RUN). Stops cleanly "
               "on SIGTERM or Ctrl-C.")
EXAMPLES = ("examples:\n"
            "  scenemon field /srv/scenemon/plant-room --model models/demo.int8.tflite "
            "--input USB --keep 20GB --keep 14d\n"
            "  scenemon field /srv/scenemon/plant-room --model models/demo.int8.tflite "
            "--input USB --keep 20GB --print-unit > scenemon-field.service\n"
            "  scenemon status /srv/scenemon/plant-room")


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon field`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    from monitor.assembly.plan import DEFAULT_SEGMENT_S

    p.add_argument("run", metavar="RUN", help="the run folder (made if missing)")
    add_model_flags(p, many=True)
    g = p.add_argument_group("input device")
    g.add_argument("--input", metavar="DEVICE",
                   help="device index or a case-insensitive part of its name; give the name "
                        "(indices change when a USB device is plugged in again)")
    g.add_argument("--latency", type=latency, default="high", metavar="LATENCY",
                   help="PortAudio latency: high (default), low, or seconds")
    g.add_argument("--blocksize", type=blocksize, default=None, metavar="FRAMES",
                   help="frames per callback (default: about 50 ms)")
    g.add_argument("--reopen-tries", type=positive_int, default=10, metavar="N",
                   help="tries to reopen a lost device inside the session, 0.2, 1, 2, 4, then "
                        "8 s apart, before the session ends and the run waits for it "
                        "(default 10: about a minute)")
    r = p.add_argument_group("the run")
    r.add_argument("--keep", action="append", metavar="BUDGET",
                   help="disk budget: a size (20GB, 500MiB) and/or an age (14d, 12h); the "
                        "oldest audio of closed sessions goes first, window lines, summaries, "
                        "truth and snippets are kept (give twice, or 20GB,14d)")
    r.add_argument("--session-hours", type=positive, default=24.0, metavar="HOURS",
                   help="hours of audio per session before the next one starts (default 24)")
    r.add_argument("--status-every", type=positive, default=5.0, metavar="SECONDS",
                   help="seconds between rewrites of RUN/status.json (default 5)")
    r.add_argument("--reserve", default="200MB", metavar="SIZE",
                   help="free disk space left to other programs: below it audio stops, "
                        "window lines go on (default 200MB)")
    r.add_argument("--no-audio", action="store_true", help="keep no audio")
    r.add_argument("--segment-min", type=segment_minutes, default=DEFAULT_SEGMENT_S / 60.0,
                   metavar="MINUTES", help=f"a new audio file every MINUTES (default "
                                          f"{DEFAULT_SEGMENT_S / 60:g}); the budget removes "
                                          f"whole files")
    r.add_argument("--print-unit", action="store_true",
                   help="print a systemd service unit that runs this command, and exit "
                        "(nothing is installed)")
    add_decision_flags(p)
    add_capture_flags(p)


def unit_text(argv: list[str], *, user: str | None, workdir: Path) -> str:
    """A systemd service unit (systemd.service(5)) running ``scenemon field`` with `argv`.

    Parameters
    ----------
    argv : list of str
        The field command's arguments, ``--print-unit`` left out, paths made absolute.
    user : str or None
        The account it runs as (None: left out, the unit runs as root).
    workdir : Path
        Its working folder.

    Returns
    -------
    str
        The unit file's text.
    """
    exe = Path(sys.executable).absolute()
    script = exe.parent / "scenemon"  # the installed entry point beside the interpreter
    head = [str(script)] if script.is_file() else [str(exe), "-m", "monitor"]
    cmd = " ".join(shlex.quote(a) for a in [*head, "field", *argv])
    lines = ["[Unit]",
             "Description=scenemon field run (audio classifier check)",
             "Wants=sound.target",
             "After=sound.target",
             "",
             "[Service]",
             "Type=simple",
             f"WorkingDirectory={workdir}",
             f"ExecStart={cmd}",
             "Restart=always",
             "RestartSec=5",
             "KillSignal=SIGTERM",
             "TimeoutStopSec=30",
             "Nice=-5"]
    if user:
        lines.append(f"User={user}")
        lines.append("SupplementaryGroups=audio")
    lines += ["", "[Install]", "WantedBy=multi-user.target", ""]
    return "\n".join(lines)


def _absolute_argv(args: argparse.Namespace) -> list[str]:
    """The command line again from the parsed flags, files made absolute (a service starts
    in another folder); ``--print-unit`` and ``--debug`` left out."""
    p = argparse.ArgumentParser(add_help=False)
    add_arguments(p)
    files = {"model", "card"}
    out = [str(Path(args.run).absolute())]
    for a in p._actions:
        if not a.option_strings or a.dest in ("print_unit", "debug", "help"):
            continue
        v = getattr(args, a.dest, None)
        if v is None or v == a.default or v is False or a.help == argparse.SUPPRESS:
            continue
        flag = a.option_strings[0]
        if v is True:
            out.append(flag)
            continue
        for item in v if isinstance(v, list) else [v]:
            out += [flag, str(Path(item).absolute()) if a.dest in files else str(item)]
    return out


def run(args: argparse.Namespace) -> int:
    """`scenemon field`: run sessions in the run folder until stopped.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon field`.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        A ``--keep`` or ``--reserve`` that is not a budget, or bad input `run_field` finds.
    """
    import getpass
    import os

    from monitor.assembly.plan import FieldPlan, MicInput
    from monitor.base.errors import ScenemonError
    from monitor.session.runfolder import parse_keep

    keep = parse_keep(args.keep)
    reserve = parse_keep([args.reserve], "--reserve").bytes
    if reserve is None:
        raise ScenemonError(f"--reserve {args.reserve!r}: give a size (200MB)")
    if args.print_unit:
        user = None if os.geteuid() == 0 else getpass.getuser()
        sys.stdout.write(unit_text(_absolute_argv(args), user=user, workdir=Path.cwd()))
        return 0
    args.out, args.headless = None, True
    # a device that comes back within about a minute (a sound server restarting, a cable
    # replugged) is reopened inside the session: 0.2, 1, 2, 4, then 8 s between tries
    mic = MicInput(args.input, args.latency, args.blocksize, None,
                   reopen_tries=args.reopen_tries, reopen_wait_s=8.0)
    plan = session_plan(args, mic, name="field", live_truth=False)
    from monitor.assembly.field import run_field

    return run_field(FieldPlan(Path(args.run), plan, keep, session_s=3600.0 * args.session_hours,
                               status_every_s=args.status_every, reserve_bytes=reserve))
