/* The demo's task suite: reward functions of the arm's observation, and the goal observations
 * that a supervisor sends to have a reach task encoded.
 *
 * Every reward is a function of the observation (arm.h's features) alone. The action argument
 * is part of the signature so a task could price torque, but none of the suite does: an FB task
 * vector is encoded from rewards of states (B reads states), so a reward that depends on the
 * action could not be expressed by the served model and the comparison with the planner would
 * not be fair. Rewards lie in [0, 1] except slow_reach_* (in [−0.4, 1]); an episode's return is
 * their undiscounted sum over the decisions (eval.h).
 *
 *   reach_<bin>       exp(−d / 0.10 m), d = gripper distance to the bin's drop point (bench.h).
 *                     The exponential keeps a signal 0.5 m away (0.007) for planners while the
 *                     peak is sharp enough that only the bin scores well.
 *   keep_high         (y + 0.65) / 1.30 clamped to [0, 1]: the gripper height over the arm's
 *                     vertical reach.
 *   keep_still        exp(−(‖q̇‖ / 0.5 rad/s)²).
 *   avoid_chute       min(1, dist_to_keepout_zone / 0.05 m): 0 inside the zone, full reward
 *                     5 cm clear of it, so the reward has a slope a planner can follow.
 *   slow_reach_<bin>  exp(−d / 0.25 m) − 0.02 min(‖q̇‖², 20): a wider reach reward with a
 *                     price on joint speed over the whole motion. Wider because with the
 *                     narrow one, starting at rest far from the bin, every motion costs more
 *                     within a planning horizon than it gains, and staying put wins.
 * The scales are design choices for the demo (no source).
 */
#ifndef VEER_DEMO_TASKS_H
#define VEER_DEMO_TASKS_H

#include <stddef.h>

#include "arm.h"
#include "veer/error.h"

typedef enum veer_arm_task_kind {
    VEER_ARM_TASK_REACH,
    VEER_ARM_TASK_KEEP_HIGH,
    VEER_ARM_TASK_KEEP_STILL,
    VEER_ARM_TASK_AVOID_ZONE,
    VEER_ARM_TASK_SLOW_REACH,
} veer_arm_task_kind;

typedef struct veer_arm_task {
    const char *name;
    veer_arm_task_kind kind;
    int bin; /* index into veer_bench_bins for the reach kinds, else −1 */
} veer_arm_task;

#define VEER_ARM_TASK_COUNT 7
extern const veer_arm_task veer_arm_tasks[VEER_ARM_TASK_COUNT];

#define VEER_ARM_REACH_SCALE 0.10      /* m */
#define VEER_ARM_HEIGHT_SPAN 0.65      /* m, l1 + l2 of the default arm */
#define VEER_ARM_STILL_SCALE 0.5       /* rad/s */
#define VEER_ARM_ZONE_MARGIN 0.05      /* m */
#define VEER_ARM_SLOW_REACH_SCALE 0.25 /* m */
#define VEER_ARM_SLOW_PRICE 0.02       /* per (rad/s)² */
#define VEER_ARM_SLOW_CAP 20.0         /* (rad/s)² */

/* The task called `name`, or NULL. */
const veer_arm_task *veer_arm_task_find(const char *name);

/* Reward of one observation; `torque` may be NULL (no suite task reads it). Pure and
 * thread-safe. */
double veer_arm_task_reward(const veer_arm_task *task, const float obs[VEER_ARM_OBS_DIM],
                            const float *torque);

/* Rewards for `n` observations stored row-major in `states` (n × VEER_ARM_OBS_DIM), written to
 * `rewards` (n floats, caller-owned): the reward samples a supervisor sends for encoding.
 * Returns 0, VEER_EINVAL (field "task", "states" or "rewards" when NULL) or VEER_ENONFINITE
 * (field "states[i][j]") when an observation holds NaN or infinity; nothing is written then. */
int veer_arm_task_rewards(const veer_arm_task *task, const float *states, size_t n, float *rewards,
                          veer_error *err);

/* Whether the task has a goal state (the reach kinds). */
int veer_arm_task_has_goal(const veer_arm_task *task);

/* The goal observation of a reach task for an arm with parameters `p`: the gripper at the bin's
 * drop point (elbow solution by veer_arm_inverse), at rest. Returns 0, or VEER_EINVAL with field
 * "task" for a task without a goal or "target" when the bin is out of this arm's reach. */
int veer_arm_task_goal(const veer_arm_task *task, const veer_arm_params *p,
                       float obs[VEER_ARM_OBS_DIM], veer_error *err);

#endif
