/* The task suite's rewards and goal observations (formulas and scales in tasks.h). Rewards are
 * computed in double from the float observation so the log, the planner and the evaluation
 * score a state identically. */
#include "tasks.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "bench.h"

const veer_arm_task veer_arm_tasks[VEER_ARM_TASK_COUNT] = {
    {"reach_left", VEER_ARM_TASK_REACH, 0},
    {"reach_near", VEER_ARM_TASK_REACH, 1},
    {"reach_far", VEER_ARM_TASK_REACH, 2},
    {"keep_high", VEER_ARM_TASK_KEEP_HIGH, -1},
    {"keep_still", VEER_ARM_TASK_KEEP_STILL, -1},
    {"avoid_chute", VEER_ARM_TASK_AVOID_ZONE, -1},
    {"slow_reach_near", VEER_ARM_TASK_SLOW_REACH, 1},
};

const veer_arm_task *veer_arm_task_find(const char *name)
{
    if (name == NULL)
        return NULL;
    for (int i = 0; i < VEER_ARM_TASK_COUNT; i++)
        if (strcmp(veer_arm_tasks[i].name, name) == 0)
            return &veer_arm_tasks[i];
    return NULL;
}

static double reach_term(int bin, const float *obs, double scale)
{
    double dx = obs[VEER_ARM_GRIP_X] - veer_bench_bins[bin].x;
    double dy = obs[VEER_ARM_GRIP_Y] - veer_bench_bins[bin].y;
    return exp(-sqrt(dx * dx + dy * dy) / scale);
}

static double speed2(const float *obs)
{
    double a = obs[VEER_ARM_QD1], b = obs[VEER_ARM_QD2];
    return a * a + b * b;
}

double veer_arm_task_reward(const veer_arm_task *task, const float obs[VEER_ARM_OBS_DIM],
                            const float *torque)
{
    (void)torque;
    switch (task->kind) {
    case VEER_ARM_TASK_REACH:
        return reach_term(task->bin, obs, VEER_ARM_REACH_SCALE);
    case VEER_ARM_TASK_KEEP_HIGH: {
        double h = (obs[VEER_ARM_GRIP_Y] + VEER_ARM_HEIGHT_SPAN) / (2.0 * VEER_ARM_HEIGHT_SPAN);
        return h < 0.0 ? 0.0 : (h > 1.0 ? 1.0 : h);
    }
    case VEER_ARM_TASK_KEEP_STILL:
        return exp(-speed2(obs) / (VEER_ARM_STILL_SCALE * VEER_ARM_STILL_SCALE));
    case VEER_ARM_TASK_AVOID_ZONE: {
        double d = veer_bench_zone_distance(&veer_bench_keepout, obs[VEER_ARM_GRIP_X],
                                            obs[VEER_ARM_GRIP_Y]);
        return d >= VEER_ARM_ZONE_MARGIN ? 1.0 : d / VEER_ARM_ZONE_MARGIN;
    }
    case VEER_ARM_TASK_SLOW_REACH:
        return reach_term(task->bin, obs, VEER_ARM_SLOW_REACH_SCALE) -
               VEER_ARM_SLOW_PRICE * fmin(speed2(obs), VEER_ARM_SLOW_CAP);
    }
    return 0.0;
}

int veer_arm_task_rewards(const veer_arm_task *task, const float *states, size_t n, float *rewards,
                          veer_error *err)
{
    if (task == NULL)
        return veer__error_set(err, VEER_EINVAL, "task", "task must not be NULL");
    if (n > 0 && states == NULL)
        return veer__error_set(err, VEER_EINVAL, "states", "states must not be NULL");
    if (n > 0 && rewards == NULL)
        return veer__error_set(err, VEER_EINVAL, "rewards", "rewards must not be NULL");
    /* Check everything first so a bad row leaves `rewards` untouched. */
    for (size_t i = 0; i < n; i++)
        for (int j = 0; j < VEER_ARM_OBS_DIM; j++)
            if (!isfinite(states[i * VEER_ARM_OBS_DIM + j])) {
                char field[48];
                snprintf(field, sizeof field, "states[%zu][%d]", i, j);
                return veer__error_set(err, VEER_ENONFINITE, field, "%s (%s) is not finite", field,
                                       veer_arm_feature_names[j]);
            }
    for (size_t i = 0; i < n; i++)
        rewards[i] = (float)veer_arm_task_reward(task, states + i * VEER_ARM_OBS_DIM, NULL);
    return 0;
}

int veer_arm_task_has_goal(const veer_arm_task *task)
{
    return task->kind == VEER_ARM_TASK_REACH || task->kind == VEER_ARM_TASK_SLOW_REACH;
}

int veer_arm_task_goal(const veer_arm_task *task, const veer_arm_params *p,
                       float obs[VEER_ARM_OBS_DIM], veer_error *err)
{
    if (task == NULL || !veer_arm_task_has_goal(task))
        return veer__error_set(err, VEER_EINVAL, "task", "task '%s' has no goal state",
                               task ? task->name : "(null)");
    double q[2], zero[2] = {0.0, 0.0};
    const veer_bench_bin *bin = &veer_bench_bins[task->bin];
    int rc = veer_arm_inverse(p, bin->x, bin->y, q, err);
    if (rc)
        return rc;
    veer_arm arm;
    rc = veer_arm_init(&arm, p, q, zero, err);
    if (rc)
        return rc;
    veer_arm_observe(&arm, obs);
    return 0;
}
