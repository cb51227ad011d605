/* Cross-entropy-method MPC for the demo arm (method, sources and choices in cem.h). A plan is
 * stored as its knots, knots × 2 residual torques row-major, in buffers sized at create; the
 * torque at decision h is the linear interpolation between the knots around h. */
#include "cem.h"

#include <math.h>
#include <string.h>

#include "base/base.h"
#include "train/rng.h"

struct veer_arm_cem {
    veer_arm_cem_config c;
    veer_arm_params model;
    const veer_arm_task *task;
    veer__rng rng;
    int steps_per_decision;
    int knots;       /* ceil(horizon / knot_every) + 1 */
    int len;         /* knots × 2 */
    double *mean;    /* len */
    double *sd;      /* len */
    double *samples; /* population × len */
    double *returns; /* population */
    int *order;      /* population, indices sorted by return */
    double *best;    /* len, best sequence of the current plan */
    uint64_t plans, total_ns, cpu_ns;
};

/* CPU time of the calling thread: on a shared machine the wall time per plan depends on the
 * neighbours, the CPU time does not. */
static uint64_t thread_cpu_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
}

void veer_arm_cem_config_default(veer_arm_cem_config *c)
{
    *c = (veer_arm_cem_config){
        .horizon = 30,
        .population = 200,
        .elites = 20,
        .iterations = 4,
        .knot_every = 5,
        .decision_ms = 20,
        .plan_dt = 0.005,
        .initial_sd = 0.5,
        .smoothing = 0.1,
        .rng_key = 1,
    };
}

void veer_arm_cem_config_for_task(const veer_arm_task *task, veer_arm_cem_config *c)
{
    veer_arm_cem_config_default(c);
    if (task != NULL && task->kind == VEER_ARM_TASK_SLOW_REACH)
        c->horizon = 40;
}

static int check_config(const veer_arm_cem_config *c, veer_error *err)
{
    if (c->horizon < 1 || c->horizon > 1000)
        return veer__error_set(err, VEER_EINVAL, "horizon", "horizon must be 1 to 1000, got %d",
                               c->horizon);
    if (c->population < 2 || c->population > 100000)
        return veer__error_set(err, VEER_EINVAL, "population",
                               "population must be 2 to 100000, got %d", c->population);
    if (c->elites < 1 || c->elites > c->population)
        return veer__error_set(err, VEER_EINVAL, "elites",
                               "elites must be 1 to the population (%d), got %d", c->population,
                               c->elites);
    if (c->iterations < 1 || c->iterations > 100)
        return veer__error_set(err, VEER_EINVAL, "iterations",
                               "iterations must be 1 to 100, got %d", c->iterations);
    if (c->knot_every < 1 || c->knot_every > c->horizon)
        return veer__error_set(err, VEER_EINVAL, "knot_every",
                               "knot_every must be 1 to the horizon (%d), got %d", c->horizon,
                               c->knot_every);
    if (c->decision_ms < 1 || c->decision_ms > 1000)
        return veer__error_set(err, VEER_EINVAL, "decision_ms",
                               "decision_ms must be 1 to 1000, got %d", c->decision_ms);
    double steps = (double)c->decision_ms * 1e-3 / c->plan_dt;
    if (!isfinite(steps) || c->plan_dt <= 0.0 || fabs(steps - round(steps)) > 1e-9 || steps < 1)
        return veer__error_set(err, VEER_EINVAL, "plan_dt",
                               "plan_dt (%g s) must divide the decision step (%d ms)", c->plan_dt,
                               c->decision_ms);
    if (c->plan_dt > VEER_ARM_CEM_MAX_PLAN_DT)
        return veer__error_set(err, VEER_EINVAL, "plan_dt",
                               "plan_dt (%g s) is over %g s: RK4 rollouts go unstable when a joint "
                               "stop is pressed",
                               c->plan_dt, VEER_ARM_CEM_MAX_PLAN_DT);
    if (!isfinite(c->initial_sd) || c->initial_sd <= 0.0)
        return veer__error_set(err, VEER_EINVAL, "initial_sd", "initial_sd must be positive");
    if (!isfinite(c->smoothing) || c->smoothing < 0.0 || c->smoothing >= 1.0)
        return veer__error_set(err, VEER_EINVAL, "smoothing", "smoothing must be in [0, 1)");
    return 0;
}

int veer_arm_cem_create(const veer_arm_cem_config *c, const veer_arm_params *model,
                        const veer_arm_task *task, veer_arm_cem **out, veer_error *err)
{
    int rc;
    if (task == NULL)
        return veer__error_set(err, VEER_EINVAL, "task", "task must not be NULL");
    if ((rc = check_config(c, err)) || (rc = veer_arm_params_check(model, err)))
        return rc;
    veer_arm_cem *cem = veer__calloc(1, sizeof *cem);
    if (cem == NULL)
        return veer__error_set(err, VEER_ENOMEM, "planner", NULL);
    cem->c = *c;
    cem->model = *model;
    cem->task = task;
    cem->knots = (c->horizon + c->knot_every - 1) / c->knot_every + 1;
    cem->len = 2 * cem->knots;
    cem->steps_per_decision = (int)round((double)c->decision_ms * 1e-3 / c->plan_dt);
    size_t len = (size_t)cem->len, pop = (size_t)c->population;
    cem->mean = veer__malloc(len * sizeof(double));
    cem->sd = veer__malloc(len * sizeof(double));
    cem->best = veer__malloc(len * sizeof(double));
    cem->samples = veer__malloc(pop * len * sizeof(double));
    cem->returns = veer__malloc(pop * sizeof(double));
    cem->order = veer__malloc(pop * sizeof(int));
    if (!cem->mean || !cem->sd || !cem->best || !cem->samples || !cem->returns || !cem->order) {
        veer_arm_cem_destroy(cem);
        return veer__error_set(err, VEER_ENOMEM, "planner", NULL);
    }
    veer__rng_init(&cem->rng, c->rng_key);
    veer_arm_cem_reset(cem);
    *out = cem;
    return 0;
}

void veer_arm_cem_destroy(veer_arm_cem *cem)
{
    if (cem == NULL)
        return;
    veer__free(cem->mean);
    veer__free(cem->sd);
    veer__free(cem->best);
    veer__free(cem->samples);
    veer__free(cem->returns);
    veer__free(cem->order);
    veer__free(cem);
}

void veer_arm_cem_reset(veer_arm_cem *cem)
{
    for (int i = 0; i < cem->len; i++)
        cem->mean[i] = 0.0;
}

/* The residual torque of joint j at decision h (which may lie past the horizon: the last knot
 * then holds). */
static double residual_at(const veer_arm_cem *cem, const double *knots, int h, int j)
{
    int ke = cem->c.knot_every;
    int k = h / ke;
    if (k >= cem->knots - 1)
        return knots[2 * (cem->knots - 1) + j];
    double f = (double)(h % ke) / ke;
    return (1.0 - f) * knots[2 * k + j] + f * knots[2 * (k + 1) + j];
}

/* Return of one plan from (q, q̇): the reward of the state after each decision. The torque is
 * gravity feed-forward at the decision's start plus the plan's residual, held over the
 * decision, as a controller with this model would apply it. */
static double rollout(const veer_arm_cem *cem, const veer_arm *start, const double *seq)
{
    veer_arm arm = *start;
    float obs[VEER_ARM_OBS_DIM];
    double total = 0.0;
    for (int h = 0; h < cem->c.horizon; h++) {
        double tau[2];
        veer_arm_gravity_torque(&arm, arm.q, tau);
        tau[0] += residual_at(cem, seq, h, 0);
        tau[1] += residual_at(cem, seq, h, 1);
        for (int s = 0; s < cem->steps_per_decision; s++)
            veer_arm_step(&arm, tau, cem->c.plan_dt);
        veer_arm_observe(&arm, obs);
        total += veer_arm_task_reward(cem->task, obs, NULL);
    }
    return total;
}

/* Insertion sort of indices by return, best first: the population is a few hundred, and this
 * needs no allocation and no comparison callback with hidden state. */
static void sort_by_return(const double *returns, int *order, int n)
{
    for (int i = 0; i < n; i++)
        order[i] = i;
    for (int i = 1; i < n; i++) {
        int v = order[i], j = i - 1;
        while (j >= 0 && returns[order[j]] < returns[v]) {
            order[j + 1] = order[j];
            j--;
        }
        order[j + 1] = v;
    }
}

int veer_arm_cem_plan(veer_arm_cem *cem, const double q[2], const double qd[2], double torque[2])
{
    uint64_t t0 = veer__now_ns(), c0 = thread_cpu_ns();
    const veer_arm_cem_config *c = &cem->c;
    const double *tmax = cem->model.torque_max;
    veer_arm start;
    int rc = veer_arm_init(&start, &cem->model, q, qd, NULL);
    if (rc)
        return rc;
    for (int i = 0; i < cem->len; i++)
        cem->sd[i] = c->initial_sd * tmax[i % 2];
    double best_return = -INFINITY;
    for (int it = 0; it < c->iterations; it++) {
        for (int k = 0; k < c->population; k++) {
            double *seq = cem->samples + (size_t)k * cem->len;
            for (int i = 0; i < cem->len; i++) {
                /* Sample 0 is the mean itself, so the plan never loses the warm start. */
                double v = cem->mean[i] + (k ? cem->sd[i] * veer__rng_normal(&cem->rng) : 0.0);
                seq[i] = fmin(fmax(v, -2.0 * tmax[i % 2]), 2.0 * tmax[i % 2]);
            }
            cem->returns[k] = rollout(cem, &start, seq);
            if (cem->returns[k] > best_return) {
                best_return = cem->returns[k];
                memcpy(cem->best, seq, (size_t)cem->len * sizeof(double));
            }
        }
        sort_by_return(cem->returns, cem->order, c->population);
        for (int i = 0; i < cem->len; i++) {
            double m = 0.0, v = 0.0;
            for (int e = 0; e < c->elites; e++)
                m += cem->samples[(size_t)cem->order[e] * cem->len + i];
            m /= c->elites;
            for (int e = 0; e < c->elites; e++) {
                double d = cem->samples[(size_t)cem->order[e] * cem->len + i] - m;
                v += d * d;
            }
            v /= c->elites;
            double var = cem->sd[i] * cem->sd[i];
            cem->mean[i] = c->smoothing * cem->mean[i] + (1.0 - c->smoothing) * m;
            cem->sd[i] = sqrt(c->smoothing * var + (1.0 - c->smoothing) * v);
        }
    }
    double g[2];
    veer_arm_gravity_torque(&start, start.q, g);
    torque[0] = fmin(fmax(g[0] + cem->best[0], -tmax[0]), tmax[0]);
    torque[1] = fmin(fmax(g[1] + cem->best[1], -tmax[1]), tmax[1]);
    /* Warm start for the next decision: the best plan shifted by one decision (each knot takes
     * the best plan's value one decision later; the last knot holds). */
    for (int k = 0; k < cem->knots; k++)
        for (int j = 0; j < 2; j++)
            cem->mean[2 * k + j] = residual_at(cem, cem->best, k * c->knot_every + 1, j);
    cem->plans++;
    cem->total_ns += veer__now_ns() - t0;
    cem->cpu_ns += thread_cpu_ns() - c0;
    return 0;
}

int veer_arm_cem_act(void *ctx, const float obs[VEER_ARM_OBS_DIM], float torque[VEER_ARM_ACT_DIM])
{
    veer_arm_cem *cem = ctx;
    double q[2], qd[2], tau[2];
    veer_arm_state_from_obs(&cem->model, obs, q, qd);
    int rc = veer_arm_cem_plan(cem, q, qd, tau);
    if (rc)
        return rc;
    torque[0] = (float)tau[0];
    torque[1] = (float)tau[1];
    return 0;
}

void veer_arm_cem_reset_cb(void *ctx)
{
    veer_arm_cem_reset(ctx);
}

void veer_arm_cem_timing(const veer_arm_cem *cem, uint64_t *plans, uint64_t *wall_ns,
                         uint64_t *cpu_ns)
{
    *plans = cem->plans;
    *wall_ns = cem->total_ns;
    *cpu_ns = cem->cpu_ns;
}
