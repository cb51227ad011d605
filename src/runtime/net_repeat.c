/* A linear layer over rows that repeat each state (see net_repeat.h). */
#include "runtime/net_repeat.h"

#include <assert.h>
#include <string.h>

#include "runtime/bundle.h"
#include "runtime/kernels.h"

static_assert(VEER__MAX_INPUTS <= VEER__MAX_REP_BLOCKS, "a branch's inputs must fit the blocks");
static_assert(VEER__MAX_BRANCHES <= VEER__MAX_REP_BLOCKS, "a net's branches must fit the blocks");

int veer__rep_worth(const veer__rep_cols *cols, uint32_t rep)
{
    if (rep < 2)
        return 0;
    for (uint32_t i = 0; i < cols->count; i++)
        if (cols->blocks[i].vary == VEER__REP_SHARED)
            return 1;
    return 0;
}

void veer__rep_linear(const veer__layer *l, const veer__rep_cols *cols, size_t n, uint32_t rep,
                      const float *x, size_t ldx, float *shared, float *y)
{
    uint32_t in = l->in_dim, out = l->out_dim;
    size_t states = n / rep;

    /* The shared part, once per state: the state's first row stands for all its rows. */
    for (size_t u = 0; u < states; u++) {
        if (l->bias != NULL)
            memcpy(shared + u * out, l->bias, (size_t)out * sizeof *shared);
        else
            memset(shared + u * out, 0, (size_t)out * sizeof *shared);
    }
    for (uint32_t i = 0; i < cols->count; i++) {
        const veer__rep_block *bl = &cols->blocks[i];
        if (bl->vary == VEER__REP_SHARED)
            veer__k_linear_block(states, bl->width, out, x + bl->col, ldx * rep,
                                 l->weight + bl->col, in, shared);
    }
    for (size_t r = 0; r < n; r++)
        memcpy(y + r * out, shared + (r / rep) * out, (size_t)out * sizeof *y);

    /* Each row's own part. */
    for (uint32_t i = 0; i < cols->count; i++) {
        const veer__rep_block *bl = &cols->blocks[i];
        if (bl->vary == VEER__REP_PER_ROW) {
            veer__k_linear_block(n, bl->width, out, x + bl->col, ldx, l->weight + bl->col, in, y);
        } else if (bl->vary == VEER__REP_ONEHOT) {
            /* A column of W per nonzero input (one for a one-hot action): read down W's rows. */
            for (size_t r = 0; r < n; r++)
                for (uint32_t j = 0; j < bl->width; j++) {
                    float v = x[r * ldx + bl->col + j];
                    if (v == 0.0f)
                        continue;
                    const float *w = l->weight + bl->col + j;
                    float *yr = y + r * out;
                    for (uint32_t o = 0; o < out; o++)
                        yr[o] += v * w[(size_t)o * in];
                }
        }
    }
}
