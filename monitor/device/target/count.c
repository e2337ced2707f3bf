/* scenemon instruction count: how many instructions the front end executes, in emulation.
 *
 * Built for one core with frontend.c and a card's frontend_constants.h, and run in QEMU with
 * `-icount shift=0`, where the emulated clock advances exactly one nanosecond per executed
 * instruction (QEMU's documentation, "-icount"). SysTick counts the board's processor clock
 * from that emulated time, so its ticks are instructions times a fixed ratio; the ratio is
 * measured here on a loop whose instructions are known (two per turn, then the return), and
 * a second known loop (four per turn) checks it. Instructions, not cycles.
 *
 * Reads pcm.csv (int16 samples, SM_WINDOW_SAMPLES a row, up to SM_COUNT_ROWS rows) and
 * prints, one line each (scenemon reads them):
 *   calibration <instructions> <ticks>      the two-instruction loop
 *   check <instructions> <ticks>            the four-instruction loop
 *   init <ticks>                            sm_frontend_init()
 *   window <k> <ticks>                      sm_features_i16() on row k
 *   hop <k> <ready> <ticks>                 sm_push_hop() on the rows' samples in turn
 * C99 with GNU inline assembly for the two loops. */
#include <stdint.h>
#include <stdio.h>

#include "frontend_constants.h"
#include "frontend.h"

#ifndef SM_COUNT_ROWS
#define SM_COUNT_ROWS 8
#endif
#define SM_CAL_TURNS 4000000u
#define SM_CHECK_TURNS 1000000u

#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)

static volatile uint32_t wraps;

/* the SysTick exception: one more turn of the 24-bit counter */
void sm_systick(void) { wraps++; }

static uint64_t ticks(void) {
    uint32_t w, c;
    do {
        w = wraps;
        c = SYST_CVR;
    } while (w != wraps);
    return (uint64_t)w * 0x1000000u + (0xFFFFFFu - c);
}

/* n turns of two instructions, then the return: 2 n + 1 instructions (n >= 1) */
__attribute__((noinline, naked)) static void sm_loop2(uint32_t n) {
    (void)n;
    __asm__ volatile("1: subs r0, r0, #1\n\tbne 1b\n\tbx lr\n");
}

/* n turns of four instructions, then the return: 4 n + 1 instructions (n >= 1) */
__attribute__((noinline, naked)) static void sm_loop4(uint32_t n) {
    (void)n;
    __asm__ volatile("1: adds r1, r1, #1\n\teors r2, r2, r1\n\tsubs r0, r0, #1\n\tbne 1b\n\t"
                     "bx lr\n");
}

static int16_t rows[SM_COUNT_ROWS][SM_WINDOW_SAMPLES];
static float feats[SM_FEATURES];

static int read_row(FILE *f, int16_t *dst) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) {
        long v;
        if (fscanf(f, " %ld%*[,\n\r]", &v) != 1) return 0;
        dst[i] = (int16_t)v;
    }
    return 1;
}

static void say(const char *what, uint64_t t) {
    printf("%s %lu\n", what, (unsigned long)t);
}

int main(void) {
    FILE *f = fopen("pcm.csv", "r");
    if (!f) {
        fprintf(stderr, "count: cannot open pcm.csv\n");
        return 2;
    }
    int n = 0;
    while (n < SM_COUNT_ROWS && read_row(f, rows[n])) n++;
    fclose(f);
    if (n == 0) {
        fprintf(stderr, "count: pcm.csv holds no whole window\n");
        return 2;
    }
    SYST_RVR = 0xFFFFFFu;
    SYST_CVR = 0;
    SYST_CSR = 7; /* processor clock, exception on each wrap, enabled */
    while (SYST_CVR == 0) {
    } /* the reload after the write above raises no exception: start after it */

    uint64_t t0 = ticks();
    sm_loop2(SM_CAL_TURNS);
    uint64_t t1 = ticks();
    printf("calibration %lu %lu\n", 2ul * SM_CAL_TURNS + 1ul, (unsigned long)(t1 - t0));
    t0 = ticks();
    sm_loop4(SM_CHECK_TURNS);
    t1 = ticks();
    printf("check %lu %lu\n", 4ul * SM_CHECK_TURNS + 1ul, (unsigned long)(t1 - t0));

    t0 = ticks();
    sm_frontend_init();
    say("init", ticks() - t0);
    for (int k = 0; k < n; k++) {
        t0 = ticks();
        sm_features_i16(rows[k], feats);
        t1 = ticks();
        printf("window %d %lu\n", k, (unsigned long)(t1 - t0));
    }
    sm_stream_reset();
    const int16_t *stream = &rows[0][0]; /* the rows one after another, as one recording */
    const long total = (long)n * SM_WINDOW_SAMPLES;
    int h = 0;
    for (long j = 0; j + SM_HOP_SAMPLES <= total; j += SM_HOP_SAMPLES) {
        t0 = ticks();
        int ready = sm_push_hop(stream + j, feats);
        t1 = ticks();
        printf("hop %d %d %lu\n", h++, ready, (unsigned long)(t1 - t0));
    }
    return 0;
}
