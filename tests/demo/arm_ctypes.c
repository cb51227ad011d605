/* A flat C entry point over the demo arm for the Python reference tests (loaded with ctypes).
 * Parameters travel as one double vector in the order of PARAM_FIELDS below so the test sets
 * its own values instead of trusting the library's defaults. */
#include <math.h>
#include <string.h>

#include "arm.h"
#include "cem.h"
#include "eval.h"
#include "tasks.h"

#define ARM_CTYPES_NPARAM 21

static void unpack(const double *v, veer_arm_params *p)
{
    /* m1 m2 l1 l2 lc1 lc2 I1 I2 parcel b1 b2 g qmin1 qmin2 qmax1 qmax2 k d depth tmax1 tmax2 */
    *p = (veer_arm_params){
        .link_mass = {v[0], v[1]},
        .link_length = {v[2], v[3]},
        .com_distance = {v[4], v[5]},
        .link_inertia = {v[6], v[7]},
        .parcel_mass = v[8],
        .friction = {v[9], v[10]},
        .gravity = v[11],
        .angle_min = {v[12], v[13]},
        .angle_max = {v[14], v[15]},
        .stop_stiffness = v[16],
        .stop_damping = v[17],
        .stop_depth = v[18],
        .torque_max = {v[19], v[20]},
    };
}

int arm_ctypes_nparam(void)
{
    return ARM_CTYPES_NPARAM;
}

void arm_ctypes_default_params(double *v)
{
    veer_arm_params p;
    veer_arm_params_default(&p);
    double out[ARM_CTYPES_NPARAM] = {p.link_mass[0],    p.link_mass[1],    p.link_length[0],
                                     p.link_length[1],  p.com_distance[0], p.com_distance[1],
                                     p.link_inertia[0], p.link_inertia[1], p.parcel_mass,
                                     p.friction[0],     p.friction[1],     p.gravity,
                                     p.angle_min[0],    p.angle_min[1],    p.angle_max[0],
                                     p.angle_max[1],    p.stop_stiffness,  p.stop_damping,
                                     p.stop_depth,      p.torque_max[0],   p.torque_max[1]};
    memcpy(v, out, sizeof out);
}

/* Runs `steps` steps of `dt` from state (q1, q2, q̇1, q̇2) with a held torque. Writes the final
 * state and, when `energy` is not NULL, the energy before the first step and after each step
 * (steps + 1 values). Returns the first error code, 0 on success. */
int arm_ctypes_simulate(const double *params, const double *state0, const double *torque, int steps,
                        double dt, double *state_out, double *energy)
{
    veer_arm_params p;
    veer_arm arm;
    unpack(params, &p);
    int rc = veer_arm_init(&arm, &p, state0, state0 + 2, NULL);
    if (rc)
        return rc;
    if (energy)
        energy[0] = veer_arm_energy(&arm);
    for (int s = 0; s < steps; s++) {
        rc = veer_arm_step(&arm, torque, dt);
        if (rc)
            return rc;
        if (energy)
            energy[s + 1] = veer_arm_energy(&arm);
    }
    state_out[0] = arm.q[0];
    state_out[1] = arm.q[1];
    state_out[2] = arm.qd[0];
    state_out[3] = arm.qd[1];
    return 0;
}

int arm_ctypes_mass_matrix(const double *params, const double *q, double *m)
{
    veer_arm_params p;
    veer_arm arm;
    double zero[2] = {0.0, 0.0};
    unpack(params, &p);
    int rc = veer_arm_init(&arm, &p, q, zero, NULL);
    if (rc)
        return rc;
    veer_arm_mass_matrix(&arm, q, m);
    return 0;
}

int arm_ctypes_observe(const double *params, const double *state, float *obs)
{
    veer_arm_params p;
    veer_arm arm;
    unpack(params, &p);
    int rc = veer_arm_init(&arm, &p, state, state + 2, NULL);
    if (rc)
        return rc;
    veer_arm_observe(&arm, obs);
    return 0;
}

/* Checks the parameters; writes the field named in the error (up to 96 bytes). */
int arm_ctypes_check(const double *params, char *field)
{
    veer_arm_params p;
    veer_error err;
    unpack(params, &p);
    veer_error_clear(&err);
    int rc = veer_arm_params_check(&p, &err);
    strcpy(field, err.field);
    return rc;
}

int arm_ctypes_task_count(void)
{
    return VEER_ARM_TASK_COUNT;
}

const char *arm_ctypes_task_name(int i)
{
    return veer_arm_tasks[i].name;
}

/* Rewards of n observations for the named task; returns the code (field name to `field`). */
int arm_ctypes_task_rewards(const char *name, const float *states, int n, float *rewards,
                            char *field)
{
    veer_error err;
    veer_error_clear(&err);
    int rc = veer_arm_task_rewards(veer_arm_task_find(name), states, (size_t)n, rewards, &err);
    strcpy(field, err.field);
    return rc;
}

int arm_ctypes_task_goal(const char *name, const double *params, float *obs, char *field)
{
    veer_arm_params p;
    veer_error err;
    unpack(params, &p);
    veer_error_clear(&err);
    int rc = veer_arm_task_goal(veer_arm_task_find(name), &p, obs, &err);
    strcpy(field, err.field);
    return rc;
}

static int zero_policy(void *ctx, const float *obs, float *torque)
{
    (void)ctx;
    (void)obs;
    torque[0] = torque[1] = 0.0f;
    return 0;
}

static int nan_policy(void *ctx, const float *obs, float *torque)
{
    (void)ctx;
    (void)obs;
    torque[0] = 0.0f;
    torque[1] = (float)NAN;
    return 0;
}

/* One evaluation episode of the named task on the default arm from `start` with policy kind
 * 0 zero torque, 1 random torques, 2 the CEM planner (default configuration), 3 a policy that
 * returns NaN. Writes the return, and the observation after each decision to `trace` when not
 * NULL. Returns the code; the error's field goes to `field`. */
int arm_ctypes_episode(const char *task_name, const double *start, int decisions, int query_ms,
                       int kind, unsigned long long key, double *ret, float *trace, char *field)
{
    veer_arm_params p;
    veer_arm_params_default(&p);
    veer_error err;
    veer_error_clear(&err);
    const veer_arm_task *task = veer_arm_task_find(task_name);
    veer_arm_episode ep = {decisions, 20, query_ms};
    veer_arm_random_policy rnd;
    veer_arm_cem *cem = NULL;
    veer_arm_policy pol = {"zero", zero_policy, NULL, NULL};
    int rc = 0;
    if (kind == 1) {
        veer_arm_random_policy_init(&rnd, &p, key);
        pol = (veer_arm_policy){"random", veer_arm_random_policy_act, NULL, &rnd};
    } else if (kind == 2) {
        veer_arm_cem_config c;
        veer_arm_cem_config_for_task(task, &c);
        c.rng_key = key;
        rc = veer_arm_cem_create(&c, &p, task, &cem, &err);
        pol = (veer_arm_policy){"cem", veer_arm_cem_act, veer_arm_cem_reset_cb, cem};
    } else if (kind == 3) {
        pol = (veer_arm_policy){"nan", nan_policy, NULL, NULL};
    }
    if (rc == 0)
        rc = veer_arm_run_episode(&p, task, start, &ep, &pol, ret, trace, &err);
    veer_arm_cem_destroy(cem);
    strcpy(field, err.field);
    return rc;
}

/* The CEM configuration check: sets one field (by name) to `value` in the default
 * configuration and returns the create code; the error's field goes to `field`. */
int arm_ctypes_cem_config(const char *name, double value, char *field)
{
    veer_arm_params p;
    veer_arm_params_default(&p);
    veer_arm_cem_config c;
    veer_arm_cem_config_default(&c);
    if (strcmp(name, "horizon") == 0)
        c.horizon = (int)value;
    else if (strcmp(name, "population") == 0)
        c.population = (int)value;
    else if (strcmp(name, "elites") == 0)
        c.elites = (int)value;
    else if (strcmp(name, "iterations") == 0)
        c.iterations = (int)value;
    else if (strcmp(name, "knot_every") == 0)
        c.knot_every = (int)value;
    else if (strcmp(name, "plan_dt") == 0)
        c.plan_dt = value;
    else if (strcmp(name, "initial_sd") == 0)
        c.initial_sd = value;
    else if (strcmp(name, "smoothing") == 0)
        c.smoothing = value;
    veer_error err;
    veer_error_clear(&err);
    veer_arm_cem *cem = NULL;
    int rc = veer_arm_cem_create(&c, &p, &veer_arm_tasks[0], &cem, &err);
    veer_arm_cem_destroy(cem);
    strcpy(field, err.field);
    return rc;
}

double arm_ctypes_normalised_score(double j, double j_random, double j_cem)
{
    return veer_arm_normalised_score(j, j_random, j_cem);
}
