/* scenemon firmware-side check: runs pcm.csv through the shipped front end and compares.
 *
 *   make check        (builds check_fe from check.c, frontend.c and the headers, runs it)
 *
 * Reads pcm.csv (int16 samples, one window per row), features.csv (the scaled features
 * scenemon computed) and, for an int8 model, input_int8.csv (the model's int8 input). For
 * each window it computes the features with sm_features_i16(), reports the largest absolute
 * difference against features.csv and how many int8 input values differ after the input
 * quantisation q = round(x / scale) + zero_point (half to even, saturated), as the model's
 * input tensor has it. Exit 0 when every window is within tolerance: every feature finite
 * (here and in features.csv), within SM_CHECK_FEATURE_TOL, and int8 inputs within
 * SM_CHECK_INT8_STEPS steps. For the q15 front end (SM_ARITHMETIC_Q15) the check is exact: it
 * also reads features_q16.csv (the model input in q16 integers) and every integer, every
 * float and every int8 input must equal scenemon's (tolerances 0).
 *
 * The last line is a digest of every feature value computed, in order (see below): equal
 * digests from two builds (the laptop's and the board's) mean bit-identical features.
 *
 * C99; reads files with stdio, so it runs on the host (or a board with semihosting). */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "frontend_constants.h"
#include "frontend.h"
#include "check_params.h"

static int16_t pcm[SM_WINDOW_SAMPLES];
static float feats[SM_FEATURES];
static float want[SM_FEATURES];
#if SM_CHECK_INT8
static int want_q[SM_FEATURES];
#endif
#ifdef SM_ARITHMETIC_Q15
static int32_t got_q16[SM_FEATURES];
static int32_t want_q16[SM_FEATURES];

static int read_i32(FILE *f, int32_t *dst, int n) {
    for (int i = 0; i < n; i++) {
        long long v; /* 64 bits: a value beyond int32 is refused, not wrapped */
        if (fscanf(f, " %lld%*[,\n\r]", &v) != 1) return 0;
        if (v < INT32_MIN || v > INT32_MAX) return 0;
        dst[i] = (int32_t)v;
    }
    return 1;
}
#endif

/* one row of int16 samples: 1 read, 0 the file ended before it, -1 a row that is cut short or
 * holds something else than int16 numbers */
static int read_ints(FILE *f, int16_t *dst, int n) {
    for (int i = 0; i < n; i++) {
        long v;
        int got = fscanf(f, " %ld%*[,\n\r]", &v);
        if (got != 1) return (i == 0 && got == EOF) ? 0 : -1;
        if (v < -32768 || v > 32767) return -1;
        dst[i] = (int16_t)v;
    }
    return 1;
}

static int read_floats(FILE *f, float *dst, int n) {
    for (int i = 0; i < n; i++) {
        if (fscanf(f, " %f%*[,\n\r]", &dst[i]) != 1) return 0;
    }
    return 1;
}

#if SM_CHECK_INT8
static int read_q(FILE *f, int *dst, int n) {
    for (int i = 0; i < n; i++) {
        if (fscanf(f, " %d%*[,\n\r]", &dst[i]) != 1) return 0;
    }
    return 1;
}

/* x / scale in float (as the runtimes' input quantisation), rounded half to even, then the
 * zero point added and saturated to int8 */
static int quantise(float x) {
    float v = x / SM_INPUT_SCALE;
    float r = rintf(v); /* the default rounding mode: to nearest, ties to even (C99 7.12.9.4) */
    int q = (int)r + SM_INPUT_ZERO_POINT;
    if (q < -128) q = -128;
    if (q > 127) q = 127;
    return q;
}
#endif

/* --- the digest: 64-bit FNV-1a over the bytes of each float32 feature value (its IEEE 754
 * bits, least significant byte first, whatever the machine's byte order), in the order
 * computed; offset basis and prime from the FNV specification (Fowler, Noll, Vo). */
static uint64_t digest = 14695981039346656037u;

static void digest_features(const float *v, int n) {
    for (int i = 0; i < n; i++) {
        uint32_t bits;
        memcpy(&bits, &v[i], sizeof bits);
        for (int b = 0; b < 4; b++) {
            digest ^= (bits >> (8 * b)) & 0xffu;
            digest *= 1099511628211u;
        }
    }
}

static FILE *open_or_die(const char *name) {
    FILE *f = fopen(name, "r");
    if (!f) {
        fprintf(stderr, "check: cannot open %s\n", name);
        exit(2);
    }
    return f;
}

int main(void) {
    FILE *fp = open_or_die("pcm.csv");
    FILE *ff = open_or_die("features.csv");
#if SM_CHECK_INT8
    FILE *fq = open_or_die("input_int8.csv");
#endif
#ifdef SM_ARITHMETIC_Q15
    FILE *f16 = open_or_die("features_q16.csv");
    int q16_off = 0;
#endif
    int windows = 0, bad = 0;
    float worst = 0.0f;
    int worst_steps = 0, values_off = 0, nonfinite_all = 0;
    sm_frontend_init();
    int row;
    while ((row = read_ints(fp, pcm, SM_WINDOW_SAMPLES)) == 1) {
        if (!read_floats(ff, want, SM_FEATURES)) {
            fprintf(stderr, "check: features.csv has fewer rows than pcm.csv\n");
            return 2;
        }
        sm_features_i16(pcm, feats);
        digest_features(feats, SM_FEATURES);
#ifdef SM_ARITHMETIC_Q15
        if (!read_i32(f16, want_q16, SM_FEATURES)) {
            fprintf(stderr, "check: features_q16.csv has fewer rows than pcm.csv, or a value "
                            "that is no int32 number\n");
            return 2;
        }
        sm_features_q16(pcm, got_q16);
        int q16_window = 0;
        for (int i = 0; i < SM_FEATURES; i++) q16_window += got_q16[i] != want_q16[i];
        q16_off += q16_window;
#endif
        /* a NaN compares false with everything, so it would pass a "d > diff" test: values
         * that are not finite (ours or the file's) are counted apart and fail the window */
        float diff = 0.0f;
        int nonfinite = 0;
        for (int i = 0; i < SM_FEATURES; i++) {
            if (!isfinite(feats[i]) || !isfinite(want[i])) {
                nonfinite++;
                continue;
            }
            float d = fabsf(feats[i] - want[i]);
            if (d > diff) diff = d;
        }
        int steps = 0, off = 0;
#if SM_CHECK_INT8
        if (!read_q(fq, want_q, SM_FEATURES)) {
            fprintf(stderr, "check: input_int8.csv has fewer rows than pcm.csv\n");
            return 2;
        }
        for (int i = 0; i < SM_FEATURES; i++) {
            if (!isfinite(feats[i])) { /* no int8 value to compare (counted above) */
                off++;
                continue;
            }
            int s = abs(quantise(feats[i]) - want_q[i]);
            if (s) off++;
            if (s > steps) steps = s;
        }
#endif
        int ok = nonfinite == 0 && diff <= SM_CHECK_FEATURE_TOL && steps <= SM_CHECK_INT8_STEPS;
#ifdef SM_ARITHMETIC_Q15
        ok = ok && q16_window == 0;
#endif
        if (!ok) bad++;
        if (diff > worst) worst = diff;
        if (steps > worst_steps) worst_steps = steps;
        values_off += off;
        nonfinite_all += nonfinite;
        printf("window %4d  features max abs diff %.3g", windows, (double)diff);
#ifdef SM_ARITHMETIC_Q15
        printf(", q16 values that differ: %d", q16_window);
#endif
        if (nonfinite) printf(", %d not finite", nonfinite);
#if SM_CHECK_INT8 /* a float model: there is no int8 input to compare, so nothing is said */
        printf("  int8 inputs %s (%d of %d differ, largest %d step%s)",
               off ? "differ" : "match", off, SM_FEATURES, steps, steps == 1 ? "" : "s");
#endif
        printf("%s\n", ok ? "" : "  OUT OF TOLERANCE");
        windows++;
    }
    printf("%d windows: features max abs diff %.3g (tolerance %.3g), not finite: %d", windows,
           (double)worst, (double)SM_CHECK_FEATURE_TOL, nonfinite_all);
#if SM_CHECK_INT8
    printf("; int8 input values that differ: %d, by at most %d step%s (tolerance %d)",
           values_off, worst_steps, worst_steps == 1 ? "" : "s", SM_CHECK_INT8_STEPS);
#else
    printf("; a float model: no int8 input compared");
#endif
#ifdef SM_ARITHMETIC_Q15
    printf("; q16 values that differ: %d (exact check)", q16_off);
#endif
    /* the verdict counts the rows too: a file cut short or spoilt fails, and says so here */
    if (row < 0)
        printf("; pcm.csv row %d is not %d int16 numbers; FAILED\n", windows + 1,
               SM_WINDOW_SAMPLES);
    else if (windows != SM_CHECK_WINDOWS)
        printf("; read %d windows of pcm.csv, expected %d; FAILED\n", windows, SM_CHECK_WINDOWS);
    else
        printf("; %s\n", bad ? "FAILED" : "passed");
    printf("features digest (FNV-1a 64 of their float32 bytes): %08lx%08lx\n",
           (unsigned long)(digest >> 32), (unsigned long)(digest & 0xffffffffu));
    return (bad || row < 0 || windows != SM_CHECK_WINDOWS) ? 1 : 0;
}
