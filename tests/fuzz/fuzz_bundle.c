/* Fuzz target: the bundle loader (veer_bundle_open_mem, src/runtime).
 *
 * An input that starts with the bundle magic is loaded as it is: this fuzzes the framing, the
 * version and the checksum check. Any other input is taken as a Model payload and framed with
 * its correct BLAKE2b-256 checksum first, so the fuzzer reaches the schema decoding and the
 * validation behind the checksum instead of stopping at it. A bundle that loads must then act:
 * one veer_act on a plausible state must give a finite action within the bounds (or the
 * fallback), which is the runtime's contract for every accepted bundle. */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "runtime/bundle_io.h"
#include "veer/runtime.h"

static void act_once(const veer_bundle *b)
{
    const veer_model_info *in = veer_bundle_info(b);
    veer_workspace *ws = NULL;
    veer_error err;
    if (veer_workspace_create(b, 1, &ws, &err) != 0)
        return; /* a bundle may be too large for memory; refusing is allowed */
    float *state = calloc(in->state_dim + 1, sizeof *state);
    float *z = calloc(in->z_dim + 1, sizeof *z);
    float *action = calloc(in->action_dim + 1, sizeof *action);
    if (in->reference_count > 0)
        memcpy(state, in->reference_states, in->state_dim * sizeof *state);
    else if (in->has_stats)
        memcpy(state, in->state_mean, in->state_dim * sizeof *state);
    for (uint32_t i = 0; i < in->z_dim; i++)
        z[i] = (i % 2 ? -1.0f : 1.0f);
    float value = 0;
    uint32_t flags = 0;
    int rc = veer_act(ws, state, z, action, &value, &flags);
    if (rc == 0) {
        for (uint32_t i = 0; i < in->action_dim; i++) {
            if (!isfinite(action[i]))
                abort();
            if (in->action_kind == VEER_ACTION_CONTINUOUS &&
                (action[i] < in->action_low[i] || action[i] > in->action_high[i]))
                abort();
            if (in->action_kind == VEER_ACTION_DISCRETE &&
                (action[i] < 0 || action[i] >= (float)in->action_count ||
                 action[i] != floorf(action[i])))
                abort();
        }
        if (!isfinite(value))
            abort();
    }
    free(state);
    free(z);
    free(action);
    veer_workspace_destroy(ws);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    veer_bundle *b = NULL;
    veer_error err;
    int rc;
    if (size >= VEER__BUNDLE_MAGIC_LEN &&
        memcmp(data, VEER_BUNDLE_MAGIC, VEER__BUNDLE_MAGIC_LEN) == 0) {
        rc = veer_bundle_open_mem(data, size, &b, &err);
    } else {
        uint8_t digest[VEER_DIGEST_BYTES];
        uint8_t *framed = NULL;
        size_t framed_len = 0;
        if (veer__digest(data, size, digest) != 0 ||
            veer__bundle_frame(data, size, VEER_BUNDLE_FORMAT_VERSION, digest, sizeof digest,
                               &framed, &framed_len, &err) != 0)
            abort();
        rc = veer_bundle_open_mem(framed, framed_len, &b, &err);
        veer__free(framed);
    }
    if (rc != 0) {
        if (rc >= 0 || b != NULL || err.code != rc)
            abort(); /* a refusal carries its code and leaves nothing open */
        return 0;
    }
    act_once(b);
    veer_bundle_close(b);
    return 0;
}
