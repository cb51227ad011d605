/* The demo's controller: the simulated arm driven at 1 kHz by the FB policy veerd serves.
 *
 * Every millisecond, on an absolute schedule (clock_nanosleep with TIMER_ABSTIME on the
 * monotonic clock, so a late wake-up does not push every later tick back), the loop observes the
 * arm, asks veerd for a torque with a local deadline (veer_client_act: past the deadline it
 * returns the model's fallback torque at once and says so), and advances the physics by one
 * 1 ms step with that torque.
 *
 * The model was trained on 20 ms decisions and the loop asks it every millisecond. That is sound
 * because the policy is state feedback, a = π(s, z): asking it more often than its decision step
 * only lets it correct sooner from fresher states; it never needs to know when the last decision
 * was. (The reverse, asking less often than the decision step, would be a different policy.)
 *
 * Midway a far heavier parcel is on the gripper for a few seconds: the dynamics change, the arm
 * cannot hold it and falls through states the training log never had, which veerd's drift
 * monitor reports; then the parcel is taken off and the arm works as before.
 */
#define _GNU_SOURCE
#include <errno.h>
#include <pthread.h>
#include <sys/prctl.h>
#include <sched.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "base/base.h"
#include "demo_run.h"
#include "veer/client.h"

int veer_demo_run_alloc(veer_demo_run *run)
{
    size_t n = (size_t)run->ticks;
    run->latency_us = veer__calloc(n, sizeof(uint32_t));
    run->lateness_us = veer__calloc(n, sizeof(uint32_t));
    run->flags = veer__calloc(n, sizeof(uint32_t));
    run->epoch = veer__calloc(n, sizeof(uint64_t));
    run->trace = veer__calloc(n / VEER_DEMO_TRACE_EVERY + 1, VEER_ARM_OBS_DIM * sizeof(float));
    run->drift = veer__calloc((size_t)(run->opt.duration_s + 4), sizeof(veer_demo_drift));
    if (!run->latency_us || !run->lateness_us || !run->flags || !run->epoch || !run->trace ||
        !run->drift) {
        veer_demo_run_free(run);
        return VEER_ENOMEM;
    }
    return 0;
}

void veer_demo_run_free(veer_demo_run *run)
{
    veer__free(run->latency_us);
    veer__free(run->lateness_us);
    veer__free(run->flags);
    veer__free(run->epoch);
    veer__free(run->trace);
    veer__free(run->drift);
    run->latency_us = run->lateness_us = run->flags = NULL;
    run->epoch = NULL;
    run->trace = NULL;
    run->drift = NULL;
}

static void add_ns(struct timespec *t, long long ns)
{
    t->tv_nsec += ns;
    while (t->tv_nsec >= 1000000000L) {
        t->tv_nsec -= 1000000000L;
        t->tv_sec++;
    }
}

static long long diff_ns(const struct timespec *a, const struct timespec *b)
{
    return (long long)(a->tv_sec - b->tv_sec) * 1000000000LL + (a->tv_nsec - b->tv_nsec);
}

static void *fail(veer_demo_run *run, int rc, const char *what, const veer_error *err)
{
    run->controller_rc = rc;
    snprintf(run->controller_msg, sizeof run->controller_msg, "%s: %s (%.40s): %.120s", what,
             veer_errname(rc), err ? err->field : "", err ? err->message : "");
    atomic_store(&run->stop, 1);
    return NULL;
}

void *veer_demo_controller(void *arg)
{
    veer_demo_run *run = arg;
    veer_error err = {0};
    /* A real-time policy keeps other work on the machine from delaying the tick; without the
     * privilege the loop runs at normal priority and the status lines show what that costs. */
    struct sched_param sp = {.sched_priority = 20};
    run->realtime = pthread_setschedparam(pthread_self(), SCHED_FIFO, &sp) == 0;
    /* At normal priority the kernel may defer a timer wake-up by the thread's timer slack (50 us
     * by default) to batch wake-ups; a 1 ms loop wants its tick on time. (Real-time threads
     * have no slack, so this matters only without the privilege.) */
    if (!run->realtime)
        prctl(PR_SET_TIMERSLACK, 1UL, 0UL, 0UL, 0UL);
    veer_client_options co;
    veer_client_options_init(&co);
    co.act_endpoint = run->opt.act;
    veer_client *client;
    int rc = veer_client_open(&co, &client, &err);
    if (rc)
        return fail(run, rc, "controller: cannot open the act socket", &err);

    veer_arm arm;
    const double start[4] = {-1.5707963267948966, 0.0, 0.0, 0.0}; /* hanging at rest */
    if ((rc = veer_arm_init(&arm, &run->params, start, start + 2, &err)) != 0) {
        veer_client_close(client);
        return fail(run, rc, "controller: arm", &err);
    }

    float obs[VEER_ARM_OBS_DIM], action[VEER_ARM_ACT_DIM];
    veer_client_act_result res;
    struct timespec next, now;
    clock_gettime(CLOCK_MONOTONIC, &next);
    long tick;
    for (tick = 0; tick < run->ticks && !atomic_load_explicit(&run->stop, memory_order_relaxed);
         tick++) {
        add_ns(&next, VEER_DEMO_TICK_NS);
        while (clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &next, NULL) == EINTR) {
        }
        clock_gettime(CLOCK_MONOTONIC, &now);
        long long late = diff_ns(&now, &next);
        run->lateness_us[tick] = late > 0 ? (uint32_t)(late / 1000) : 0;
        if (late > 5 * VEER_DEMO_TICK_NS) {
            /* Descheduled for several ticks (a busy machine): start the schedule again from
             * now rather than firing the missed ticks back to back. */
            next = now;
            run->overruns++;
        }
        if (tick == run->heavy_tick)
            veer_arm_set_parcel(&arm, run->opt.heavy_mass_kg, NULL);
        if (tick == run->light_tick)
            veer_arm_set_parcel(&arm, run->opt.light_mass_kg, NULL);

        veer_arm_observe(&arm, obs);
        res.round_trip_ns = 0; /* not every refusal gets as far as timing the call */
        rc = veer_client_act(client, run->opt.channel, obs, run->opt.deadline_us, action, &res,
                             &err);
        if (rc == 0) {
            run->latency_us[tick] = (uint32_t)(res.round_trip_ns / 1000);
            run->flags[tick] = res.flags;
            run->epoch[tick] = res.epoch;
        } else {
            /* A refusal (no task on the channel yet, veerd restarting): the client has written
             * the fallback torque; count it as a fallback and carry on. */
            run->latency_us[tick] = (uint32_t)(res.round_trip_ns / 1000);
            run->flags[tick] = VEER_ACT_FALLBACK;
            run->epoch[tick] = 0;
        }
        double tau[2] = {action[0], action[1]};
        if (veer_arm_step(&arm, tau, VEER_ARM_PHYSICS_DT) != 0) {
            veer_client_close(client);
            return fail(run, VEER_ENONFINITE, "controller: a non-finite torque", NULL);
        }
        if (tick % VEER_DEMO_TRACE_EVERY == 0)
            memcpy(run->trace + (tick / VEER_DEMO_TRACE_EVERY) * VEER_ARM_OBS_DIM, obs, sizeof obs);
        atomic_store_explicit(&run->ticks_done, tick + 1, memory_order_release);
    }
    veer_client_close(client);
    return NULL;
}
