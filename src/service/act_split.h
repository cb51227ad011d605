/* Splitting one policy pass of the act thread over more threads (veerd --act-threads).
 *
 * When several controllers tick in phase, the act thread evaluates the policy for a batch of
 * their states in one pass (--act-batch). On its own it computes every row of that pass in
 * turn, so the last controller's reply waits for all of them. A split hands the first rows of
 * the pass to helper threads, each with its own workspace, computes the remaining rows on the
 * calling thread meanwhile, and waits for the helpers. It pays when a state's compute is long
 * against waking a thread and against the memory traffic two threads then share: on 2 cores, 4
 * to 8 states of the 2 ms STANDARD model took 0.62-0.73 of one thread's time, 2 states no less,
 * and the 33 us SMALL model's passes got 1.1-1.9x slower (tests/bench/bench_act_split.c).
 *
 * Hand-over is two POSIX semaphores per helper (start, finished): a post is a futex wake when a
 * thread sleeps and a few atomic instructions when it does not, and both calls order memory, so
 * the rows written by one thread are visible to the other after the wait. A helper polls its
 * start semaphore for spin_us before it sleeps, the same trade as the act thread's own
 * --act-spin-us. No lock is shared with admin work; nothing is allocated after start.
 *
 * Threads: veer__act_split_run from one thread at a time (the act thread); start and stop from
 * the thread that owns the split. */
#ifndef VEER_SERVICE_ACT_SPLIT_H
#define VEER_SERVICE_ACT_SPLIT_H

#include <stdint.h>

#include "veer/runtime.h"

typedef struct veer__act_split veer__act_split;

/* The rows of one pass: row r reads states[r * state_dim] and zs[r * z_dim] and writes
 * actions[r * action_dim], values[r], flags[r]. */
typedef struct veer__act_rows {
    uint32_t n;
    const float *states, *zs;
    float *actions, *values;
    uint32_t *flags;
} veer__act_rows;

/* Evaluates rows with `ws` (veer_act_each). One state the model refuses (an embedding index out
 * of range) fails the whole call, so on a refusal the rows are redone one by one and only the
 * refused ones get the fallback action with VEER_ACT_FALLBACK | VEER_ACT_NONFINITE. */
void veer__act_rows_eval(const veer_model_info *info, veer_workspace *ws,
                         const veer__act_rows *rows);

/* Starts `helpers` threads (1 to VEER__ACT_SPLIT_MAX_HELPERS), each with a workspace for
 * `max_rows` rows. priority 0: ordinary scheduling, else SCHED_FIFO at that priority (the
 * caller checked that it is allowed). VEER_ENOMEM, or VEER_ECONFIG (the kernel refused the
 * priority) / VEER_EIO when a thread cannot start. */
#define VEER__ACT_SPLIT_MAX_HELPERS 3
int veer__act_split_start(const veer_bundle *bundle, uint32_t helpers, uint32_t max_rows,
                          uint32_t spin_us, uint32_t priority, veer__act_split **out,
                          veer_error *err);

/* Evaluates `rows` with the helpers and `ws` (the caller's workspace) together and returns when
 * every row is done. A pass of fewer than two rows runs on the caller alone. */
void veer__act_split_run(veer__act_split *s, veer_workspace *ws, const veer__act_rows *rows);

/* Stops and joins the helpers and frees everything. NULL allowed. */
void veer__act_split_stop(veer__act_split *s);

#endif
