/* Test harness for the portable C front end.
 *   harness i16 < pcm.csv      features of int16 windows (one window per line)
 *   harness f32 < pcm.csv      the same samples given as float PCM (value / 32768)
 *   harness fft < signal.csv   SM_FFT_LENGTH reals per line -> re,im of bins 0..N/2
 * Output: one row of comma-separated numbers per input row. */
#include <stdio.h>
#include <string.h>

#include "frontend_constants.h"
#include "frontend.h"

static int16_t pcm[SM_WINDOW_SAMPLES];
static float pcmf[SM_WINDOW_SAMPLES];
static float feats[SM_FEATURES];
static float re[SM_FFT_LENGTH], im[SM_FFT_LENGTH];

static int read_row(float *dst, int n) {
    for (int i = 0; i < n; i++) {
        float v;
        if (scanf(" %f%*c", &v) != 1) return 0;
        dst[i] = v;
    }
    return 1;
}

int main(int argc, char **argv) {
    if (argc < 2) return 2;
    sm_frontend_init();
    if (strcmp(argv[1], "fft") == 0) {
        while (read_row(re, SM_FFT_LENGTH)) {
            memset(im, 0, sizeof im);
            sm_rfft(re, im);
            for (int k = 0; k <= SM_FFT_LENGTH / 2; k++)
                printf("%s%.9g,%.9g", k ? "," : "", re[k], im[k]);
            printf("\n");
        }
        return 0;
    }
    int as_float = strcmp(argv[1], "f32") == 0;
    while (read_row(pcmf, SM_WINDOW_SAMPLES)) {
        if (as_float) {
            for (int i = 0; i < SM_WINDOW_SAMPLES; i++) pcmf[i] = pcmf[i] / 32768.0f;
            sm_features_f32(pcmf, feats);
        } else {
            for (int i = 0; i < SM_WINDOW_SAMPLES; i++) pcm[i] = (int16_t)pcmf[i];
            sm_features_i16(pcm, feats);
        }
        for (int i = 0; i < SM_FEATURES; i++) printf("%s%.9g", i ? "," : "", feats[i]);
        printf("\n");
    }
    return 0;
}
