/* scenemon's start-up code for a Cortex-M core in system emulation (QEMU's MPS2 / MPS3 boards).
 *
 * The vector table (initial stack pointer, reset, faults, SysTick), then the reset handler:
 * it gives the floating-point unit (and Helium) access where the core has one (CPACR,
 * coprocessors 10 and 11: Armv7-M / Armv8-M Architecture Reference Manual), zeroes .bss,
 * opens the semihosting standard streams (newlib's librdimon), and runs main(); exit() ends
 * the emulation through semihosting with main's status. A fault prints one line and ends
 * the emulation with a failure. The stack is the top of the RAM the linker script names
 * (the board's semihosting heap information is not used: on some boards it names memory
 * the secure state cannot use). C99. */
#include <stdint.h>

extern uint32_t __stack_top[];
extern uint32_t __bss_start__[], __bss_end__[];
extern void initialise_monitor_handles(void);
extern int main(void);
extern void exit(int status);

void sm_reset(void);
void sm_fault(void);
void sm_systick(void);

/* semihosting (Arm's "Semihosting for AArch32 and AArch64"): SYS_WRITE0 = 0x04,
 * SYS_EXIT = 0x18 with ADP_Stopped_RunTimeErrorUnknown = 0x20023 */
void sm_fault(void) {
    static const char msg[] = "scenemon: the core faulted (hard fault, memory or usage fault)\n";
    register uint32_t r0 __asm__("r0") = 0x04;
    register const char *r1 __asm__("r1") = msg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    register uint32_t e0 __asm__("r0") = 0x18;
    register uint32_t e1 __asm__("r1") = 0x20023;
    __asm__ volatile("bkpt 0xab" : "+r"(e0) : "r"(e1) : "memory");
    for (;;) {
    }
}

/* SysTick: nothing unless a program (the instruction count) defines its own */
__attribute__((weak)) void sm_systick(void) {}

void sm_reset(void) {
#if defined(__ARM_FP) || defined(__ARM_FEATURE_MVE)
    *(volatile uint32_t *)0xE000ED88u |= 0xFu << 20; /* CPACR: CP10 and CP11, full access */
    __asm__ volatile("dsb\n\tisb" ::: "memory");
#endif
    for (uint32_t *p = __bss_start__; p < __bss_end__; p++) *p = 0;
    initialise_monitor_handles();
    exit(main());
}

/* the vector table: the initial stack pointer, then the handlers (reset, NMI, hard fault,
 * memory management, bus and usage fault, secure fault, four reserved, SVCall, debug
 * monitor, reserved, PendSV, SysTick) */
__attribute__((section(".vectors"), used)) void (*const sm_vectors[16])(void) = {
    (void (*)(void))(uintptr_t)__stack_top, sm_reset, sm_fault, sm_fault, sm_fault, sm_fault,
    sm_fault, sm_fault, 0, 0, 0, 0, 0, 0, 0, sm_systick,
};
