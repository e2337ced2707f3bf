/*
 * scenemon portable front end: scaled features from PCM, as the model card says.
 *
 * C99, no dynamic allocation, no libm beyond sqrtf (the log and the FFT's cosines are its own,
 * so every IEEE 754 target gives the same bits). Every size, switch
 * and table comes from frontend_constants.h, which `scenemon vectors` writes for one model
 * card; sizes the code cannot work with stop the build (a negative array size).
 *
 * Whole windows:
 *     #include "frontend_constants.h"
 *     #include "frontend.h"
 *     sm_frontend_init();                      // once: FFT twiddles
 *     float feats[SM_FEATURES];
 *     sm_features_i16(pcm, feats);             // SM_WINDOW_SAMPLES int16 samples
 *
 * A stream, one hop at a time (only the frames the hop adds are computed; the others are
 * kept from the window before, for MFCC with a log per frame (db_ref "one", no top_db)
 * their DCT coefficients too):
 *     if (sm_push_hop(hop, feats)) { ... }     // SM_HOP_SAMPLES int16 samples; 1 when feats
 *                                              // holds the next window (window k starts at
 *                                              // sample k * SM_HOP_SAMPLES, as scenemon cuts)
 *
 * Output order is the model's input order (card layout "time_mel" or "mel_time"), with the
 * card's scaling: (features - mean) / std. The two forms share their buffers: a whole-window
 * call restarts the stream.
 */
#ifndef SCENEMON_FRONTEND_H
#define SCENEMON_FRONTEND_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Fill the FFT twiddle tables and empty the stream; call once before anything else. */
void sm_frontend_init(void);

/* In-place radix-2 FFT of SM_FFT_LENGTH points: re holds the real input (im must be all
 * zero); afterwards re/im hold the spectrum, bins 0..SM_FFT_LENGTH/2 are the real FFT.
 * (Kinds with frames only.) */
void sm_rfft(float *re, float *im);

/* Scaled features of one window of int16 PCM (divided by 32768). Returns 0. */
int sm_features_i16(const int16_t *pcm, float *out);

/* Scaled features of one window of float PCM in [-1, 1]; quantised to int16 first when the
 * card says pcm_bits = 16. Returns 0. */
int sm_features_f32(const float *pcm, float *out);

/* Push the next SM_HOP_SAMPLES samples of the stream; returns 1 and writes SM_FEATURES
 * values to out when a window is complete, 0 while the first window is still filling. */
int sm_push_hop(const int16_t *pcm_hop, float *out);

/* The same for float PCM (quantised to int16 first when the card says pcm_bits = 16). */
int sm_push_hop_f32(const float *pcm_hop, float *out);

/* The q15 front end only (frontend_q15.c, card arithmetic = "q15"): the model input in q16
 * integers (value / 65536), the very numbers the float calls above convert at the end. */
int sm_features_q16(const int16_t *pcm, int32_t *out);
int sm_push_hop_q16(const int16_t *pcm_hop, int32_t *out);

/* Forget the stream (the next window needs SM_HIST_SAMPLES new samples). */
void sm_stream_reset(void);

#ifdef __cplusplus
}
#endif

#endif
