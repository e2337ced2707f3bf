"""Cross-compiling the portable C for a Cortex-M core and running it in system emulation.

The toolchain is the GNU Arm Embedded compiler with newlib (Debian: ``gcc-arm-none-eabi``,
``libnewlib-arm-none-eabi``) and QEMU's Arm system emulator (``qemu-system-arm``). A program
is built with our start-up code and linker script (``startup.c``, ``cortexm.ld`` beside this
module), newlib's semihosting library (``--specs=rdimon.specs``: ``fopen`` and ``printf``
reach the host's files and terminal), and run with ``qemu-system-arm -M <board> -nographic
-semihosting-config enable=on,target=native -kernel ELF`` in the folder whose files it reads;
its exit status comes back through semihosting.

Every build uses ``-ffp-contract=off``: a core with fused multiply-add (the M4's, M7's, M33's
and M55's FPUs have VFMA) would otherwise be allowed to fuse ``a * b + c`` into one rounding,
and the front end's floats would differ from the laptop's in the last bits. gcc's ISO modes
(``-std=c99``) already default to off, its GNU modes (the default ``gnu17``) to fast; a
firmware build must say ``-ffp-contract=off`` (or compile the front end as ISO C).

`object_sizes` reads an ELF object's section table itself (the ELF specification's 32-bit
little-endian layout), so the flash and RAM figures need no other tool.
"""

from __future__ import annotations

import re
import shutil
import struct
import subprocess
from dataclasses import dataclass
from pathlib import Path

from monitor.base.errors import ScenemonError
from monitor.device.target.cores import Core

__all__ = ["Toolchain", "EmulationFailed", "Run", "Sections", "find_toolchain", "build",
           "compile_object", "run", "require_check_folder", "build_check", "run_check", "check_digest",
           "object_sizes", "STARTUP", "LINKER_SCRIPT", "COUNT_SOURCE", "CFLAGS"]

HERE = Path(__file__).parent
STARTUP = HERE / "startup.c"
LINKER_SCRIPT = HERE / "cortexm.ld"
COUNT_SOURCE = HERE / "count.c"
PROBE_SOURCE = HERE / "probe.c"
# as the vectors folder's Makefile builds the check on the host, plus no contraction
CFLAGS = ("-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-pedantic", "-ffp-contract=off",
          "-ffunction-sections", "-fdata-sections")
DIGEST = re.compile(r"^features digest \(FNV-1a 64[^)]*\): ([0-9a-f]{16})$", re.M)


class EmulationFailed(RuntimeError):
    """A program did not build or did not finish in emulation (a runtime failure, exit 1;
    its message is one sentence, printed as it is)."""

    one_sentence = True


@dataclass(frozen=True, kw_only=True)
class Toolchain:
    """The programs a Cortex-M build and run need, found on ``PATH``.

    Attributes
    ----------
    gcc, size, qemu : str
        ``arm-none-eabi-gcc``, ``arm-none-eabi-size``, ``qemu-system-arm``.
    """

    gcc: str
    size: str
    qemu: str


@dataclass(frozen=True, kw_only=True)
class Run:
    """One program run in emulation.

    Attributes
    ----------
    core : str
        The core's name.
    returncode : int
        Its exit status (through semihosting).
    stdout, stderr : str
        What it printed.
    """

    core: str
    returncode: int
    stdout: str
    stderr: str


@dataclass(frozen=True, kw_only=True)
class Sections:
    """Bytes of an object's allocated sections, as ``size`` (Berkeley format) adds them up.

    Attributes
    ----------
    text : int
        Code and read-only data (``.text``, ``.rodata``, ...): flash.
    data : int
        Initialised data: its values in flash, the variables in RAM.
    bss : int
        Zero-initialised data: RAM.
    """

    text: int
    data: int
    bss: int

    @property
    def flash(self) -> int:
        """Flash: code, read-only data and the initial values of ``data``."""
        return self.text + self.data

    @property
    def ram(self) -> int:
        """RAM: ``data`` and ``bss`` (static, not the stack)."""
        return self.data + self.bss


def find_toolchain(*, emulator: bool = True) -> Toolchain:
    """The cross compiler (with newlib) and, with `emulator`, QEMU; or one sentence on what to
    install.

    Parameters
    ----------
    emulator : bool
        QEMU is needed too.

    Returns
    -------
    Toolchain
        The programs.

    Raises
    ------
    ScenemonError
        A part is missing: names the Debian package that brings it.
    """
    gcc, size = shutil.which("arm-none-eabi-gcc"), shutil.which("arm-none-eabi-size")
    if gcc is None or size is None:
        raise ScenemonError("the Cortex-M cross compiler arm-none-eabi-gcc is not installed; "
                            "install the packages gcc-arm-none-eabi and "
                            "libnewlib-arm-none-eabi (Debian, Ubuntu)")
    specs = subprocess.run([gcc, "-print-file-name=rdimon.specs"], capture_output=True,
                           text=True).stdout.strip()
    if not Path(specs).is_file():
        raise ScenemonError("arm-none-eabi-gcc has no newlib (rdimon.specs is missing); "
                            "install the package libnewlib-arm-none-eabi (Debian, Ubuntu)")
    qemu = shutil.which("qemu-system-arm")
    if emulator and qemu is None:
        raise ScenemonError("the Arm system emulator qemu-system-arm is not installed; "
                            "install the package qemu-system-arm (Debian, Ubuntu)")
    return Toolchain(gcc=gcc, size=size, qemu=qemu or "")


def _memory_ld(core: Core) -> str:
    (co, cl), (ro, rl) = core.code, core.ram
    return (f"/* {core.name} on QEMU's {core.machine} */\n"
            f"MEMORY\n{{\n    CODE (rx) : ORIGIN = {co:#010x}, LENGTH = {cl:#x}\n"
            f"    RAM (rwx) : ORIGIN = {ro:#010x}, LENGTH = {rl:#x}\n}}\n")


def _compile(cmd: list[str], what: str) -> None:
    r = subprocess.run(cmd, capture_output=True, text=True)
    if r.returncode != 0:
        first = next((x for x in r.stderr.splitlines() if "error" in x), r.stderr.strip())
        raise EmulationFailed(f"{what} did not build: {first}")


def build(*, core: Core, sources: list[Path], include: list[Path], out: Path,
          toolchain: Toolchain, contract: str = "off", defines: tuple[str, ...] = ()) -> Path:
    """Build a program for `core` with our start-up code and linker script; returns the ELF.

    Parameters
    ----------
    core : Core
        The core.
    sources : list of Path
        Its C files (``main`` among them).
    include : list of Path
        Folders of its headers.
    out : Path
        The ELF to write (``memory.ld`` goes beside it).
    toolchain : Toolchain
        The compiler.
    contract : str
        ``-ffp-contract``'s value: ``off`` (always, but for the test that shows why).
    defines : tuple of str
        ``NAME=VALUE`` for ``-D``.

    Returns
    -------
    Path
        `out`.

    Raises
    ------
    EmulationFailed
        The build failed (its first error line is said).
    """
    out.parent.mkdir(parents=True, exist_ok=True)
    (out.parent / "memory.ld").write_text(_memory_ld(core))
    flags = [f for f in CFLAGS if not f.startswith("-ffp-contract")]
    cmd = [toolchain.gcc, *core.cflags, *flags, f"-ffp-contract={contract}",
           *(f"-D{d}" for d in defines), *(f"-I{d}" for d in include),
           "--specs=rdimon.specs", "-T", str(LINKER_SCRIPT), f"-L{out.parent}",
           "-Wl,--gc-sections", str(STARTUP), *map(str, sources), "-o", str(out), "-lm"]
    _compile(cmd, f"{out.name} for {core.name}")
    return out


def compile_object(*, core: Core, source: Path, include: list[Path], out: Path,
                   toolchain: Toolchain) -> Path:
    """Compile one C file for `core` into an object file (the flags of `build`).

    Parameters
    ----------
    core : Core
        The core.
    source : Path
        The C file.
    include : list of Path
        Folders of its headers.
    out : Path
        The object file to write.
    toolchain : Toolchain
        The compiler.

    Returns
    -------
    Path
        `out`.

    Raises
    ------
    EmulationFailed
        It did not compile.
    """
    out.parent.mkdir(parents=True, exist_ok=True)
    _compile([toolchain.gcc, *core.cflags, *CFLAGS, *(f"-I{d}" for d in include), "-c",
              str(source), "-o", str(out)], f"{source.name} for {core.name}")
    return out


def run(*, elf: Path, core: Core, cwd: Path, toolchain: Toolchain, timeout: float = 600,
        icount: bool = False) -> Run:
    """Run `elf` on `core`'s board in QEMU, semihosting on, in the folder `cwd`.

    Parameters
    ----------
    elf : Path
        The program.
    core : Core
        Its core.
    cwd : Path
        The folder whose files it opens.
    toolchain : Toolchain
        Where QEMU is.
    timeout : float
        Seconds before it is stopped.
    icount : bool
        Run with ``-icount shift=0`` (one nanosecond of emulated time per instruction).

    Returns
    -------
    Run
        Its exit status and output.

    Raises
    ------
    EmulationFailed
        It did not finish within `timeout`.
    """
    cmd = [toolchain.qemu, "-M", core.machine, "-nographic", "-monitor", "none",
           "-semihosting-config", "enable=on,target=native", "-kernel", str(elf.resolve())]
    if icount:
        cmd[1:1] = ["-icount", "shift=0"]
    try:
        r = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout,
                           stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        raise EmulationFailed(f"{elf.name} did not finish on {core.name} ({core.machine}) "
                              f"within {timeout:g} s") from None
    return Run(core=core.name, returncode=r.returncode, stdout=r.stdout, stderr=r.stderr)


def require_check_folder(vectors: Path) -> None:
    """Refuse a folder that is not a vectors folder with its check program.

    Parameters
    ----------
    vectors : Path
        The folder.

    Raises
    ------
    ScenemonError
        It is no folder, or a file of the check is missing (the first is named).
    """
    if not vectors.is_dir():
        raise ScenemonError(f"{vectors}: is not a folder; give the folder scenemon vectors "
                            f"wrote")
    missing = [n for n in ("check.c", front_source(vectors).name, "frontend.h",
                           "frontend_constants.h", "check_params.h", "pcm.csv", "features.csv")
               if not (vectors / n).is_file()]
    if missing:
        raise ScenemonError(f"{vectors}: is not a vectors folder with a check program "
                            f"({missing[0]} is missing); write one with scenemon vectors")


def front_source(vectors: Path) -> Path:
    """The front end's source in a vectors folder, as its header says: ``frontend_q15.c`` for
    a q15 card's (``SM_ARITHMETIC_Q15``), else ``frontend.c``.

    Parameters
    ----------
    vectors : Path
        The folder.

    Returns
    -------
    Path
        The source file's path in it.
    """
    from monitor.device import source_for_header

    header = vectors / "frontend_constants.h"
    text = header.read_text(errors="replace") if header.is_file() else ""
    return vectors / source_for_header(text).name


def build_check(vectors: Path, core: Core, *, out: Path, toolchain: Toolchain,
                contract: str = "off") -> Path:
    """Build a vectors folder's check program (its own ``check.c`` and ``frontend.c`` or
    ``frontend_q15.c``, unchanged) for `core`.

    Parameters
    ----------
    vectors : Path
        The folder ``scenemon vectors`` wrote.
    core : Core
        The core.
    out : Path
        The ELF to write.
    toolchain : Toolchain
        The compiler.
    contract : str
        ``-ffp-contract``'s value.

    Returns
    -------
    Path
        `out`.

    Raises
    ------
    ScenemonError
        `vectors` is not a vectors folder with a check program.
    EmulationFailed
        It did not build.
    """
    require_check_folder(vectors)
    return build(core=core, sources=[front_source(vectors), vectors / "check.c"],
                 include=[vectors], out=out, toolchain=toolchain, contract=contract)


def run_check(vectors: Path, core: Core, *, work: Path, toolchain: Toolchain,
              contract: str = "off", timeout: float = 600) -> Run:
    """Build and run a vectors folder's check on `core` in emulation (in the folder itself).

    Parameters
    ----------
    vectors : Path
        The vectors folder.
    core : Core
        The core.
    work : Path
        A folder for the build.
    toolchain : Toolchain
        Compiler and emulator.
    contract : str
        ``-ffp-contract``'s value.
    timeout : float
        Seconds for the run.

    Returns
    -------
    Run
        The check's exit status (0 within tolerance) and output (`check_digest` reads its
        digest).
    """
    elf = build_check(vectors, core, out=work / f"check-{core.name}-{contract}.elf",
                      toolchain=toolchain, contract=contract)
    return run(elf=elf, core=core, cwd=vectors, toolchain=toolchain, timeout=timeout)


def check_digest(stdout: str) -> str | None:
    """The features digest the check program prints last.

    Parameters
    ----------
    stdout : str
        The check's standard output.

    Returns
    -------
    str or None
        16 hex digits, or None when there is no digest line.
    """
    found = DIGEST.findall(stdout)
    return found[-1] if found else None


def linked_flash(*, core: Core, source: Path, include: list[Path], work: Path,
                 toolchain: Toolchain) -> int:
    """Bytes of flash the front end adds to a linked program on `core`: its code and tables
    and the library routines it pulls in (libgcc's soft float and 64-bit arithmetic, newlib's
    ``sqrtf``, ``memset``), as the difference of two programs built from ``probe.c``: one
    calling the front end, one not (text + data of each, `object_sizes`).

    Parameters
    ----------
    core : Core
        The core.
    source : Path
        The front end's C file (``frontend.c`` or ``frontend_q15.c``).
    include : list of Path
        Folders of its headers (``frontend_constants.h``, ``frontend.h``).
    work : Path
        A folder for the two programs.
    toolchain : Toolchain
        The compiler.

    Returns
    -------
    int
        The difference in bytes of flash.

    Raises
    ------
    EmulationFailed
        A program did not build.
    """
    work.mkdir(parents=True, exist_ok=True)
    sizes = []
    for on in (1, 0):
        elf = build(core=core, sources=[source, PROBE_SOURCE] if on else [PROBE_SOURCE],
                    include=include, out=work / f"probe{on}-{core.name}.elf",
                    toolchain=toolchain, defines=(f"SM_LINK_PROBE={on}",))
        sec = object_sizes(elf)
        sizes.append(sec.text + sec.data)
    return sizes[0] - sizes[1]


def object_sizes(path: Path) -> Sections:
    """The allocated sections of an ELF32 little-endian object, added up as ``size`` does.

    Sections with SHF_ALLOC: NOBITS ones are ``bss``; writable PROGBITS ones ``data``; the
    others (code, read-only data) ``text`` (ELF specification, "Sections": ``sh_type``,
    ``sh_flags``).

    Parameters
    ----------
    path : Path
        An ELF object or executable for 32-bit Arm.

    Returns
    -------
    Sections
        The sums.

    Raises
    ------
    ScenemonError
        Not a 32-bit little-endian ELF file.
    """
    raw = Path(path).read_bytes()
    if raw[:4] != b"\x7fELF" or raw[4] != 1 or raw[5] != 1:
        raise ScenemonError(f"{path}: is not a 32-bit little-endian ELF file")
    shoff, = struct.unpack_from("<I", raw, 0x20)
    shentsize, shnum = struct.unpack_from("<HH", raw, 0x2E)
    text = data = bss = 0
    sht_nobits, shf_write, shf_alloc = 8, 0x1, 0x2
    for i in range(shnum):
        _, kind, flags, _, _, size = struct.unpack_from("<IIIIII", raw, shoff + i * shentsize)
        if not flags & shf_alloc:
            continue
        if kind == sht_nobits:
            bss += size
        elif flags & shf_write:
            data += size
        else:
            text += size
    return Sections(text=text, data=data, bss=bss)
