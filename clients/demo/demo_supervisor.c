/* The demo's supervisor: registers the task suite with veerd, switches the arm's channel to the
 * next task every few seconds, and prints one status line a second.
 *
 * Tasks are sent the way a plant's supervisor would: the reach tasks as a goal state (the
 * gripper at rest over the bin) or as reward samples, the others as reward samples over training
 * states (demo_fb.h builds both, the same specifications the evaluation encodes in-process).
 * veerd encodes them off the act path; a switch is then one pointer swap that the controller's
 * next act sees, which the status line shows as the task named in the replies.
 *
 * The status figures come from the controller's per-tick records of the last whole second (see
 * demo_run.h for how the two threads share them) and from veerd's /metrics endpoint for drift.
 */
#define _GNU_SOURCE
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "base/base.h"
#include "demo_fb.h"
#include "demo_run.h"
#include "veer/client.h"

static int cmp_u32(const void *a, const void *b)
{
    uint32_t x = *(const uint32_t *)a, y = *(const uint32_t *)b;
    return (x > y) - (x < y);
}

int veer_demo_task_at_epoch(const veer_demo_run *run, uint64_t epoch)
{
    for (int i = run->nswitches - 1; i >= 0; i--)
        if (run->switches[i].epoch == epoch)
            return run->switches[i].task;
    return -1;
}

static int switch_to(veer_demo_run *run, int task)
{
    veer_error err = {0};
    const veer_client_channel *ch;
    int rc = veer_client_switch(run->admin, run->opt.channel, veer_arm_tasks[task].name, &ch, &err);
    if (rc) {
        fprintf(stderr, "veer-arm-demo: switch to %s: %s (%s): %s\n", veer_arm_tasks[task].name,
                veer_errname(rc), err.field, err.message);
        return rc;
    }
    if (run->nswitches < VEER_DEMO_MAX_SWITCHES)
        run->switches[run->nswitches++] = (veer_demo_switch){
            .tick = atomic_load(&run->ticks_done), .epoch = ch->epoch, .task = task};
    return 0;
}

int veer_demo_supervisor_setup(veer_demo_run *run)
{
    veer_error err = {0};
    veer_client_options co;
    veer_client_options_init(&co);
    co.admin_endpoint = run->opt.admin;
    co.timeout_ms = 10000; /* encoding 4096 samples on a busy machine */
    int rc = veer_client_open(&co, &run->admin, &err);
    if (rc) {
        fprintf(stderr, "veer-arm-demo: cannot open the admin socket %s: %s\n", run->opt.admin,
                err.message);
        return rc;
    }
    veer_bundle *bundle;
    if ((rc = veer_bundle_open(run->opt.bundle, &bundle, &err)) != 0) {
        fprintf(stderr, "veer-arm-demo: --bundle %s: %s (%s): %s\n", run->opt.bundle,
                veer_errname(rc), err.field, err.message);
        return rc;
    }
    for (int t = 0; t < VEER_ARM_TASK_COUNT && rc == 0; t++) {
        const veer_arm_task *task = &veer_arm_tasks[t];
        veer_demo_encoding enc = run->opt.reach_goal && veer_arm_task_has_goal(task)
                                     ? VEER_DEMO_ENCODE_GOAL
                                     : VEER_DEMO_ENCODE_SAMPLES;
        veer_demo_task_spec spec;
        const veer_client_task *stored;
        if ((rc = veer_demo_task_spec_build(bundle, task, &run->params, enc, 1, &spec, &err)) ==
            0) {
            rc = veer_client_task_put(run->admin, task->name, &spec.spec, VEER_ARM_OBS_DIM, &stored,
                                      &err);
            veer_demo_task_spec_free(&spec);
        }
        if (rc) {
            fprintf(stderr, "veer-arm-demo: task %s: %s (%s): %s\n", task->name, veer_errname(rc),
                    err.field, err.message);
            break;
        }
        if (!run->opt.quiet) {
            if (enc == VEER_DEMO_ENCODE_GOAL)
                printf("supervisor: task %-16s goal state (gripper at rest over the bin)\n",
                       task->name);
            else
                printf("supervisor: task %-16s %u reward samples, centred, R² %.2f\n", task->name,
                       stored->count, stored->r2);
        }
    }
    veer_bundle_close(bundle);
    if (rc == 0)
        rc = switch_to(run, 0);
    return rc;
}

void veer_demo_supervisor_close(veer_demo_run *run)
{
    veer_client_close(run->admin);
    run->admin = NULL;
}

static const char *level_name(double level)
{
    return level >= 2 ? "ALARM" : level >= 1 ? "watch" : "ok";
}

/* One status line for second `sec` (ticks [sec·1000, sec·1000 + 1000)). */
static void status_line(veer_demo_run *run, long sec, uint32_t *scratch)
{
    long t0 = sec * 1000, n = 0, misses = 0;
    for (long k = t0; k < t0 + 1000 && k < run->ticks; k++, n++) {
        scratch[n] = run->latency_us[k];
        misses += (run->flags[k] & VEER_ACT_DEADLINE) != 0;
    }
    qsort(scratch, (size_t)n, sizeof *scratch, cmp_u32);
    /* Nearest-rank percentiles (common practice, no source). */
    uint32_t p50 = n ? scratch[(size_t)ceil(0.50 * n) - 1] : 0;
    uint32_t p99 = n ? scratch[(size_t)ceil(0.99 * n) - 1] : 0;
    /* The task in the last reply of the second that carried one (a local fallback has none). */
    int task = -1;
    for (long k = t0 + n - 1; k >= t0 && task < 0; k--)
        task = run->epoch[k] ? veer_demo_task_at_epoch(run, run->epoch[k]) : -1;

    /* The task's reward at the 20 ms trace points of this second, as the evaluation reads it. */
    double reward = 0.0;
    int nreward = 0;
    for (long k = t0; k < t0 + n; k += VEER_DEMO_TRACE_EVERY) {
        int tk = run->epoch[k] ? veer_demo_task_at_epoch(run, run->epoch[k]) : -1;
        if (tk >= 0) {
            reward += veer_arm_task_reward(
                &veer_arm_tasks[tk], run->trace + (k / VEER_DEMO_TRACE_EVERY) * VEER_ARM_OBS_DIM,
                NULL);
            nreward++;
        }
    }
    veer_demo_drift *d = &run->drift[run->ndrift];
    d->t_s = (double)(sec + 1);
    d->ok = run->opt.http && veer_demo_metrics_drift(run->opt.http, d) == 0;
    run->ndrift++;
    char drift[96];
    if (d->ok)
        snprintf(drift, sizeof drift, "drift %-5s (beyond p99 %4.1f%%, PSI max %.2f)",
                 level_name(d->exceed_level), 100.0 * d->exceed_rate, d->psi_max);
    else
        snprintf(drift, sizeof drift, "drift n/a");
    if (d->ok && sec >= run->heavy_tick / 1000 && sec <= run->light_tick / 1000 + 1 &&
        d->exceed_level >= 2 && !run->drift_fired) {
        run->drift_fired = 1;
        run->drift_fired_s = d->t_s;
    }
    printf("t=%3lds  %-16s reward %5.2f  acts %4ld/s  p50 %4u us  p99 %5u us  misses %3ld  %s\n",
           sec + 1, task >= 0 ? veer_arm_tasks[task].name : "(none)",
           nreward ? reward / nreward : 0.0, n, p50, p99, misses, drift);
    fflush(stdout);
}

int veer_demo_supervisor_loop(veer_demo_run *run)
{
    uint32_t scratch[1000];
    long seconds = run->ticks / 1000, next_sec = 0;
    long switch_every = (long)(run->opt.switch_every_s * 1000.0 + 0.5);
    long next_switch = switch_every;
    int task = 0, heavy_told = 0, light_told = 0;
    const struct timespec poll = {0, 20 * 1000000L};
    while (next_sec < seconds) {
        long done = atomic_load_explicit(&run->ticks_done, memory_order_acquire);
        if (done >= next_switch && next_switch < run->ticks) {
            task = (task + 1) % VEER_ARM_TASK_COUNT;
            if (switch_to(run, task) != 0)
                return -1;
            next_switch += switch_every;
        }
        if (!heavy_told && done >= run->heavy_tick) {
            heavy_told = 1;
            printf("--- the parcel is now %.1f kg (was %.1f kg): the dynamics change; watch the "
                   "drift ---\n",
                   run->opt.heavy_mass_kg, run->opt.light_mass_kg);
        }
        if (!light_told && done >= run->light_tick) {
            light_told = 1;
            printf("--- the heavy parcel is off; the gripper holds %.1f kg again ---\n",
                   run->opt.light_mass_kg);
        }
        if (done >= (next_sec + 1) * 1000) {
            status_line(run, next_sec, scratch);
            next_sec++;
            continue;
        }
        if (atomic_load(&run->stop))
            break;
        nanosleep(&poll, NULL);
    }
    return 0;
}
