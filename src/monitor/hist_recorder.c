/* The interval recorder: two histograms behind one atomic pointer, so a reader can take
 * everything recorded since its last take while the writer keeps recording (the idea of
 * HdrHistogram's interval recorder; veer's own, simpler protocol for one writer).
 *
 * Key choice: the writer announces each record with an odd phase counter before it reads the
 * active pointer, using sequentially consistent operations. A reader that has swapped the
 * pointer then only has to see the phase leave the odd value it read (or see it even) to know
 * no record is still writing into the old histogram. The writer pays one atomic increment per
 * value and never waits; the reader waits at most one record.
 */
#include "veer/histogram.h"

#include <pthread.h>
#include <sched.h>
#include <stdatomic.h>

#include "base/base.h"

struct veer_hist_recorder {
    _Atomic(veer_hist *) active;
    _Atomic uint64_t phase; /* odd while the writer is inside a record */
    veer_hist *idle;        /* the reader's, under take_lock */
    pthread_mutex_t take_lock;
};

int veer_hist_recorder_create(veer_hist_recorder **out)
{
    if (out == NULL)
        return VEER_EINVAL;
    veer_hist_recorder *r = veer__calloc(1, sizeof *r);
    if (r == NULL)
        goto fail_struct;
    veer_hist *a, *b;
    if (veer_hist_create(&a) != 0)
        goto fail_active;
    if (veer_hist_create(&b) != 0)
        goto fail_idle;
    if (pthread_mutex_init(&r->take_lock, NULL) != 0)
        goto fail_mutex;
    atomic_init(&r->active, a);
    atomic_init(&r->phase, 0);
    r->idle = b;
    *out = r;
    return 0;

fail_mutex:
    veer_hist_destroy(b);
fail_idle:
    veer_hist_destroy(a);
fail_active:
    veer__free(r);
fail_struct:
    *out = NULL;
    return VEER_ENOMEM;
}

void veer_hist_recorder_destroy(veer_hist_recorder *r)
{
    if (r == NULL)
        return;
    pthread_mutex_destroy(&r->take_lock);
    veer_hist_destroy(atomic_load(&r->active));
    veer_hist_destroy(r->idle);
    veer__free(r);
}

/* The writer announces itself (phase odd) before it reads the active pointer, with sequentially
 * consistent operations, so a reader that swapped the pointer and then sees an even phase, or
 * sees the odd phase end, knows no record can still be writing into the old histogram. */
void veer_hist_recorder_record(veer_hist_recorder *r, uint64_t value_ns)
{
    uint64_t p = atomic_fetch_add_explicit(&r->phase, 1, memory_order_seq_cst);
    veer_hist *h = atomic_load_explicit(&r->active, memory_order_seq_cst);
    veer_hist_record(h, value_ns);
    atomic_store_explicit(&r->phase, p + 2, memory_order_release);
}

int veer_hist_recorder_take(veer_hist_recorder *r, veer_hist *into)
{
    if (r == NULL || into == NULL)
        return VEER_EINVAL;
    pthread_mutex_lock(&r->take_lock);
    veer_hist *old = atomic_exchange_explicit(&r->active, r->idle, memory_order_seq_cst);
    uint64_t p = atomic_load_explicit(&r->phase, memory_order_seq_cst);
    if (p & 1u) {
        for (unsigned spins = 0; atomic_load_explicit(&r->phase, memory_order_acquire) == p;
             spins++) {
            if (spins > 64)
                sched_yield(); /* the writer was preempted inside a record */
        }
    }
    int rc = veer_hist_merge(into, old);
    veer_hist_reset(old);
    r->idle = old;
    pthread_mutex_unlock(&r->take_lock);
    return rc;
}
