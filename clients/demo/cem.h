/* The task-specific baseline: model-predictive control by the cross-entropy method.
 *
 * The cross-entropy method (Rubinstein, "The cross-entropy method for combinatorial and
 * continuous optimization", Methodology and Computing in Applied Probability, 1999) searches
 * torque sequences by sampling from a Gaussian, keeping the best ("elite") samples and refitting
 * the Gaussian to them. We use it for MPC as PETS does (Chua, Calandra, McAllister & Levine,
 * "Deep reinforcement learning in a handful of trials using probabilistic dynamics models",
 * NeurIPS 2018): at every decision, plan a sequence over a receding horizon, apply its first
 * torque, re-plan at the next decision from the shifted previous mean; the mean and variance
 * move towards the elites' with PETS's smoothing. Two differences from PETS: the dynamics are
 * the true arm equations (arm.h), not a learned model, and the torque applied is the first of
 * the best sequence seen in the search rather than of the final mean, which for deterministic
 * dynamics is never worse (the "keep the best" of iCEM, Pinneri et al., CoRL 2020, from memory).
 *
 * The planner knows the reward (tasks.h) and the arm's parameters including the parcel mass.
 * Rollouts integrate with RK4 at plan_dt (5 ms by default, four steps per 20 ms decision)
 * instead of 1 ms: RK4 stays accurate and stable at 5 ms for this arm (its stiffest mode, a
 * pressed stop, has |λ|·dt about 1.1, inside RK4's stability region), and planning becomes five
 * times cheaper; the evaluation itself always runs the 1 kHz physics.
 *
 * All buffers are allocated at create; planning allocates nothing. One planner per thread.
 */
#ifndef VEER_DEMO_CEM_H
#define VEER_DEMO_CEM_H

#include <stdint.h>

#include "arm.h"
#include "eval.h"
#include "tasks.h"
#include "veer/error.h"

typedef struct veer_arm_cem_config {
    int horizon;       /* decisions planned ahead */
    int population;    /* sampled sequences per iteration */
    int elites;        /* best sequences the Gaussian is refitted to */
    int iterations;    /* refits per decision */
    int decision_ms;   /* decision step in ms (torque held) */
    double plan_dt;    /* s, rollout integration step; decision_ms·1e-3 must be a multiple */
    double initial_sd; /* fraction of the torque limit */
    double smoothing;  /* weight kept on the old mean and variance at each refit (PETS: 0.1) */
    uint64_t rng_key;  /* random stream */
} veer_arm_cem_config;

/* Horizon 30 decisions (0.6 s: about the time the arm needs to swing between bins), population
 * 200, 20 elites, 4 iterations, 20 ms decisions, 5 ms rollout steps, initial sd 0.5 of the
 * limit, smoothing 0.1. Chosen by trying a few settings on the suite; see the report. */
void veer_arm_cem_config_default(veer_arm_cem_config *c);

typedef struct veer_arm_cem veer_arm_cem;

/* Creates a planner for `task` on an arm with parameters `model` (copied). Returns 0 with
 * *out set, VEER_EINVAL with the field named for a bad configuration or model, or VEER_ENOMEM.
 * Free with veer_arm_cem_destroy. */
int veer_arm_cem_create(const veer_arm_cem_config *c, const veer_arm_params *model,
                        const veer_arm_task *task, veer_arm_cem **out, veer_error *err);
void veer_arm_cem_destroy(veer_arm_cem *cem);

/* Forgets the previous plan (call at an episode start). */
void veer_arm_cem_reset(veer_arm_cem *cem);

/* Plans from the exact state (q, q̇) and writes the torque to apply now. Returns 0. */
int veer_arm_cem_plan(veer_arm_cem *cem, const double q[2], const double qd[2], double torque[2]);

/* The planner as an evaluation policy: recovers (q, q̇) from the observation (arm.h) and plans.
 * `ctx` is the veer_arm_cem. */
int veer_arm_cem_act(void *ctx, const float obs[VEER_ARM_OBS_DIM], float torque[VEER_ARM_ACT_DIM]);
void veer_arm_cem_reset_cb(void *ctx);

/* Planning time: number of plans and their total wall time (ns, monotonic clock). */
void veer_arm_cem_timing(const veer_arm_cem *cem, uint64_t *plans, uint64_t *total_ns);

#endif
