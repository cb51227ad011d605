/* Robustness of the loader against damaged content that passes the checksum: payloads of the
 * two fixture models with random byte changes, insertions, deletions and truncations, each
 * re-framed with a correct BLAKE2b-256 checksum so the decoder and the validator see them.
 * Every mutant must either be refused with one of the loader's codes and a named field, or
 * load and then act with finite actions within the bounds (or the fallback). Run under the
 * Sanitize build, ASan and UBSan check every path for memory and arithmetic errors. A
 * mutation loop of this kind is common practice for decoders (no source); the mutants are
 * drawn from a fixed generator, so a failure reproduces. */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>
#include <sodium.h>

#include "base/base.h"
#include "support.h"

enum { MUTANTS_PER_MODEL = 5000 };

static int loader_code(int rc)
{
    switch (rc) {
    case VEER_EDECODE:
    case VEER_EDIMCHAIN:
    case VEER_ENETMISSING:
    case VEER_ENONFINITE:
    case VEER_EBOUNDS:
    case VEER_EREFSHAPE:
    case VEER_ESTATSSIZE:
    case VEER_EFIELD:
    case VEER_EFALLBACK:
    case VEER_ESINGULAR:
        return 1;
    default:
        return 0;
    }
}

static size_t mutate(const uint8_t *src, size_t len, uint8_t *dst)
{
    memcpy(dst, src, len);
    int edits = 1 + (int)fx_uniform(0, 3);
    for (int e = 0; e < edits; e++) {
        size_t at = (size_t)fx_uniform(0, (double)len);
        switch ((int)fx_uniform(0, 5)) {
        case 0: /* flip a bit */
            dst[at] ^= (uint8_t)(1u << (int)fx_uniform(0, 8));
            break;
        case 1: /* a random byte */
            dst[at] = (uint8_t)fx_uniform(0, 256);
            break;
        case 2: /* an extreme byte, to reach huge varints and NaN patterns */
            dst[at] = fx_uniform(0, 1) < 0.5 ? 0xff : 0x00;
            break;
        case 3: /* delete a byte */
            memmove(dst + at, dst + at + 1, len - at - 1);
            len--;
            break;
        default: /* truncate */
            len = at;
            break;
        }
        if (len == 0)
            break;
    }
    return len;
}

static void run_mutants(Veer__Bundle__Model *m, int *loaded, int *refused)
{
    size_t plen = veer__bundle__model__get_packed_size(m);
    uint8_t *payload = malloc(plen), *mutant = malloc(plen);
    assert_non_null(payload);
    assert_non_null(mutant);
    veer__bundle__model__pack(m, payload);
    assert_true(sodium_init() >= 0);
    for (int k = 0; k < MUTANTS_PER_MODEL; k++) {
        size_t mlen = mutate(payload, plen, mutant);
        uint8_t digest[32], *framed;
        size_t flen;
        crypto_generichash(digest, 32, mutant, mlen, NULL, 0);
        assert_int_equal(veer__bundle_frame(mutant, mlen, 1, digest, 32, &framed, &flen, NULL), 0);
        veer_bundle *b = NULL;
        veer_error err;
        int rc = veer_bundle_open_mem(framed, flen, &b, &err);
        veer__free(framed);
        if (rc != 0) {
            if (!loader_code(rc) || err.code != rc || err.field[0] == '\0')
                fail_msg("mutant %d: %s field \"%s\": %s", k, veer_errname(rc), err.field,
                         err.message);
            assert_null(b);
            (*refused)++;
            continue;
        }
        (*loaded)++;
        /* It loaded, so it is a valid model: acting must keep every promise. */
        const veer_model_info *info = veer_bundle_info(b);
        veer_workspace *ws = NULL;
        int wrc = veer_workspace_create(b, 4, &ws, &err);
        if (wrc == VEER_EINVAL || wrc == VEER_ENOMEM) { /* a mutated width may be huge */
            veer_bundle_close(b);
            continue;
        }
        assert_int_equal(wrc, 0);
        float *states = fx_random((size_t)8 * info->state_dim, 2.0f);
        float *z = fx_random(info->z_dim, 1.0f);
        float *actions = fx_alloc((size_t)8 * info->action_dim * sizeof(float));
        float values[8];
        uint32_t flags[8];
        rc = veer_act_batch(ws, 8, states, z, actions, values, flags);
        if (rc == 0) {
            for (int r = 0; r < 8; r++) {
                assert_true(isfinite(values[r]));
                for (uint32_t j = 0; j < info->action_dim; j++) {
                    float a = actions[r * info->action_dim + j];
                    assert_true(isfinite(a));
                    if (info->action_kind == VEER_ACTION_CONTINUOUS)
                        assert_true(a >= info->action_low[j] && a <= info->action_high[j]);
                    else
                        assert_true(a >= 0 && a < (float)info->action_count && a == floorf(a));
                }
            }
        } else {
            /* Only an embedding meeting a non-index state feature may refuse to act. */
            assert_int_equal(rc, VEER_EINVAL);
        }
        veer_workspace_destroy(ws);
        veer_bundle_close(b);
    }
    free(payload);
    free(mutant);
}

static void test_mutants(void **state)
{
    (void)state;
    int loaded = 0, refused = 0;
    fx_srand(41);
    run_mutants(fx_continuous_model(), &loaded, &refused);
    fx_srand(42);
    run_mutants(fx_discrete_model(), &loaded, &refused);
    print_message("%d mutants loaded and acted within bounds, %d refused with a code\n", loaded,
                  refused);
    /* Both outcomes must really occur, or the mutations are not reaching the validator. */
    assert_true(loaded > 50 && refused > 500);
    fx_free_all();
}

int main(void)
{
    const struct CMUnitTest tests[] = {cmocka_unit_test(test_mutants)};
    return cmocka_run_group_tests(tests, NULL, NULL);
}
