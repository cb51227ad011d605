/* Splitting a policy pass over helper threads (see act_split.h for the contract).
 *
 * Rows are shared out in contiguous blocks as evenly as they go; the caller keeps the last and
 * largest block, because it starts computing at once while each helper first has to wake.
 * The caller then polls for the helpers' finish for up to FINISH_SPIN_NS before it sleeps on the
 * semaphore: the helpers' blocks are no larger than its own, so they are usually done by then,
 * and a sleep would add a wake-up to the pass for nothing. */
#define _GNU_SOURCE /* pthread_setname_np */
#include "service/act_split.h"

#include <errno.h>
#include <pthread.h>
#include <semaphore.h>
#include <stdatomic.h>
#include <string.h>

#include "base/base.h"
#include "service/rt.h"

#define FINISH_SPIN_NS 200000ull

typedef struct helper {
    veer__act_split *owner;
    pthread_t thread;
    int started;
    veer_workspace *ws;
    sem_t start, finished;
    veer__act_rows rows; /* written by the caller before posting start */
} helper;

struct veer__act_split {
    const veer_model_info *info;
    uint32_t count;
    uint64_t spin_ns;
    atomic_int stop; /* set before the last post of each start semaphore */
    helper h[VEER__ACT_SPLIT_MAX_HELPERS];
};

void veer__act_rows_eval(const veer_model_info *info, veer_workspace *ws,
                         const veer__act_rows *rows)
{
    if (rows->n == 0 || veer_act_each(ws, rows->n, rows->states, rows->zs, rows->actions,
                                      rows->values, rows->flags) >= 0)
        return;
    for (uint32_t r = 0; r < rows->n; r++) {
        float *act = rows->actions + (size_t)r * info->action_dim;
        if (veer_act_each(ws, 1, rows->states + (size_t)r * info->state_dim,
                          rows->zs + (size_t)r * info->z_dim, act, &rows->values[r],
                          &rows->flags[r]) < 0) {
            memcpy(act, info->fallback_action, info->action_dim * sizeof(float));
            rows->values[r] = 0.0f;
            rows->flags[r] = VEER_ACT_FALLBACK | VEER_ACT_NONFINITE;
        }
    }
}

/* Waits on `sem`, polling it first for up to spin_ns. */
static void wait_spinning(sem_t *sem, uint64_t spin_ns)
{
    if (spin_ns != 0) {
        uint64_t until = veer__now_ns() + spin_ns;
        do {
            if (sem_trywait(sem) == 0)
                return;
        } while (veer__now_ns() < until);
    }
    while (sem_wait(sem) != 0 && errno == EINTR)
        ;
}

static void *helper_main(void *arg)
{
    helper *h = arg;
    veer__act_split *s = h->owner;
    for (;;) {
        wait_spinning(&h->start, s->spin_ns);
        if (atomic_load_explicit(&s->stop, memory_order_acquire))
            break;
        veer__act_rows_eval(s->info, h->ws, &h->rows);
        sem_post(&h->finished);
    }
    return NULL;
}

/* Rows [from, from + n) of `all`. */
static veer__act_rows block(const veer_model_info *info, const veer__act_rows *all, uint32_t from,
                            uint32_t n)
{
    veer__act_rows b = {
        .n = n,
        .states = all->states + (size_t)from * info->state_dim,
        .zs = all->zs + (size_t)from * info->z_dim,
        .actions = all->actions + (size_t)from * info->action_dim,
        .values = all->values + from,
        .flags = all->flags + from,
    };
    return b;
}

void veer__act_split_run(veer__act_split *s, veer_workspace *ws, const veer__act_rows *rows)
{
    uint32_t parts = rows->n < s->count + 1 ? rows->n : s->count + 1;
    if (parts < 2) {
        veer__act_rows_eval(s->info, ws, rows);
        return;
    }
    /* parts - 1 helpers take floor(n / parts) rows each; the caller takes what is left. */
    uint32_t each = rows->n / parts;
    for (uint32_t i = 0; i + 1 < parts; i++) {
        s->h[i].rows = block(s->info, rows, i * each, each);
        sem_post(&s->h[i].start);
    }
    uint32_t mine = (parts - 1) * each;
    veer__act_rows own = block(s->info, rows, mine, rows->n - mine);
    veer__act_rows_eval(s->info, ws, &own);
    for (uint32_t i = 0; i + 1 < parts; i++)
        wait_spinning(&s->h[i].finished, FINISH_SPIN_NS);
}

int veer__act_split_start(const veer_bundle *bundle, uint32_t helpers, uint32_t max_rows,
                          uint32_t spin_us, uint32_t priority, veer__act_split **out,
                          veer_error *err)
{
    if (helpers < 1 || helpers > VEER__ACT_SPLIT_MAX_HELPERS)
        return veer__error_set(err, VEER_EINVAL, "helpers", "1 to %d helper threads, got %u",
                               VEER__ACT_SPLIT_MAX_HELPERS, helpers);
    veer__act_split *s = veer__calloc(1, sizeof *s);
    if (s == NULL)
        return veer__error_set(err, VEER_ENOMEM, "act", NULL);
    s->info = veer_bundle_info(bundle);
    s->spin_ns = (uint64_t)spin_us * 1000u;
    int rc = 0;
    pthread_attr_t attr;
    pthread_attr_init(&attr);
    veer__rt_attr_fifo(&attr, priority);
    for (uint32_t i = 0; i < helpers; i++) {
        helper *h = &s->h[i];
        h->owner = s;
        sem_init(&h->start, 0, 0);
        sem_init(&h->finished, 0, 0);
        s->count = i + 1; /* so that stop tears down this helper's semaphores too */
        if ((rc = veer_workspace_create(bundle, max_rows, &h->ws, err)) < 0)
            break;
        int prc = pthread_create(&h->thread, &attr, helper_main, h);
        if (prc != 0) {
            rc = veer__error_set(err, prc == EPERM ? VEER_ECONFIG : VEER_EIO, "act",
                                 "cannot start an act helper thread%s: %s",
                                 priority ? " at SCHED_FIFO priority" : "", strerror(prc));
            break;
        }
        h->started = 1;
        /* Named for ps and top (the act thread keeps the process's name). */
        pthread_setname_np(h->thread, "veerd-helper");
    }
    pthread_attr_destroy(&attr);
    if (rc < 0) {
        veer__act_split_stop(s);
        return rc;
    }
    *out = s;
    return 0;
}

void veer__act_split_stop(veer__act_split *s)
{
    if (s == NULL)
        return;
    atomic_store_explicit(&s->stop, 1, memory_order_release);
    for (uint32_t i = 0; i < s->count; i++) {
        helper *h = &s->h[i];
        if (h->started) {
            sem_post(&h->start);
            pthread_join(h->thread, NULL);
        }
        veer_workspace_destroy(h->ws);
        sem_destroy(&h->start);
        sem_destroy(&h->finished);
    }
    veer__free(s);
}
