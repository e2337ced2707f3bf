/* scenemon link probe: the front end's flash as linked, the library routines it calls
 * (soft float, 64-bit arithmetic, sqrtf, memset) included. Built twice, with
 * SM_LINK_PROBE 1 (every call of the front end a firmware makes) and 0 (nothing of it):
 * the difference of the two programs' text and data is what the front end adds to a
 * firmware image (a few bytes of this caller aside). */
#if SM_LINK_PROBE
#include <stdint.h>

#include "frontend_constants.h"
#include "frontend.h"

static int16_t sm_probe_pcm[SM_WINDOW_SAMPLES];
static float sm_probe_out[SM_FEATURES];
#endif

int main(void) {
#if SM_LINK_PROBE
    sm_frontend_init();
    int r = sm_features_i16(sm_probe_pcm, sm_probe_out);
    r += sm_push_hop(sm_probe_pcm, sm_probe_out);
    return r + (sm_probe_out[0] > 0.0f);
#else
    return 0;
#endif
}
