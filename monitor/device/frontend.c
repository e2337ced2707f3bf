/* scenemon portable front end; see frontend.h.
 *
 * One block per stage, in the order the samples go through them (pcm, pre-emphasis, centre
 * padding, framing and window, spectrum, mel, log, DCT when the log is per frame, then per
 * window: dB reference and top_db, the DCT after them, layout, scaling). frontend_constants.h
 * switches each on or off (SM_HAS_*) and holds its sizes and tables. C99, no allocation,
 * libm only for sqrtf (IEEE 754 rounds it correctly everywhere): the log and the FFT's
 * cosines are our own float arithmetic (below), so the features are the same bits on every
 * IEEE 754 target built without contraction to fused multiply-add (-ffp-contract=off, the
 * default of gcc's -std=c99). */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "frontend_constants.h"
#include "frontend.h"

/* --- compile-time checks: a negative array size stops a C99 build ----------------------- */
#define SM_CHECK(name, cond) typedef char sm_check_##name[(cond) ? 1 : -1]

SM_CHECK(window_samples, SM_WINDOW_SAMPLES >= 1 && SM_WINDOW_SAMPLES <= (1L << 22));
SM_CHECK(hop_samples, SM_HOP_SAMPLES >= 1 && SM_HOP_SAMPLES <= (1L << 22));
SM_CHECK(history, SM_HIST_SAMPLES >= SM_WINDOW_SAMPLES && SM_HIST_SAMPLES % SM_HOP_SAMPLES == 0
                  && SM_HIST_SAMPLES - SM_HOP_SAMPLES < SM_WINDOW_SAMPLES);
SM_CHECK(pcm_bits, SM_PCM_BITS == 0 || SM_PCM_BITS == 16);
SM_CHECK(features, SM_FEATURES >= 1);
SM_CHECK(scale_mode, SM_SCALE_MODE >= 0 && SM_SCALE_MODE <= 2);
SM_CHECK(scale_table, sizeof(sm_scale_mean) == sizeof(sm_scale_inv_std)
                      && (SM_SCALE_MODE != 2 || sizeof(sm_scale_mean) == sizeof(float) * SM_FEATURES));

/* --- our own log and cosine: float operations only, so no C library's last bit -----------
 * Two C libraries round logf / log10f / cosf differently in the last bit (newlib built for
 * cores without a double-precision FPU against glibc: 1 ulp on about 0.7% of logf's inputs),
 * and the features would differ between the laptop and the board. These use only + - * /
 * and integer bit operations, each rounded as IEEE 754 says, in one fixed order. */
#if SM_HAS_FRAMING
/* ln(x): x = 2^k m, sqrt(1/2) <= m < sqrt(2), f = m - 1, s = f / (2 + f);
 * ln(m) = 2 atanh(s) = 2 (s + s^3/3 + s^5/5 + ...), |s| < 0.172, the series to s^13; the sum
 * is arranged as f - (f^2/2 - s (f^2/2 + R)) so that the large part f is added last, and
 * ln 2 is split so that k ln2_hi is exact. Within 0.77 ulp of ln over the float range. */
static float sm_ln(float x) {
    if (!(x > 0.0f)) return x == 0.0f ? -HUGE_VALF : (x - x) / (x - x); /* NaN below 0 */
    uint32_t u;
    memcpy(&u, &x, sizeof u);
    if (u >= 0x7f800000u) return x; /* +infinity */
    int k = 0;
    if (u < 0x00800000u) { /* subnormal: scale by 2^25 first */
        x *= 33554432.0f;
        memcpy(&u, &x, sizeof u);
        k = -25;
    }
    k += (int)(u >> 23) - 127;
    u &= 0x007fffffu;
    if (u > 0x3504f3u) { /* mantissa above sqrt(2): halve it */
        u |= 0x3f000000u;
        k += 1;
    } else {
        u |= 0x3f800000u;
    }
    float m;
    memcpy(&m, &u, sizeof m);
    const float f = m - 1.0f, s = f / (2.0f + f), z = s * s;
    const float r = z * (2.0f / 3 + z * (2.0f / 5 + z * (2.0f / 7 + z * (2.0f / 9
                    + z * (2.0f / 11 + z * (2.0f / 13))))));
    const float half_f2 = 0.5f * f * f, dk = (float)k;
    /* ln 2 = 0.693145751953125 (9 trailing zero bits) + 1.42860682e-06 */
    return dk * 6.93145751953125e-01f - ((half_f2 - (s * (half_f2 + r) + dk * 1.42860682e-06f)) - f);
}

/* cos and sin of 2 pi j / n (n a power of two, 0 <= j <= n / 2): the angle brought into
 * [0, pi/4] by the circle's symmetries in integers (exact), then the Taylor series to a^12;
 * within 9.1e-8 of the exact values for every n from 16 to 32768. */
static void sm_turn(int j, int n, float *c, float *s) {
    int flip = 0, swap = 0;
    if (4 * j > n) { /* pi - a: the cosine changes sign */
        j = n / 2 - j;
        flip = 1;
    }
    if (8 * j > n) { /* pi/2 - a: cosine and sine swap */
        j = n / 4 - j;
        swap = 1;
    }
    const float a = (float)j * (6.28318530717958648f / (float)n), z = a * a;
    const float cv = 1.0f - z * (1.0f / 2 - z * (1.0f / 24 - z * (1.0f / 720 - z * (1.0f / 40320
                     - z * (1.0f / 3628800 - z * (1.0f / 479001600))))));
    const float sv = a - a * z * (1.0f / 6 - z * (1.0f / 120 - z * (1.0f / 5040
                     - z * (1.0f / 362880 - z * (1.0f / 39916800)))));
    *c = swap ? sv : cv;
    *s = swap ? cv : sv;
    if (flip) *c = -*c;
}
#endif

/* --- stage: pcm (and the stream's history of samples) ----------------------------------- */
static float sm_hist[SM_HIST_SAMPLES]; /* the newest samples; the window is sm_hist[0..W) */
static int32_t sm_filled;              /* samples in sm_hist, at most SM_HIST_SAMPLES */

static float sm_pcm_f32(float x) {
#if SM_PCM_BITS == 16
    /* round half to even, saturated to int16 (as numpy's round and clip) */
    float v = x * 32768.0f;
    if (v >= 32767.0f) return 32767.0f / 32768.0f;
    if (v <= -32768.0f) return -1.0f;
    int i = (int)v; /* toward zero */
    float f = v - (float)i;
    if (f > 0.5f || (f == 0.5f && (i & 1))) i += 1;
    else if (f < -0.5f || (f == -0.5f && (i & 1))) i -= 1;
    return (float)i / 32768.0f;
#else
    return x;
#endif
}

/* --- stage: pre-emphasis, within each window: y[0] = x[0], y[j] = x[j] - a x[j-1] ------- */
static float sm_emphasised(const float *x, int j) {
#if SM_HAS_PREEMPHASIS
    return j == 0 ? x[0] : x[j] - SM_PREEMPHASIS * x[j - 1];
#else
    return x[j];
#endif
}

#if SM_HAS_FRAMING
SM_CHECK(fft_power_of_two, SM_FFT_LENGTH >= 16 && SM_FFT_LENGTH <= 32768
                           && (SM_FFT_LENGTH & (SM_FFT_LENGTH - 1)) == 0);
SM_CHECK(frame_fits_fft, SM_FRAME_LENGTH >= 1 && SM_FRAME_LENGTH <= SM_FFT_LENGTH
                         && SM_FRAME_OFFSET >= 0 && SM_FRAME_OFFSET + SM_FRAME_LENGTH <= SM_FRAME_SPAN
                         && SM_FRAME_SPAN <= SM_FFT_LENGTH);
SM_CHECK(frames_fit, SM_FRAMES >= 1 && SM_FRAME_STEP >= 1
                     && (SM_FRAMES - 1) * (long)SM_FRAME_STEP + SM_FRAME_SPAN
                        <= SM_WINDOW_SAMPLES + 2L * SM_PAD);
SM_CHECK(pad, SM_PAD >= 0 && (!SM_PAD_REFLECT || SM_PAD < SM_WINDOW_SAMPLES));
SM_CHECK(window_table, sizeof(sm_window) == sizeof(float) * SM_FRAME_LENGTH);
SM_CHECK(bins, SM_BINS == SM_FFT_LENGTH / 2 + 1);
SM_CHECK(shared, SM_SHARE_STEP == 0 || (SM_SHARED_FIRST >= 0 && SM_SHARED_LAST < SM_FRAMES
                                        && SM_SHARE_STEP * SM_FRAME_STEP == SM_HOP_SAMPLES
                                        && SM_SHARE_STEP <= SM_SHARED_LAST - SM_SHARED_FIRST));
SM_CHECK(output, SM_FEATURES == SM_FRAMES * SM_CHANNELS);

/* --- stage: centre padding: sample j of the padded window (0 <= j < W + 2 pad) ----------- */
static float sm_padded(const float *x, int j) {
    j -= SM_PAD;
#if SM_PAD > 0
    if (j < 0 || j >= SM_WINDOW_SAMPLES) {
#if SM_PAD_REFLECT
        j = j < 0 ? -j : 2 * (SM_WINDOW_SAMPLES - 1) - j;
#else
        return 0.0f;
#endif
    }
#endif
    return sm_emphasised(x, j);
}

/* --- stage: spectrum: radix-2 FFT ------------------------------------------------------ */
#define SM_HALF (SM_FFT_LENGTH / 2)
static float sm_cos[SM_HALF];
static float sm_sin[SM_HALF];
static uint16_t sm_bitrev[SM_FFT_LENGTH];
static float sm_re[SM_FFT_LENGTH];
static float sm_im[SM_FFT_LENGTH];

void sm_rfft(float *re, float *im) {
    for (int i = 0; i < SM_FFT_LENGTH; i++) {
        int j = sm_bitrev[i];
        if (j > i) {
            float t = re[i]; re[i] = re[j]; re[j] = t;
            t = im[i]; im[i] = im[j]; im[j] = t;
        }
    }
    for (int size = 2; size <= SM_FFT_LENGTH; size <<= 1) {
        int half = size >> 1, step = SM_FFT_LENGTH / size;
        for (int start = 0; start < SM_FFT_LENGTH; start += size) {
            for (int k = 0; k < half; k++) {
                float wr = sm_cos[k * step], wi = -sm_sin[k * step]; /* e^{-i 2 pi k / size} */
                int a = start + k, b = a + half;
                float tr = re[b] * wr - im[b] * wi;
                float ti = re[b] * wi + im[b] * wr;
                re[b] = re[a] - tr; im[b] = im[a] - ti;
                re[a] += tr; im[a] += ti;
            }
        }
    }
}

#if SM_HAS_MEL
/* --- stage: mel (sparse table: first bin and length per band, weights packed) ---------- */
SM_CHECK(mel_table, sizeof(sm_mel_weights) == sizeof(float) * SM_MEL_COEFFS
                    && sizeof(sm_mel_first_bin) == sizeof(int16_t) * SM_MEL_BANDS
                    && sizeof(sm_mel_length) == sizeof(int16_t) * SM_MEL_BANDS);
static float sm_power[SM_BINS];
#endif

/* --- stage: log: offset, floor, ln / log10 / dB; the frames a stream shares ------------ */
static float sm_frames[SM_FRAMES * SM_FRAME_FEATURES];

static float sm_log(float v) {
    v += SM_LOG_OFFSET;
#if SM_HAS_LOG_FLOOR
    if (v < SM_LOG_FLOOR) v = SM_LOG_FLOOR;
#endif
#if SM_LOG_KIND == 0
    return sm_ln(v);
#elif SM_LOG_KIND == 1
    return sm_ln(v) * 0.434294481903251828f; /* log10(e) */
#else
    return (SM_DB_FACTOR * 0.434294481903251828f) * sm_ln(v);
#endif
}

#if SM_HAS_DCT
/* --- stage: DCT (DCT-II rows, the lifter folded in) ------------------------------------
 * With nothing per window before it (db_ref "one", no top_db) it is per frame: each frame's
 * coefficients replace its log values in sm_frames (the first SM_MFCC of the row), so a
 * stream computes them for the new frames only. Otherwise it runs per window in sm_finish,
 * after the dB reference and floor. */
#define SM_DCT_PER_FRAME (!SM_DB_REF_MAX && !SM_HAS_TOP_DB)
SM_CHECK(dct_table, sizeof(sm_dct) == sizeof(float) * SM_MFCC * SM_MEL_BANDS
                    && SM_CHANNELS == SM_MFCC && SM_FRAME_FEATURES == SM_MEL_BANDS
                    && SM_MFCC <= SM_MEL_BANDS);
static float sm_row[SM_MEL_BANDS]; /* one frame's log values, the DCT's input */

/* coefficient c of the frame in sm_row */
static float sm_dct_coefficient(int c) {
    const float *d = sm_dct + c * SM_MEL_BANDS;
    float acc = 0.0f;
    for (int m = 0; m < SM_MEL_BANDS; m++)
        acc += d[m] * sm_row[m];
    return acc;
}
#endif

/* frame t of the window x: window, FFT, |X|^power, mel, log (and the DCT when it is per
 * frame) -> sm_frames row t */
static void sm_frame(const float *x, int t) {
    const int base = t * SM_FRAME_STEP + SM_FRAME_OFFSET; /* padded-window sample */
    float *row = sm_frames + t * SM_FRAME_FEATURES;
    for (int i = 0; i < SM_FFT_LENGTH; i++) {
        sm_re[i] = 0.0f;
        sm_im[i] = 0.0f;
    }
    for (int i = 0; i < SM_FRAME_LENGTH; i++)
        sm_re[SM_FRAME_OFFSET + i] = sm_padded(x, base + i) * sm_window[i];
    sm_rfft(sm_re, sm_im);
    for (int k = 0; k < SM_BINS; k++) {
        float p = sm_re[k] * sm_re[k] + sm_im[k] * sm_im[k];
#if SM_POWER == 1
        p = sqrtf(p);
#endif
#if SM_HAS_MEL
        sm_power[k] = p;
#else
        row[k] = sm_log(p);
#endif
    }
#if SM_HAS_MEL
    int c = 0;
    for (int m = 0; m < SM_MEL_BANDS; m++) {
        float acc = 0.0f;
        const float *p = sm_power + sm_mel_first_bin[m];
        for (int k = 0; k < sm_mel_length[m]; k++) acc += sm_mel_weights[c + k] * p[k];
        c += sm_mel_length[m];
        row[m] = sm_log(acc);
    }
#endif
#if SM_HAS_DCT && SM_DCT_PER_FRAME
    for (int m = 0; m < SM_MEL_BANDS; m++) sm_row[m] = row[m];
    for (int k = 0; k < SM_MFCC; k++) row[k] = sm_dct_coefficient(k);
#endif
}

static void sm_frames_all(const float *x) {
    for (int t = 0; t < SM_FRAMES; t++) sm_frame(x, t);
}
#endif /* SM_HAS_FRAMING */

void sm_frontend_init(void) {
#if SM_HAS_FRAMING
    int bits = 0;
    while ((1 << bits) < SM_FFT_LENGTH) bits++;
    for (int k = 0; k < SM_HALF; k++) sm_turn(k, SM_FFT_LENGTH, &sm_cos[k], &sm_sin[k]);
    for (int i = 0; i < SM_FFT_LENGTH; i++) {
        unsigned r = 0;
        for (int b = 0; b < bits; b++) r |= ((unsigned)(i >> b) & 1u) << (bits - 1 - b);
        sm_bitrev[i] = (uint16_t)r;
    }
#endif
    sm_filled = 0;
}

#if SM_HAS_FRAMING && !(SM_HAS_DCT && SM_DCT_PER_FRAME)
/* the dB reference, then the top_db floor relative to the window's maximum */
static float sm_db(float v, float ref, float low) {
    v -= ref;
#if SM_HAS_TOP_DB
    if (v < low) v = low;
#else
    (void)low;
#endif
    return v;
}
#endif

/* --- per window: dB reference and top_db (log), DCT, layout, per-window standardisation,
 * scaling. Reads sm_frames (or the samples x), writes SM_FEATURES values to out. ---------- */
static void sm_finish(const float *x, float *out) {
#if SM_HAS_FRAMING
    (void)x;
#if SM_HAS_DCT && SM_DCT_PER_FRAME
    /* the rows hold each frame's coefficients already (see the DCT stage) */
#else
#if SM_DB_REF_MAX || SM_HAS_TOP_DB
    float peak = sm_frames[0];
    for (int i = 1; i < SM_FRAMES * SM_FRAME_FEATURES; i++)
        if (sm_frames[i] > peak) peak = sm_frames[i];
#endif
#if SM_DB_REF_MAX
    const float ref = peak;
#else
    const float ref = 0.0f;
#endif
#if SM_HAS_TOP_DB
    const float low = (peak - ref) - SM_TOP_DB;
#else
    const float low = 0.0f;
#endif
#endif
    for (int t = 0; t < SM_FRAMES; t++) {
        const float *row = sm_frames + t * SM_FRAME_FEATURES;
#if SM_HAS_DCT && !SM_DCT_PER_FRAME
        for (int m = 0; m < SM_MEL_BANDS; m++) sm_row[m] = sm_db(row[m], ref, low);
#endif
        for (int c = 0; c < SM_CHANNELS; c++) {
#if SM_HAS_DCT && SM_DCT_PER_FRAME
            float acc = row[c];
#elif SM_HAS_DCT
            float acc = sm_dct_coefficient(c);
#else
            float acc = sm_db(row[c], ref, low);
#endif
#if SM_LAYOUT_MEL_TIME
            out[c * SM_FRAMES + t] = acc;
#else
            out[t * SM_CHANNELS + c] = acc;
#endif
        }
    }
#else
    for (int j = 0; j < SM_WINDOW_SAMPLES; j++) out[j] = sm_emphasised(x, j);
#endif
#if SM_PER_WINDOW
    /* minus the mean of all values, over their population std + eps (Kahan sums) */
    float sum = 0.0f, comp = 0.0f;
    for (int i = 0; i < SM_FEATURES; i++) {
        float y = out[i] - comp, s = sum + y;
        comp = (s - sum) - y;
        sum = s;
    }
    const float mean = sum / (float)SM_FEATURES;
    sum = 0.0f; comp = 0.0f;
    for (int i = 0; i < SM_FEATURES; i++) {
        float d = out[i] - mean;
        float y = d * d - comp, s = sum + y;
        comp = (s - sum) - y;
        sum = s;
    }
    const float scale = 1.0f / (sqrtf(sum / (float)SM_FEATURES) + SM_PER_WINDOW_EPS);
    for (int i = 0; i < SM_FEATURES; i++) out[i] = (out[i] - mean) * scale;
#endif
    for (int i = 0; i < SM_FEATURES; i++) {
#if SM_SCALE_MODE == 0
        const int s = 0;
#elif SM_SCALE_MODE == 1
#if SM_LAYOUT_MEL_TIME
        const int s = i / SM_FRAMES;
#else
        const int s = i % SM_CHANNELS;
#endif
#else
        const int s = i;
#endif
        out[i] = (out[i] - sm_scale_mean[s]) * sm_scale_inv_std[s];
    }
}

/* --- whole windows ------------------------------------------------------------------- */
static int sm_window_features(float *out) {
    sm_filled = 0; /* sm_hist now holds this window, not the stream: the stream restarts */
#if SM_HAS_FRAMING
    sm_frames_all(sm_hist);
#endif
    sm_finish(sm_hist, out);
    return 0;
}

int sm_features_i16(const int16_t *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_hist[i] = (float)pcm[i] / 32768.0f;
    return sm_window_features(out);
}

int sm_features_f32(const float *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_hist[i] = sm_pcm_f32(pcm[i]);
    return sm_window_features(out);
}

/* --- the stream: one hop at a time, only the new frames computed ----------------------- */
static int sm_stream_features(float *out) {
    const int was_full = sm_filled == SM_HIST_SAMPLES;
    sm_filled += SM_HOP_SAMPLES;
    if (sm_filled > SM_HIST_SAMPLES) sm_filled = SM_HIST_SAMPLES;
    if (sm_filled < SM_HIST_SAMPLES) return 0;
#if SM_HAS_FRAMING
#if SM_SHARE_STEP > 0
    if (was_full) {
        /* the frames inside the window a hop ago are this window's, SM_SHARE_STEP rows on */
        for (int t = SM_SHARED_FIRST; t <= SM_SHARED_LAST - SM_SHARE_STEP; t++)
            for (int m = 0; m < SM_FRAME_FEATURES; m++)
                sm_frames[t * SM_FRAME_FEATURES + m] =
                    sm_frames[(t + SM_SHARE_STEP) * SM_FRAME_FEATURES + m];
        for (int t = 0; t < SM_FRAMES; t++)
            if (t < SM_SHARED_FIRST || t > SM_SHARED_LAST - SM_SHARE_STEP) sm_frame(sm_hist, t);
    } else {
        sm_frames_all(sm_hist);
    }
#else
    (void)was_full;
    sm_frames_all(sm_hist);
#endif
#else
    (void)was_full;
#endif
    sm_finish(sm_hist, out);
    return 1;
}

static void sm_shift_history(void) {
    for (int i = 0; i < SM_HIST_SAMPLES - SM_HOP_SAMPLES; i++) sm_hist[i] = sm_hist[i + SM_HOP_SAMPLES];
}

int sm_push_hop(const int16_t *pcm_hop, float *out) {
    sm_shift_history();
    float *dst = sm_hist + (SM_HIST_SAMPLES - SM_HOP_SAMPLES);
    for (int i = 0; i < SM_HOP_SAMPLES; i++) dst[i] = (float)pcm_hop[i] / 32768.0f;
    return sm_stream_features(out);
}

int sm_push_hop_f32(const float *pcm_hop, float *out) {
    sm_shift_history();
    float *dst = sm_hist + (SM_HIST_SAMPLES - SM_HOP_SAMPLES);
    for (int i = 0; i < SM_HOP_SAMPLES; i++) dst[i] = sm_pcm_f32(pcm_hop[i]);
    return sm_stream_features(out);
}

void sm_stream_reset(void) { sm_filled = 0; }
