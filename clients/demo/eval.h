/* Evaluating a controller of the demo arm on one task: episodes from fixed start states, the
 * episode return, and the normalised score against the two baselines.
 *
 * Any controller plugs in as a veer_arm_policy (observation → torque): the cross-entropy
 * planner (cem.h), random torques (below), or a served FB policy (the demo wires libveer's act
 * call into a callback). All three run through the same loop, so their returns compare:
 *   - the physics runs at 1 kHz from the start state with the task's parcel mass;
 *   - the policy is asked every `query_ms` physics steps (20 = once per decision, as the logs
 *     are recorded; 1 = at the controller's 1 kHz), the torque held in between;
 *   - the reward is read every `decision_ms` (the decision step, 20 ms) on the state reached,
 *     and the return J is the undiscounted sum over `decisions` decision steps.
 * The normalised score is (J − J_random) / (J_cem − J_random): 0 is random torques, 1 is the
 * planner that knows the reward and the dynamics.
 */
#ifndef VEER_DEMO_EVAL_H
#define VEER_DEMO_EVAL_H

#include <stdint.h>

#include "arm.h"
#include "tasks.h"
#include "train/rng.h"
#include "veer/error.h"

/* Returns 0 and writes the torque (N·m; clamped by the arm), or a negative code to stop the
 * episode. Called from the evaluating thread only. */
typedef int (*veer_arm_policy_fn)(void *ctx, const float obs[VEER_ARM_OBS_DIM],
                                  float torque[VEER_ARM_ACT_DIM]);

typedef struct veer_arm_policy {
    const char *name;
    veer_arm_policy_fn act;
    void (*reset)(void *ctx); /* called at each episode start; may be NULL */
    void *ctx;
} veer_arm_policy;

typedef struct veer_arm_episode {
    int decisions;   /* decision steps per episode (250 = 5 s at 20 ms) */
    int decision_ms; /* the decision (reward) step in physics steps of 1 ms */
    int query_ms;    /* physics steps between policy queries, 1 ≤ query_ms */
} veer_arm_episode;

/* 250 decisions of 20 ms, policy asked once per decision. */
void veer_arm_episode_default(veer_arm_episode *e);

/* The fixed start states (q1, q2, q̇1, q̇2) of the evaluation: at rest on the shoulder stop in
 * the chute, raised to either side, and two swinging. */
#define VEER_ARM_EVAL_START_COUNT 5
extern const double veer_arm_eval_starts[VEER_ARM_EVAL_START_COUNT][4];

/* Runs one episode of `task` from `start` and writes its return to `*ret`. If `trace` is not
 * NULL it receives the observation after each decision (decisions × VEER_ARM_OBS_DIM floats,
 * caller-owned). Returns 0; VEER_EINVAL for bad params or episode fields (field named);
 * VEER_ENONFINITE (field "torque") when the policy returns a non-finite torque; or the
 * policy's own negative code. */
int veer_arm_run_episode(const veer_arm_params *p, const veer_arm_task *task, const double start[4],
                         const veer_arm_episode *e, const veer_arm_policy *policy, double *ret,
                         float *trace, veer_error *err);

/* Mean return over `n_starts` starts, each run `repeats` times (for random policies); per-start
 * means go to `per_start` when not NULL. Same errors as veer_arm_run_episode. */
int veer_arm_eval_policy(const veer_arm_params *p, const veer_arm_task *task,
                         const double (*starts)[4], int n_starts, int repeats,
                         const veer_arm_episode *e, const veer_arm_policy *policy,
                         double *mean_return, double *per_start, veer_error *err);

/* (J − J_random) / (J_cem − J_random); NaN when the baselines are closer than 1e-9 (the task
 * does not separate them and no score is meaningful). */
double veer_arm_normalised_score(double j, double j_random, double j_cem);

/* Random torques: uniform within the torque limits, drawn afresh at each query. */
typedef struct veer_arm_random_policy {
    veer__rng rng;
    double torque_max[2];
} veer_arm_random_policy;

void veer_arm_random_policy_init(veer_arm_random_policy *r, const veer_arm_params *p, uint64_t key);
int veer_arm_random_policy_act(void *ctx, const float obs[VEER_ARM_OBS_DIM],
                               float torque[VEER_ARM_ACT_DIM]);

#endif
