/* Test harness for the portable C front end; raw binary on stdin and stdout.
 *   harness i16 < windows.i16          int16 windows of SM_WINDOW_SAMPLES -> float32 features
 *   harness f32 < windows.f32          float32 windows in [-1, 1] -> float32 features
 *   harness stream_i16 < signal.i16    an int16 stream, pushed one hop at a time -> the
 *                                      features of every complete window
 *   harness stream_f32 < signal.f32    the same for a float32 stream
 *   harness fft < signal.f32           SM_FFT_LENGTH floats per row -> re, im of bins 0..N/2
 * Output: SM_FEATURES float32 per window (or (N/2 + 1) * 2 per FFT row). */
#include <stdio.h>
#include <string.h>

#include "frontend_constants.h"
#include "frontend.h"

static int16_t pcm[SM_HIST_SAMPLES];
static float pcmf[SM_HIST_SAMPLES];
static float feats[SM_FEATURES];

int main(int argc, char **argv) {
    if (argc < 2) return 2;
    const char *mode = argv[1];
    sm_frontend_init();
#if SM_HAS_FRAMING && !defined(SM_ARITHMETIC_Q15) /* the float front end's FFT */
    if (strcmp(mode, "fft") == 0) {
        static float re[SM_FFT_LENGTH], im[SM_FFT_LENGTH], out[SM_FFT_LENGTH + 2];
        while (fread(re, sizeof(float), SM_FFT_LENGTH, stdin) == SM_FFT_LENGTH) {
            memset(im, 0, sizeof im);
            sm_rfft(re, im);
            for (int k = 0; k <= SM_FFT_LENGTH / 2; k++) {
                out[2 * k] = re[k];
                out[2 * k + 1] = im[k];
            }
            fwrite(out, sizeof(float), SM_FFT_LENGTH + 2, stdout);
        }
        return 0;
    }
#endif
    if (strcmp(mode, "i16") == 0) {
        while (fread(pcm, sizeof(int16_t), SM_WINDOW_SAMPLES, stdin) == SM_WINDOW_SAMPLES) {
            sm_features_i16(pcm, feats);
            fwrite(feats, sizeof(float), SM_FEATURES, stdout);
        }
    } else if (strcmp(mode, "f32") == 0) {
        while (fread(pcmf, sizeof(float), SM_WINDOW_SAMPLES, stdin) == SM_WINDOW_SAMPLES) {
            sm_features_f32(pcmf, feats);
            fwrite(feats, sizeof(float), SM_FEATURES, stdout);
        }
    } else if (strcmp(mode, "stream_i16") == 0) {
        while (fread(pcm, sizeof(int16_t), SM_HOP_SAMPLES, stdin) == SM_HOP_SAMPLES)
            if (sm_push_hop(pcm, feats)) fwrite(feats, sizeof(float), SM_FEATURES, stdout);
    } else if (strcmp(mode, "stream_f32") == 0) {
        while (fread(pcmf, sizeof(float), SM_HOP_SAMPLES, stdin) == SM_HOP_SAMPLES)
            if (sm_push_hop_f32(pcmf, feats)) fwrite(feats, sizeof(float), SM_FEATURES, stdout);
    } else {
        return 2;
    }
    return 0;
}
