/*
 * scenemon portable front end: scaled log-mel features from PCM, as the model card says.
 *
 * C99, no dynamic allocation, no libm beyond logf / sqrtf / cosf. Every size and table
 * comes from frontend_constants.h, which `scenemon vectors` writes for one model card.
 *
 * Usage:
 *     #include "frontend_constants.h"
 *     #include "frontend.h"
 *     sm_frontend_init();                      // once: FFT twiddles
 *     float feats[SM_FEATURES];
 *     sm_features_i16(pcm, feats);             // SM_WINDOW_SAMPLES int16 samples
 *
 * Output order is the model's input order (card layout "time_mel" or "mel_time"),
 * standardised with the card's scaling: (log-mel - mean) / std.
 */
#ifndef SCENEMON_FRONTEND_H
#define SCENEMON_FRONTEND_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Fill the FFT twiddle tables; call once before anything else. */
void sm_frontend_init(void);

/* In-place radix-2 FFT of SM_FFT_LENGTH points: re holds the real input (im must be all
 * zero); afterwards re/im hold the spectrum, bins 0..SM_FFT_LENGTH/2 are the real FFT. */
void sm_rfft(float *re, float *im);

/* Scaled features of one window of int16 PCM (divided by 32768). Returns 0. */
int sm_features_i16(const int16_t *pcm, float *out);

/* Scaled features of one window of float PCM in [-1, 1]; quantised to int16 first when the
 * card says pcm_bits = 16. Returns 0. */
int sm_features_f32(const float *pcm, float *out);

#ifdef __cplusplus
}
#endif

#endif
