"""The Cortex-M cores scenemon builds for and runs in system emulation: one table, `CORES`.

Each core has the QEMU board that emulates it (the Arm MPS2 / MPS3 FPGA images QEMU models:
its documentation, "Arm MPS2 and MPS3 boards"), the compiler flags of its instruction set and
floating-point unit, where code and data go on that board (the secure aliases of the board's
SRAMs on the TrustZone cores, whose reset starts in the secure state; the sizes are the
boards' as ``info mtree`` of QEMU 7.2 lists them), and the per-kernel figures `budget`
turns work into cycles with. Those figures are recalled, not measured: each says so.
"""

from __future__ import annotations

from dataclasses import dataclass

from monitor.base.errors import ScenemonError

__all__ = ["Core", "CORES", "cores_of"]


@dataclass(frozen=True, kw_only=True)
class Core:
    """One Cortex-M core: how to build for it, where it runs, and what a MAC costs on it.

    Attributes
    ----------
    name : str
        Our name for it (``cortex-m4``), as ``--target`` takes it.
    machine : str
        The QEMU board (``-M``).
    cflags : tuple of str
        The compiler's core, instruction set and float ABI flags.
    fpu : str
        The floating-point unit in words (``none``: soft float).
    code, ram : tuple of int
        Origin and length in bytes of the memory the program's code and its data use.
    int8_cycles_per_mac, float_cycles_per_mac : float
        Cycles of one multiply-accumulate in an optimised kernel (recalled, see `mac_source`,
        which says what each rests on).
    mac_source : str
        What the MAC figures rest on, and that they are from memory.
    """

    name: str
    machine: str
    cflags: tuple[str, ...]
    fpu: str
    code: tuple[int, int]
    ram: tuple[int, int]
    int8_cycles_per_mac: float
    float_cycles_per_mac: float
    mac_source: str

    @property
    def hard_float(self) -> bool:
        """True when the core computes float in hardware (the build uses the FPU)."""
        return self.fpu != "none"


KIB, MIB = 1024, 1024 * 1024

CORES: dict[str, Core] = {c.name: c for c in (
    Core(name="cortex-m3", machine="mps2-an385", fpu="none",
         cflags=("-mcpu=cortex-m3", "-mthumb", "-mfloat-abi=soft"),
         code=(0x00000000, 4 * MIB), ram=(0x20000000, 4 * MIB),
         int8_cycles_per_mac=4.0, float_cycles_per_mac=60.0,
         mac_source="from memory: no DSP extension, so two sign-extending loads and a 2-cycle "
                    "MLA per int8 MAC (Cortex-M3 TRM, instruction timings); a float MAC in "
                    "software, a libgcc multiply and add of some 30 cycles each"),
    Core(name="cortex-m4", machine="mps2-an386", fpu="single precision (FPv4-SP)",
         cflags=("-mcpu=cortex-m4", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv4-sp-d16"),
         code=(0x00000000, 4 * MIB), ram=(0x20000000, 4 * MIB),
         int8_cycles_per_mac=1.0, float_cycles_per_mac=2.0,
         mac_source="from memory: SMLAD does two 16-bit MACs in one cycle (Cortex-M4 TRM, "
                    "instruction timings), int8 widened with SXTB16 as CMSIS-NN's kernels do; "
                    "a float MAC: VMLA's 3 cycles, about 2 a MAC when pipelined (FPv4-SP)"),
    Core(name="cortex-m7", machine="mps2-an500", fpu="double precision (FPv5-D16)",
         cflags=("-mcpu=cortex-m7", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv5-d16"),
         code=(0x00000000, 4 * MIB), ram=(0x20000000, 4 * MIB),
         int8_cycles_per_mac=0.6, float_cycles_per_mac=1.0,
         mac_source="from memory: SMLAD as on the M4, and a dual-issue pipeline that overlaps "
                    "the loads (Cortex-M7 TRM); a float MAC about 1 cycle, the FPU "
                    "pipelined and dual-issued with the loads"),
    Core(name="cortex-m33", machine="mps2-an505", fpu="single precision (FPv5-SP)",
         cflags=("-mcpu=cortex-m33", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv5-sp-d16"),
         code=(0x10000000, 4 * MIB), ram=(0x38000000, 2 * MIB),
         int8_cycles_per_mac=1.0, float_cycles_per_mac=2.0,
         mac_source="from memory: the DSP extension's SMLAD, single issue as on the M4 "
                    "(Cortex-M33 TRM); a float MAC as on the M4, about 2 cycles"),
    Core(name="cortex-m55", machine="mps3-an547", fpu="Helium (MVE) with half, single and "
                                                       "double precision",
         cflags=("-mcpu=cortex-m55", "-mthumb", "-mfloat-abi=hard"),
         code=(0x10000000, 512 * KIB), ram=(0x30000000, 512 * KIB),
         int8_cycles_per_mac=0.25, float_cycles_per_mac=1.0,
         mac_source="from memory: Helium's VMLADAV over 16 int8 lanes, two beats per cycle "
                    "(Cortex-M55 TRM), about 4 MACs a cycle in kernels; float MACs over 4 "
                    "Helium lanes, taken as 1 cycle each to stay on the safe side"),
)}


def cores_of(text: str) -> list[Core]:
    """The cores `text` names, comma-separated (``cortex-m4,cortex-m33``; ``all``: every one).

    Parameters
    ----------
    text : str
        The value of ``--target``.

    Returns
    -------
    list of Core
        In the order given, each once.

    Raises
    ------
    ScenemonError
        A name that is no core of `CORES`, or none at all.
    """
    names = [n.strip().lower() for n in text.split(",") if n.strip()]
    if names == ["all"]:
        return list(CORES.values())
    if "all" in names:
        raise ScenemonError(f"--target {text!r}: all stands alone (every core); give all, or "
                            f"one or more of {', '.join(CORES)} (comma-separated)")
    if not names:
        raise ScenemonError(f"--target {text!r} names no core; give one or more of "
                            f"{', '.join(CORES)} (comma-separated) or all")
    out: list[Core] = []
    for n in names:
        core = CORES.get(n) or CORES.get(f"cortex-{n}")  # "m4" is cortex-m4
        if core is None:
            raise ScenemonError(f"--target {n!r} is not a core scenemon knows; give one or "
                                f"more of {', '.join(CORES)} (comma-separated) or all")
        if core not in out:
            out.append(core)
    return out
