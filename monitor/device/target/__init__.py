"""The front end on the target's instruction set: Cortex-M cores in system emulation.

Owns: `cores` (the table of cores: QEMU board, compiler flags, memory, per-kernel figures),
`cross` (the toolchain, cross-compiling with our start-up code and linker script, running
in QEMU with semihosting, a check's digest, an object's flash and RAM), `count` (the front
end's instructions counted in emulation), and the C and linker files beside them
(``startup.c``, ``cortexm.ld``, ``count.c``).
May import: what ``monitor.device`` may, and ``monitor.device`` itself.
"""
