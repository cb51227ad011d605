/* The served FB policy for the demo arm: how a task of the suite becomes a reward specification
 * for the model, and the model acting in-process as an evaluation policy (eval.h's callback).
 *
 * One module builds the specifications for both users, so the evaluation and the demo's
 * supervisor send the model exactly the same tasks:
 *   - reward samples: the bundle's reference states (training-log states the trainer stored in
 *     the bundle) with the task's reward of each (tasks.h), centred before encoding (the mean
 *     reward subtracted: a constant reward carries no task, and subtracting it removes the part
 *     of z that only says "states like the data");
 *   - a goal: the task's goal observation (the gripper at rest over the bin), weight 1, for the
 *     reach kinds only.
 * The in-process policy calls veer_act, the same libveer call veerd makes on its act path.
 */
#ifndef VEER_DEMO_FB_H
#define VEER_DEMO_FB_H

#include <stdint.h>

#include "arm.h"
#include "tasks.h"
#include "veer/runtime.h"

typedef enum veer_demo_encoding {
    VEER_DEMO_ENCODE_SAMPLES = 0, /* reward samples over the bundle's reference states */
    VEER_DEMO_ENCODE_GOAL = 1,    /* the goal observation (reach kinds only) */
} veer_demo_encoding;

/* A specification the caller can send or encode: spec.states / spec.values point into the
 * object, which owns them. */
typedef struct veer_demo_task_spec {
    veer_task_spec spec;
    float *states; /* count x VEER_ARM_OBS_DIM */
    float *values; /* count */
} veer_demo_task_spec;

/* Builds the specification of `task` for `bundle` (whose states must be the arm's 8 features)
 * with the given encoding and centring (0/1; ignored for goals). `p` gives the arm for goals.
 * Returns 0, VEER_EDIM (field "bundle") for a bundle of another machine, VEER_EFIELD ("bundle":
 * no reference states) for samples, VEER_EINVAL ("task") for a goal of a task without one,
 * VEER_ENOMEM. Free with veer_demo_task_spec_free. */
int veer_demo_task_spec_build(const veer_bundle *bundle, const veer_arm_task *task,
                              const veer_arm_params *p, veer_demo_encoding enc, int center,
                              veer_demo_task_spec *out, veer_error *err);
void veer_demo_task_spec_free(veer_demo_task_spec *s);

/* The model acting in-process: a workspace and one task vector. */
typedef struct veer_demo_fb_policy {
    const veer_bundle *bundle;
    veer_workspace *ws;
    float z[1024];
    uint32_t z_dim;
    uint64_t acts;
    int record_first; /* when set, the first act of the next episode is recorded below */
    float first_state[VEER_ARM_OBS_DIM];
    float first_action[VEER_ARM_ACT_DIM];
} veer_demo_fb_policy;

/* Creates the workspace. Returns 0, VEER_EDIM when the bundle is not the arm's (state or action
 * dimension, or z_dim above 1024), or the runtime's error. */
int veer_demo_fb_policy_init(veer_demo_fb_policy *fb, const veer_bundle *bundle, veer_error *err);
void veer_demo_fb_policy_free(veer_demo_fb_policy *fb);

/* Encodes `spec` into the policy's task vector. `report` may be NULL. */
int veer_demo_fb_policy_set_task(veer_demo_fb_policy *fb, const veer_task_spec *spec,
                                 veer_task_report *report, veer_error *err);

/* eval.h callbacks; ctx is the veer_demo_fb_policy. */
int veer_demo_fb_policy_act(void *ctx, const float obs[VEER_ARM_OBS_DIM],
                            float torque[VEER_ARM_ACT_DIM]);

#endif
