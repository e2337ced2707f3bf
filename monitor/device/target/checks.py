"""`scenemon emulate`: a vectors folder's check run on Cortex-M cores in system emulation,
and on the laptop, with the features' digests side by side.

The folder's own ``check.c`` and ``frontend.c`` (``frontend_q15.c`` for a q15 card) are built
unchanged: on the laptop with the host's C compiler and the cross build's flags
(`cross.CFLAGS`: C99, -O2, -ffp-contract=off), and for each core
(`monitor.device.target.cross`). Each run says whether the check passed (the features
within the folder's tolerance of ``features.csv``, exact for a q15 card) and its digest of every
feature computed; equal digests mean bit-identical features. Exit 0 when every check passes
and every core's digest is the laptop's (or, without a host compiler, the cores agree).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

from monitor.base.errors import ExitCode
from monitor.base.files import terminal_safe
from monitor.device.target.cores import Core, cores_of
from monitor.device.target.cross import (
    CFLAGS,
    EmulationFailed,
    build_check,
    check_digest,
    find_toolchain,
    front_source,
    require_check_folder,
    run,
)

__all__ = ["Outcome", "host_check", "run_emulate"]


@dataclass(frozen=True, kw_only=True)
class Outcome:
    """One run of the check.

    Attributes
    ----------
    where : str
        ``laptop`` or the core's name.
    board : str
        The QEMU board, or the host compiler's name.
    passed : bool
        The check exited 0.
    digest : str or None
        Its features digest.
    summary : str
        Its summary line (the last but one).
    """

    where: str
    board: str
    passed: bool
    digest: str | None
    summary: str


def _outcome(where: str, board: str, code: int, stdout: str) -> Outcome:
    lines = [x for x in stdout.splitlines() if x.strip()]
    summary = next((x for x in reversed(lines) if x.split()[1:2] == ["windows:"]), "")
    return Outcome(where=where, board=board, passed=code == 0, digest=check_digest(stdout),
                   summary=summary)


def host_check(folder: Path, *, work: Path) -> Outcome | None:
    """The check built with the host's C compiler (the Makefile's flags) and run; None
    without a compiler.

    Parameters
    ----------
    folder : Path
        The vectors folder.
    work : Path
        A folder for the program.

    Returns
    -------
    Outcome or None
        The laptop's run.

    Raises
    ------
    EmulationFailed
        The check does not build on this machine.
    """
    cc = shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")
    if cc is None:
        return None
    exe = work / "check_fe"
    flags = [f for f in CFLAGS if not f.startswith(("-ffunction", "-fdata"))]
    r = subprocess.run([cc, *flags, f"-I{folder}", str(front_source(folder)),
                        str(folder / "check.c"), "-o", str(exe), "-lm"],
                       capture_output=True, text=True)
    if r.returncode != 0:
        raise EmulationFailed(f"the check did not build on this machine: "
                              f"{r.stderr.strip().splitlines()[0] if r.stderr else ''}")
    p = subprocess.run([str(exe)], cwd=folder, capture_output=True, text=True, timeout=600)
    return _outcome("laptop", Path(cc).name, p.returncode, p.stdout)


def run_emulate(folder: Path, targets: str, *, as_json: bool = False) -> int:
    """`scenemon emulate`: the check on the laptop and on each core, digests compared.

    Parameters
    ----------
    folder : Path
        A folder ``scenemon vectors`` wrote.
    targets : str
        ``--target``: cores, comma-separated, or ``all``.
    as_json : bool
        Print JSON.

    Returns
    -------
    int
        0 when every check passed and every digest is the laptop's; 1 otherwise.

    Raises
    ------
    monitor.base.errors.ScenemonError
        An unknown core, the toolchain or QEMU missing, or a folder that is not a vectors
        folder with a check.
    """
    cores: list[Core] = cores_of(targets)
    require_check_folder(folder)
    tc = find_toolchain()
    with tempfile.TemporaryDirectory(prefix="scenemon-emulate-") as tmp:
        work = Path(tmp)
        laptop = host_check(folder, work=work)
        runs = []
        for core in cores:
            elf = build_check(folder, core, out=work / f"{core.name}.elf", toolchain=tc)
            r = run(elf=elf, core=core, cwd=folder, toolchain=tc)
            runs.append(_outcome(core.name, core.machine, r.returncode, r.stdout))
    ref = laptop.digest if laptop is not None else runs[0].digest
    same = [o.digest is not None and o.digest == ref for o in runs]
    ok = all(o.passed for o in runs) and all(same) and (laptop is None or laptop.passed)
    if as_json:
        rows = ([laptop] if laptop else []) + runs
        sys.stdout.write(json.dumps({
            "folder": folder.name, "passed": ok,
            "reference": "laptop" if laptop else runs[0].where,
            "runs": [{"where": o.where, "board": o.board, "passed": o.passed,
                      "digest": o.digest, "summary": o.summary,
                      "same_bits": o.where == "laptop" or o.digest == ref} for o in rows]},
            indent=2) + "\n")
        return ExitCode.OK if ok else ExitCode.FAILURE
    out = [terminal_safe(f"the check of {folder.name}", one_line=True),
           f"its check.c and {front_source(folder).name} as written, built with -O2 "
           "-ffp-contract=off", "",
           f"{'where':<11} {'board':<11} {'check':<7} {'features digest':<17} same bits as",
           f"{'':<11} {'':<11} {'':<7} {'':<17} "
           f"{'the laptop' if laptop else runs[0].where}"]
    for o in ([laptop] if laptop else []) + runs:
        mark = "-" if o is laptop else ("yes" if o.digest == ref else "NO")
        out.append(f"{o.where:<11} {o.board:<11} {'passed' if o.passed else 'FAILED':<7} "
                   f"{o.digest or '-':<17} {mark}")
    if laptop is None:
        out.append("no C compiler on this machine: the cores are compared with the first")
    out += ["", "passed: the features within tolerance of features.csv (the check's own "
                "test);", "same bits: every feature bit-identical (FNV-1a 64 over the bytes of",
            "their float32 values, in order)"]
    sys.stdout.write("\n".join(out) + "\n")
    return ExitCode.OK if ok else ExitCode.FAILURE
