/* The demo run: what the controller, the supervisor and the report share.
 *
 * The controller thread (demo_controller.c) drives the simulated arm at 1 kHz through veerd and
 * writes one record per tick into arrays sized before it starts; it publishes how many ticks are
 * complete with a release store, and the supervisor thread (demo_supervisor.c) reads only ticks
 * below that count (acquire load). So the two threads share memory without a lock and the
 * control loop never waits for the printing side. The supervisor writes its own records (task
 * switches, one drift reading a second); the report (demo_report.c) reads everything after both
 * threads have stopped.
 */
#ifndef VEER_DEMO_RUN_H
#define VEER_DEMO_RUN_H

#include <stdatomic.h>
#include <stdint.h>

#include "arm.h"
#include "tasks.h"

#define VEER_DEMO_TICK_NS 1000000LL /* 1 kHz */
#define VEER_DEMO_MAX_SWITCHES 1024
#define VEER_DEMO_TRACE_EVERY 20 /* ticks between trajectory points (the 20 ms decision step) */

typedef struct veer_demo_options {
    const char *bundle, *act, *admin, *http, *svg, *channel;
    double duration_s, switch_every_s, heavy_at_s, heavy_until_s, heavy_mass_kg, light_mass_kg;
    uint32_t deadline_us;
    int reach_goal; /* 1: reach tasks registered from their goal state, 0: from reward samples */
    int quiet;
} veer_demo_options;

typedef struct veer_demo_switch {
    long tick; /* the first tick after the switch was acknowledged */
    uint64_t epoch;
    int task; /* index into veer_arm_tasks */
} veer_demo_switch;

typedef struct veer_demo_drift {
    double t_s;
    int ok; /* 0 when /metrics could not be read */
    double level, psi_max, psi_level, exceed_rate, exceed_level;
} veer_demo_drift;

typedef struct veer_demo_run {
    veer_demo_options opt;
    veer_arm_params params;
    long ticks; /* planned ticks: duration × 1000 */
    long heavy_tick, light_tick; /* the heavy parcel is on the gripper for [heavy, light) */

    /* Written by the controller, one per tick. */
    uint32_t *latency_us;  /* round trip of the act call, µs */
    uint32_t *lateness_us; /* how late the thread woke after the tick's absolute time, µs */
    uint32_t *flags;       /* VEER_ACT_* */
    uint64_t *epoch;       /* the channel epoch of the reply (0 for a local fallback) */
    float *trace;          /* every VEER_DEMO_TRACE_EVERY ticks: the observation (8 floats) */
    _Atomic long ticks_done;
    _Atomic int stop; /* set by a signal or the supervisor: end the loop early */
    long overruns;    /* ticks that started more than 5 ms late (the schedule is reset) */
    int realtime;     /* the controller thread got SCHED_FIFO */
    int controller_rc;
    char controller_msg[320];

    /* Written by the supervisor. */
    struct veer_client *admin; /* the supervisor's own client (admin socket) */
    veer_demo_switch switches[VEER_DEMO_MAX_SWITCHES];
    int nswitches;
    veer_demo_drift *drift; /* one per second */
    int ndrift;
    int drift_fired; /* the drift level reached WATCH or ALARM after the parcel changed */
    double drift_fired_s;
} veer_demo_run;

/* Allocates the per-tick arrays for run->ticks ticks. Returns 0 or VEER_ENOMEM. */
int veer_demo_run_alloc(veer_demo_run *run);
void veer_demo_run_free(veer_demo_run *run);

/* The controller thread's body (a pthread start routine); `arg` is the run. */
void *veer_demo_controller(void *arg);

/* Registers the suite, switches the channel to the first task, and returns; or an error. */
int veer_demo_supervisor_setup(veer_demo_run *run);
/* Runs until the controller is done: status lines, switches, drift readings. */
int veer_demo_supervisor_loop(veer_demo_run *run);
void veer_demo_supervisor_close(veer_demo_run *run);

/* Reads veerd's drift gauges from HOST:PORT/metrics. Returns 0 and fills `d` (t_s untouched),
 * or -1 when the endpoint cannot be read or lacks the gauges. */
int veer_demo_metrics_drift(const char *hostport, veer_demo_drift *d);

/* Writes the SVG report. Returns 0 or -1 (message on stderr). */
int veer_demo_report_svg(const veer_demo_run *run, const char *path);

/* The task active at `epoch` (from the supervisor's switch records), or -1. */
int veer_demo_task_at_epoch(const veer_demo_run *run, uint64_t epoch);

#endif
