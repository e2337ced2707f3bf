/* scenemon fixed-point front end (card arithmetic = "q15"); see frontend.h.
 *
 * Integers only from the int16 samples to the q16 features: no FPU, no libm. The float
 * calls (sm_features_i16 and the others with float output) convert the q16 result at the
 * very end (one rounding to float32, exact below 2^24, then times 2^-16). Bit for bit what scenemon's Python model computes
 * (monitor/features/fixedpoint.py, whose docstring gives every stage's format); every table
 * comes from frontend_constants.h. Needs a compiler whose >> on a negative signed value is
 * an arithmetic shift (gcc and clang for Arm and x86 are; ISO C leaves it to the
 * implementation, C99 6.5.7) and 64-bit integer products (SMULL on Cortex-M3 and later).
 *
 * Per frame: headroom shift, window (q30 samples), the real FFT as an N/2-point radix-2 FFT
 * halved each stage plus a split step, |X|^2 (q46) or |X| (q41), mel sums (int64), offset and log2 (q24), feature units (q16). Per window:
 * dB reference and top_db, DCT (q30 coefficients), layout, scaling (one integer multiply). */
#include <stdint.h>

#include "frontend_constants.h"
#include "frontend.h"

#define SM_CHECK(name, cond) typedef char sm_check_##name[(cond) ? 1 : -1]

SM_CHECK(q15, SM_ARITHMETIC_Q15 == 1);
SM_CHECK(history, SM_HIST_SAMPLES >= SM_WINDOW_SAMPLES && SM_HIST_SAMPLES % SM_HOP_SAMPLES == 0
                  && SM_HIST_SAMPLES - SM_HOP_SAMPLES < SM_WINDOW_SAMPLES);
SM_CHECK(fft, SM_FFT_LENGTH == (1 << SM_FFT_BITS) && SM_FFT_BITS >= 4 && SM_FFT_BITS <= 15);
SM_CHECK(frames, SM_FRAMES >= 1 && SM_FEATURES == SM_FRAMES * SM_CHANNELS
                 && SM_FRAME_OFFSET + SM_FRAME_LENGTH <= SM_FFT_LENGTH);
SM_CHECK(pad, SM_PAD >= 0 && (!SM_PAD_REFLECT || SM_PAD < SM_WINDOW_SAMPLES));
SM_CHECK(tables, sizeof(sm_window_q31) == 4 * SM_FRAME_LENGTH
                 && sizeof(sm_twiddle_re) == 4 * (SM_FFT_LENGTH / 2 + 1)
                 && sizeof(sm_bitrev) == 2 * (SM_FFT_LENGTH / 2)
                 && sizeof(sm_mel_q15) == 2 * SM_MEL_COEFFS
                 && sizeof(sm_log2_q24) == 4 * 257);
SM_CHECK(shared, SM_SHARE_STEP == 0 || (SM_SHARED_FIRST >= 0 && SM_SHARED_LAST < SM_FRAMES
                                        && SM_SHARE_STEP * SM_FRAME_STEP == SM_HOP_SAMPLES));

static int16_t sm_hist[SM_HIST_SAMPLES]; /* the newest samples; the window is sm_hist[0..W) */
static int32_t sm_filled;
#define SM_HALF (SM_FFT_LENGTH / 2)
static int32_t sm_re[SM_HALF]; /* the N/2-point complex FFT: even samples real, odd imaginary */
static int32_t sm_im[SM_HALF];
static int32_t sm_frames[SM_FRAMES * SM_MEL_BANDS]; /* q16 log values, frame after frame */
static int64_t sm_power[SM_MEL_HIGH_BIN - SM_MEL_LOW_BIN + 1]; /* one frame's q46 / q41 bins */
static int32_t sm_out_q[SM_FEATURES];

/* sample j (0 <= j < W + 2 pad) of the window x with its centre padding */
static int32_t sm_padded(const int16_t *x, int j) {
    j -= SM_PAD;
#if SM_PAD > 0
    if (j < 0 || j >= SM_WINDOW_SAMPLES) {
#if SM_PAD_REFLECT
        j = j < 0 ? -j : 2 * (SM_WINDOW_SAMPLES - 1) - j;
#else
        return 0;
#endif
    }
#endif
    return x[j];
}

static int sm_bit_length(uint64_t v) { /* v > 0 */
#if defined(__GNUC__)
    return 64 - __builtin_clzll(v); /* CLZ on Cortex-M3 and later */
#else
    int n = 0;
    while (v) {
        v >>= 1;
        n++;
    }
    return n;
#endif
}

/* log2(v) in q24 for v >= 1: bit length, then the table between its two nearest points */
static int64_t sm_log2(int64_t v) {
    const int e = sm_bit_length((uint64_t)v) - 1;
    const int64_t mant = e >= 30 ? v >> (e - 30) : v << (30 - e); /* q30 in [1, 2) */
    const int low = 30 - 8;
    const int i = (int)((mant >> low) - 256);
    const int64_t frac = mant & ((1 << low) - 1);
    const int64_t t0 = sm_log2_q24[i], t1 = sm_log2_q24[i + 1];
    return ((int64_t)e << 24) + t0 + (((t1 - t0) * frac + (1 << (low - 1))) >> low);
}

#if SM_POWER == 1
static uint32_t sm_isqrt(uint64_t v) { /* floor(sqrt(v)), bit by bit */
    uint64_t r = 0, bit = (uint64_t)1 << 62;
    while (bit > v) bit >>= 2;
    while (bit) {
        if (v >= r + bit) {
            v -= r + bit;
            r = (r >> 1) + bit;
        } else {
            r >>= 1;
        }
        bit >>= 2;
    }
    return (uint32_t)r;
}
#endif

/* radix-2 decimation in time of N/2 points on q30, each stage halved with rounding: Z / M.
 * The twiddle product needs 64 bits (SMULL, SMLAL), the rest stays in 32: no stage can
 * overflow, as no value exceeds sqrt(2) times the frame's largest q30 sample (below 2^30.5) */
static void sm_fft(void) {
    for (int i = 0; i < SM_HALF; i++) {
        int j = sm_bitrev[i];
        if (j > i) {
            int32_t t = sm_re[i]; sm_re[i] = sm_re[j]; sm_re[j] = t;
            t = sm_im[i]; sm_im[i] = sm_im[j]; sm_im[j] = t;
        }
    }
    for (int size = 2; size <= SM_HALF; size <<= 1) {
        const int half = size >> 1, stride = SM_FFT_LENGTH / size;
        for (int start = 0; start < SM_HALF; start += size) {
            for (int k = 0; k < half; k++) {
                const int32_t wr = sm_twiddle_re[k * stride], wi = sm_twiddle_im[k * stride];
                const int a = start + k, b = a + half;
                const int32_t br = sm_re[b], bi = sm_im[b];
                /* the twiddle product halved and rounded: the high word of a 64-bit sum */
                const int32_t tr = (int32_t)(((int64_t)br * wr - (int64_t)bi * wi
                                              + ((int64_t)1 << 31)) >> 32);
                const int32_t ti = (int32_t)(((int64_t)br * wi + (int64_t)bi * wr
                                              + ((int64_t)1 << 31)) >> 32);
                const int32_t ar = (sm_re[a] + 1) >> 1, ai = (sm_im[a] + 1) >> 1;
                sm_re[a] = ar + tr;
                sm_im[a] = ai + ti;
                sm_re[b] = ar - tr;
                sm_im[b] = ai - ti;
            }
        }
    }
}

/* bin k (0 <= k <= N/2) of the real FFT, X / N in q30, from the N/2-point FFT Z / M:
 * X[k] = (A + W^k B / i) / 4, A = Z[k] + conj(Z[M - k]), B = Z[k] - conj(Z[M - k]) */
static void sm_bin(int k, int32_t *re, int32_t *im) {
    const int a = k % SM_HALF, b = (SM_HALF - k) % SM_HALF;
    const int64_t yr = sm_re[a], yi = sm_im[a], cr = sm_re[b], ci = -(int64_t)sm_im[b];
    /* A / 2 and B / 2: below sqrt(2) * 2^30, so 32 bits hold them (and one SMULL each) */
    const int32_t sr = (int32_t)((yr + cr + 1) >> 1), si = (int32_t)((yi + ci + 1) >> 1);
    const int32_t dr = (int32_t)((yr - cr + 1) >> 1), di = (int32_t)((yi - ci + 1) >> 1);
    const int32_t wr = sm_twiddle_re[k], wi = sm_twiddle_im[k];
    *re = ((sr + 1) >> 1) + (int32_t)(((int64_t)di * wr + (int64_t)dr * wi
                                       + ((int64_t)1 << 31)) >> 32);
    *im = ((si + 1) >> 1) + (int32_t)(((int64_t)di * wi - (int64_t)dr * wr
                                       + ((int64_t)1 << 31)) >> 32);
}

/* frame t of the window x -> sm_frames row t (q16 log values) */
static void sm_frame(const int16_t *x, int t) {
    const int base = t * SM_FRAME_STEP + SM_FRAME_OFFSET;
    int32_t peak = 0;
    for (int i = 0; i < SM_FRAME_LENGTH; i++) {
        int32_t v = sm_padded(x, base + i);
        if (v < 0) v = -v;
        if (v > peak) peak = v;
    }
    int s = 0; /* headroom: the most bits the frame can go up by within int16 */
    while (peak > 0 && s < 14 && (peak << (s + 1)) <= 32767) s++;
    for (int i = 0; i < SM_HALF; i++) {
        sm_re[i] = 0;
        sm_im[i] = 0;
    }
    for (int i = 0; i < SM_FRAME_LENGTH; i++) {
        const int32_t xs = sm_padded(x, base + i) * (1 << s); /* within int16 (headroom) */
        const int32_t y = (int32_t)(((int64_t)xs * sm_window_q31[i] + (1 << 15)) >> 16); /* q30 */
        const int pos = SM_FRAME_OFFSET + i;
        if (pos & 1) sm_im[pos >> 1] = y;
        else sm_re[pos >> 1] = y;
    }
    sm_fft();
    /* the spectrum of the bins the mel bands use, once each */
    for (int k = SM_MEL_LOW_BIN; k <= SM_MEL_HIGH_BIN; k++) {
        int32_t re, im;
        sm_bin(k, &re, &im);
        const int64_t p2 = (int64_t)re * re + (int64_t)im * im; /* q60 */
#if SM_POWER == 2
        sm_power[k - SM_MEL_LOW_BIN] = (p2 + (1 << 13)) >> 14; /* q46 */
#else
        sm_power[k - SM_MEL_LOW_BIN] = (int64_t)sm_isqrt((uint64_t)p2) << 11; /* q30 -> q41 */
#endif
    }
    int32_t *row = sm_frames + t * SM_MEL_BANDS;
    int c = 0;
    const int ps = SM_POWER * s;
    for (int m = 0; m < SM_MEL_BANDS; m++) {
        int64_t acc = 0;
        const int first = sm_mel_first_bin[m] - SM_MEL_LOW_BIN;
        for (int k = 0; k < sm_mel_length[m]; k++)
            acc += (int64_t)sm_mel_q15[c + k] * sm_power[first + k];
        c += sm_mel_length[m];
        int d = sm_offset_bits[m] + ps - 62;
        if (d < 0) d = 0;
        int64_t v = (acc >> d) + (sm_offset_q[m] << (ps - d));
        const int64_t floor_v = sm_floor_q[m] << (ps - d);
        if (v < floor_v) v = floor_v;
        if (v < 1) v = 1;
        const int64_t l2 = sm_log2(v) + sm_log_const[m] + (int64_t)(d - ps) * ((int64_t)1 << 24);
        row[m] = (int32_t)((l2 * SM_LOG_FACTOR + ((int64_t)1 << 35)) >> 36);
    }
}

void sm_frontend_init(void) { sm_filled = 0; }

/* per window: dB reference, top_db, DCT, layout and scaling -> sm_out_q (q16) */
static void sm_finish(void) {
#if SM_DB_MAX || SM_TOP_DB_Q
    int32_t peak = sm_frames[0];
    for (int i = 1; i < SM_FRAMES * SM_MEL_BANDS; i++)
        if (sm_frames[i] > peak) peak = sm_frames[i];
#if SM_DB_MAX
    const int32_t ref = peak;
#else
    const int32_t ref = 0;
#endif
    const int32_t low = peak - ref - SM_TOP_DB_Q;
#endif
    for (int t = 0; t < SM_FRAMES; t++) {
        const int32_t *row = sm_frames + t * SM_MEL_BANDS;
        int32_t u[SM_MEL_BANDS];
        for (int m = 0; m < SM_MEL_BANDS; m++) {
            int32_t v = row[m];
#if SM_DB_MAX || SM_TOP_DB_Q
            v -= ref;
#if SM_TOP_DB_Q
            if (v < low) v = low;
#endif
#endif
            u[m] = v;
        }
        for (int ch = 0; ch < SM_CHANNELS; ch++) {
#if SM_MFCC > 0
            int64_t acc = 0;
            for (int m = 0; m < SM_MEL_BANDS; m++) acc += (int64_t)sm_dct_q30[ch * SM_MEL_BANDS + m] * u[m];
            const int64_t v = (acc + ((int64_t)1 << (SM_DCT_BITS - 1))) >> SM_DCT_BITS;
#else
            const int64_t v = u[ch];
#endif
#if SM_LAYOUT_MEL_TIME
            const int i = ch * SM_FRAMES + t;
#else
            const int i = t * SM_CHANNELS + ch;
#endif
#if SM_SCALE_MODE == 0
            const int sidx = 0;
#elif SM_SCALE_MODE == 1
            const int sidx = ch;
#else
            const int sidx = i;
#endif
            const int64_t y = ((v - sm_scale_mean_q[sidx]) * sm_scale_mul[sidx]
                               + ((int64_t)1 << (SM_SCALE_BITS - 1))) >> SM_SCALE_BITS;
            sm_out_q[i] = y > INT32_MAX ? INT32_MAX : y < INT32_MIN ? INT32_MIN : (int32_t)y;
        }
    }
}

static void sm_frames_all(const int16_t *x) {
    for (int t = 0; t < SM_FRAMES; t++) sm_frame(x, t);
}

static void sm_to_float(float *out) {
    for (int i = 0; i < SM_FEATURES; i++) out[i] = (float)sm_out_q[i] * (1.0f / 65536.0f);
}

static void sm_copy_q(int32_t *out) {
    for (int i = 0; i < SM_FEATURES; i++) out[i] = sm_out_q[i];
}

/* int16 of a float sample as the pcm stage rounds it: half to even, saturated */
static int16_t sm_pcm16(float x) {
    float v = x * 32768.0f;
    if (v >= 32767.0f) return 32767;
    if (v <= -32768.0f) return -32768;
    int i = (int)v; /* toward zero */
    float f = v - (float)i;
    if (f > 0.5f || (f == 0.5f && (i & 1))) i += 1;
    else if (f < -0.5f || (f == -0.5f && (i & 1))) i -= 1;
    return (int16_t)i;
}

static void sm_window_q(void) {
    sm_filled = 0; /* sm_hist holds this window, not the stream: the stream restarts */
    sm_frames_all(sm_hist);
    sm_finish();
}

int sm_features_q16(const int16_t *pcm, int32_t *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_hist[i] = pcm[i];
    sm_window_q();
    sm_copy_q(out);
    return 0;
}

int sm_features_i16(const int16_t *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_hist[i] = pcm[i];
    sm_window_q();
    sm_to_float(out);
    return 0;
}

int sm_features_f32(const float *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_hist[i] = sm_pcm16(pcm[i]);
    sm_window_q();
    sm_to_float(out);
    return 0;
}

/* the stream: one hop at a time, the frames a window shares with the one before kept */
static int sm_stream(void) {
    const int was_full = sm_filled == SM_HIST_SAMPLES;
    sm_filled += SM_HOP_SAMPLES;
    if (sm_filled > SM_HIST_SAMPLES) sm_filled = SM_HIST_SAMPLES;
    if (sm_filled < SM_HIST_SAMPLES) return 0;
#if SM_SHARE_STEP > 0
    if (was_full) {
        for (int t = SM_SHARED_FIRST; t <= SM_SHARED_LAST - SM_SHARE_STEP; t++)
            for (int m = 0; m < SM_MEL_BANDS; m++)
                sm_frames[t * SM_MEL_BANDS + m] = sm_frames[(t + SM_SHARE_STEP) * SM_MEL_BANDS + m];
        for (int t = 0; t < SM_FRAMES; t++)
            if (t < SM_SHARED_FIRST || t > SM_SHARED_LAST - SM_SHARE_STEP) sm_frame(sm_hist, t);
    } else {
        sm_frames_all(sm_hist);
    }
#else
    (void)was_full;
    sm_frames_all(sm_hist);
#endif
    sm_finish();
    return 1;
}

static void sm_shift_history(void) {
    for (int i = 0; i < SM_HIST_SAMPLES - SM_HOP_SAMPLES; i++) sm_hist[i] = sm_hist[i + SM_HOP_SAMPLES];
}

int sm_push_hop_q16(const int16_t *pcm_hop, int32_t *out) {
    sm_shift_history();
    for (int i = 0; i < SM_HOP_SAMPLES; i++) sm_hist[SM_HIST_SAMPLES - SM_HOP_SAMPLES + i] = pcm_hop[i];
    if (!sm_stream()) return 0;
    sm_copy_q(out);
    return 1;
}

int sm_push_hop(const int16_t *pcm_hop, float *out) {
    sm_shift_history();
    for (int i = 0; i < SM_HOP_SAMPLES; i++) sm_hist[SM_HIST_SAMPLES - SM_HOP_SAMPLES + i] = pcm_hop[i];
    if (!sm_stream()) return 0;
    sm_to_float(out);
    return 1;
}

int sm_push_hop_f32(const float *pcm_hop, float *out) {
    sm_shift_history();
    for (int i = 0; i < SM_HOP_SAMPLES; i++)
        sm_hist[SM_HIST_SAMPLES - SM_HOP_SAMPLES + i] = sm_pcm16(pcm_hop[i]);
    if (!sm_stream()) return 0;
    sm_to_float(out);
    return 1;
}

void sm_stream_reset(void) { sm_filled = 0; }
