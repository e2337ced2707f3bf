/* scenemon portable front end; see frontend.h. */
#include <math.h>
#include <stdint.h>

#include "frontend_constants.h"
#include "frontend.h"

#define SM_HALF (SM_FFT_LENGTH / 2)

static float sm_cos[SM_HALF];
static float sm_sin[SM_HALF];
static uint16_t sm_bitrev[SM_FFT_LENGTH];
static float sm_re[SM_FFT_LENGTH];
static float sm_im[SM_FFT_LENGTH];
static float sm_power[SM_FFT_LENGTH / 2 + 1];
static float sm_pcm[SM_WINDOW_SAMPLES];

void sm_frontend_init(void) {
    const float two_pi = 6.283185307179586f;
    int bits = 0;
    while ((1 << bits) < SM_FFT_LENGTH) bits++;
    for (int k = 0; k < SM_HALF; k++) {
        float a = two_pi * (float)k / (float)SM_FFT_LENGTH;
        sm_cos[k] = cosf(a);
        sm_sin[k] = cosf(a - 1.5707963267948966f); /* sin(a) */
    }
    for (int i = 0; i < SM_FFT_LENGTH; i++) {
        unsigned r = 0;
        for (int b = 0; b < bits; b++) r |= ((unsigned)(i >> b) & 1u) << (bits - 1 - b);
        sm_bitrev[i] = (uint16_t)r;
    }
}

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

#if SM_PCM_BITS == 16
/* round half to even, saturated to int16 (as numpy's round and clip) */
static int16_t sm_q16(float x) {
    float v = x * 32768.0f;
    if (v >= 32767.0f) return 32767;
    if (v <= -32768.0f) return -32768;
    int i = (int)v; /* toward zero */
    float f = v - (float)i;
    if (f > 0.5f || (f == 0.5f && (i & 1))) i += 1;
    else if (f < -0.5f || (f == -0.5f && (i & 1))) i -= 1;
    return (int16_t)i;
}
#endif

static float sm_log(float x) {
#if SM_LOG_KIND == 0
    return logf(x);
#elif SM_LOG_KIND == 1
    return logf(x) * 0.43429448190325176f;
#else
    return (20.0f / (float)SM_POWER) * logf(x) * 0.43429448190325176f;
#endif
}

static float sm_scaled(float v, int frame, int band) {
#if SM_LAYOUT_MEL_TIME
    int idx = band * SM_FRAMES + frame;
#else
    int idx = frame * SM_MEL_BANDS + band;
#endif
#if SM_SCALE_MODE == 0
    (void)idx;
    return (v - sm_scale_mean[0]) * sm_scale_inv_std[0];
#elif SM_SCALE_MODE == 1
    (void)idx;
    return (v - sm_scale_mean[band]) * sm_scale_inv_std[band];
#else
    return (v - sm_scale_mean[idx]) * sm_scale_inv_std[idx];
#endif
}

static int sm_features(const float *x, float *out) {
    for (int t = 0; t < SM_FRAMES; t++) {
        const float *frame = x + t * SM_FRAME_STEP;
        for (int i = 0; i < SM_FFT_LENGTH; i++) {
            sm_re[i] = i < SM_FRAME_LENGTH ? frame[i] * sm_window[i] : 0.0f;
            sm_im[i] = 0.0f;
        }
        sm_rfft(sm_re, sm_im);
        for (int k = 0; k <= SM_HALF; k++) {
            float p = sm_re[k] * sm_re[k] + sm_im[k] * sm_im[k];
#if SM_POWER == 1
            p = sqrtf(p);
#endif
            sm_power[k] = p;
        }
        int c = 0;
        for (int m = 0; m < SM_MEL_BANDS; m++) {
            float acc = 0.0f;
            for (int k = 0; k < sm_mel_length[m]; k++) acc += sm_mel_weights[c + k] * sm_power[sm_mel_first_bin[m] + k];
            c += sm_mel_length[m];
            float v = sm_scaled(sm_log(acc + SM_LOG_OFFSET), t, m);
#if SM_LAYOUT_MEL_TIME
            out[m * SM_FRAMES + t] = v;
#else
            out[t * SM_MEL_BANDS + m] = v;
#endif
        }
    }
    return 0;
}

int sm_features_i16(const int16_t *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) sm_pcm[i] = (float)pcm[i] / 32768.0f;
    return sm_features(sm_pcm, out);
}

int sm_features_f32(const float *pcm, float *out) {
    for (int i = 0; i < SM_WINDOW_SAMPLES; i++) {
#if SM_PCM_BITS == 16
        sm_pcm[i] = (float)sm_q16(pcm[i]) / 32768.0f;
#else
        sm_pcm[i] = pcm[i];
#endif
    }
    return sm_features(sm_pcm, out);
}
