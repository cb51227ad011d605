/* The demo's task specifications and the in-process FB policy (see demo_fb.h). The policy adds
 * nothing to the model's answer: the torque is veer_act's action as it is, so the evaluation
 * measures the served policy and not a wrapper around it. */
#include "demo_fb.h"

#include <string.h>

#include "base/base.h"

int veer_demo_task_spec_build(const veer_bundle *bundle, const veer_arm_task *task,
                              const veer_arm_params *p, veer_demo_encoding enc, int center,
                              veer_demo_task_spec *out, veer_error *err)
{
    memset(out, 0, sizeof *out);
    const veer_model_info *info = veer_bundle_info(bundle);
    if (info->state_dim != VEER_ARM_OBS_DIM)
        return veer__error_set(err, VEER_EDIM, "bundle",
                               "the bundle's states have %u features; the arm's have %d",
                               info->state_dim, VEER_ARM_OBS_DIM);
    if (enc == VEER_DEMO_ENCODE_GOAL) {
        out->states = veer__malloc(sizeof(float) * VEER_ARM_OBS_DIM);
        out->values = veer__malloc(sizeof(float));
        if (!out->states || !out->values) {
            veer_demo_task_spec_free(out);
            return veer__error_set(err, VEER_ENOMEM, "goal", NULL);
        }
        int rc = veer_arm_task_goal(task, p, out->states, err);
        if (rc) {
            veer_demo_task_spec_free(out);
            return rc;
        }
        out->values[0] = 1.0f;
        veer_task_spec_init(&out->spec, VEER_TASK_GOALS);
        out->spec.count = 1;
    } else {
        uint32_t n = info->reference_count;
        if (n == 0)
            return veer__error_set(err, VEER_EFIELD, "bundle",
                                   "the bundle holds no reference states to draw samples from");
        out->states = veer__malloc(sizeof(float) * VEER_ARM_OBS_DIM * n);
        out->values = veer__malloc(sizeof(float) * n);
        if (!out->states || !out->values) {
            veer_demo_task_spec_free(out);
            return veer__error_set(err, VEER_ENOMEM, "samples", NULL);
        }
        memcpy(out->states, info->reference_states, sizeof(float) * VEER_ARM_OBS_DIM * n);
        int rc = veer_arm_task_rewards(task, out->states, n, out->values, err);
        if (rc) {
            veer_demo_task_spec_free(out);
            return rc;
        }
        veer_task_spec_init(&out->spec, VEER_TASK_SAMPLES);
        out->spec.count = n;
        out->spec.center = center ? 1 : 0;
    }
    out->spec.states = out->states;
    out->spec.values = out->values;
    return 0;
}

void veer_demo_task_spec_free(veer_demo_task_spec *s)
{
    veer__free(s->states);
    veer__free(s->values);
    memset(s, 0, sizeof *s);
}

int veer_demo_fb_policy_init(veer_demo_fb_policy *fb, const veer_bundle *bundle, veer_error *err)
{
    memset(fb, 0, sizeof *fb);
    const veer_model_info *info = veer_bundle_info(bundle);
    if (info->state_dim != VEER_ARM_OBS_DIM || info->action_kind != VEER_ACTION_CONTINUOUS ||
        info->action_dim != VEER_ARM_ACT_DIM || info->z_dim > 1024)
        return veer__error_set(err, VEER_EDIM, "bundle",
                               "not a model of the demo arm (states %u, actions %u, d %u)",
                               info->state_dim, info->action_dim, info->z_dim);
    fb->bundle = bundle;
    fb->z_dim = info->z_dim;
    return veer_workspace_create(bundle, 1, &fb->ws, err);
}

void veer_demo_fb_policy_free(veer_demo_fb_policy *fb)
{
    veer_workspace_destroy(fb->ws);
    fb->ws = NULL;
}

int veer_demo_fb_policy_set_task(veer_demo_fb_policy *fb, const veer_task_spec *spec,
                                 veer_task_report *report, veer_error *err)
{
    return veer_task_encode(fb->bundle, spec, fb->z, report, err);
}

int veer_demo_fb_policy_act(void *ctx, const float obs[VEER_ARM_OBS_DIM],
                            float torque[VEER_ARM_ACT_DIM])
{
    veer_demo_fb_policy *fb = ctx;
    int rc = veer_act(fb->ws, obs, fb->z, torque, NULL, NULL);
    if (rc == 0 && fb->record_first) {
        memcpy(fb->first_state, obs, sizeof fb->first_state);
        memcpy(fb->first_action, torque, sizeof fb->first_action);
        fb->record_first = 0;
    }
    fb->acts++;
    return rc;
}
