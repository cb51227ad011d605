/* The evaluation loop shared by every controller of the demo arm (contract in eval.h). The
 * loop owns the physics and the reward bookkeeping so a policy sees only observations, exactly
 * as a controller talking to veerd does. */
#include "eval.h"

#include <math.h>

#include "base/base.h"

/* Starts: hanging at rest inside the chute; raised right with the elbow bent up; raised left
 * with the elbow bent down; and two swinging states. Chosen to cover the bench, no source. */
const double veer_arm_eval_starts[VEER_ARM_EVAL_START_COUNT][4] = {
    {-1.5707963267948966, 0.0, 0.0, 0.0}, {0.30, 1.20, 0.0, 0.0},     {-3.60, -0.80, 0.0, 0.0},
    {-1.00, -1.50, 1.50, -2.00},          {-2.40, 0.60, -2.00, 1.00},
};

void veer_arm_episode_default(veer_arm_episode *e)
{
    *e = (veer_arm_episode){.decisions = 250, .decision_ms = 20, .query_ms = 20};
}

static int check_episode(const veer_arm_episode *e, veer_error *err)
{
    if (e->decisions < 1)
        return veer__error_set(err, VEER_EINVAL, "decisions", "decisions must be at least 1");
    if (e->decision_ms < 1 || e->decision_ms > 1000)
        return veer__error_set(err, VEER_EINVAL, "decision_ms",
                               "decision_ms must be from 1 to 1000, got %d", e->decision_ms);
    if (e->query_ms < 1 || e->query_ms > e->decision_ms)
        return veer__error_set(err, VEER_EINVAL, "query_ms",
                               "query_ms must be from 1 to decision_ms (%d), got %d",
                               e->decision_ms, e->query_ms);
    return 0;
}

int veer_arm_run_episode(const veer_arm_params *p, const veer_arm_task *task, const double start[4],
                         const veer_arm_episode *e, const veer_arm_policy *policy, double *ret,
                         float *trace, veer_error *err)
{
    if (task == NULL || policy == NULL || policy->act == NULL)
        return veer__error_set(err, VEER_EINVAL, task == NULL ? "task" : "policy",
                               "task and policy must be given");
    int rc = check_episode(e, err);
    if (rc)
        return rc;
    veer_arm arm;
    if ((rc = veer_arm_init(&arm, p, start, start + 2, err)) != 0)
        return rc;
    if (policy->reset)
        policy->reset(policy->ctx);

    float obs[VEER_ARM_OBS_DIM], act[VEER_ARM_ACT_DIM] = {0.0f, 0.0f};
    double total = 0.0;
    long physics_steps = (long)e->decisions * e->decision_ms;
    for (long s = 0; s < physics_steps; s++) {
        if (s % e->query_ms == 0) {
            veer_arm_observe(&arm, obs);
            if ((rc = policy->act(policy->ctx, obs, act)) != 0)
                return veer__error_set(err, rc, "policy", "policy '%s' stopped the episode: %s",
                                       policy->name ? policy->name : "?", veer_strerror(rc));
        }
        double tau[2] = {act[0], act[1]};
        if ((rc = veer_arm_step(&arm, tau, VEER_ARM_PHYSICS_DT)) != 0)
            return veer__error_set(err, rc, "torque", "policy '%s' returned a non-finite torque",
                                   policy->name ? policy->name : "?");
        if ((s + 1) % e->decision_ms == 0) {
            veer_arm_observe(&arm, obs);
            total += veer_arm_task_reward(task, obs, act);
            if (trace)
                for (int j = 0; j < VEER_ARM_OBS_DIM; j++)
                    trace[(s / e->decision_ms) * VEER_ARM_OBS_DIM + j] = obs[j];
        }
    }
    *ret = total;
    return 0;
}

int veer_arm_eval_policy(const veer_arm_params *p, const veer_arm_task *task,
                         const double (*starts)[4], int n_starts, int repeats,
                         const veer_arm_episode *e, const veer_arm_policy *policy,
                         double *mean_return, double *per_start, veer_error *err)
{
    if (n_starts < 1 || starts == NULL)
        return veer__error_set(err, VEER_EINVAL, "starts", "at least one start state is needed");
    if (repeats < 1)
        return veer__error_set(err, VEER_EINVAL, "repeats", "repeats must be at least 1");
    double sum = 0.0;
    for (int i = 0; i < n_starts; i++) {
        double start_sum = 0.0;
        for (int r = 0; r < repeats; r++) {
            double j;
            int rc = veer_arm_run_episode(p, task, starts[i], e, policy, &j, NULL, err);
            if (rc)
                return rc;
            start_sum += j;
        }
        if (per_start)
            per_start[i] = start_sum / repeats;
        sum += start_sum / repeats;
    }
    *mean_return = sum / n_starts;
    return 0;
}

double veer_arm_normalised_score(double j, double j_random, double j_cem)
{
    double span = j_cem - j_random;
    if (!(fabs(span) > 1e-9))
        return NAN;
    return (j - j_random) / span;
}

void veer_arm_random_policy_init(veer_arm_random_policy *r, const veer_arm_params *p, uint64_t key)
{
    veer__rng_init(&r->rng, key);
    r->torque_max[0] = p->torque_max[0];
    r->torque_max[1] = p->torque_max[1];
}

int veer_arm_random_policy_act(void *ctx, const float obs[VEER_ARM_OBS_DIM],
                               float torque[VEER_ARM_ACT_DIM])
{
    (void)obs;
    veer_arm_random_policy *r = ctx;
    for (int i = 0; i < 2; i++)
        torque[i] = (float)((2.0 * veer__rng_uniform(&r->rng) - 1.0) * r->torque_max[i]);
    return 0;
}
