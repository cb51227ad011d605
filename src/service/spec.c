/* Checking and canonicalizing task specifications (see spec.h). Checks run on the admin thread
 * before anything is queued for encoding, so a bad request is answered at once with the exact
 * field, and the encoder sees only well-formed input. The encoder checks again; the two lists
 * agree by construction of the error codes, not by sharing code, which keeps the runtime free of
 * wire types. */
#include "service/spec.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "service/arena.h"

static void zero_signs(float *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        if (v[i] == 0.0f)
            v[i] = 0.0f; /* -0.0 == 0.0, so this turns both into +0.0 */
}

int veer__spec_canonical(Veer__Wire__TaskSpec *spec, uint8_t digest[32], veer_error *err)
{
    switch (spec->source_case) {
    case VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES:
        zero_signs(spec->samples->states, spec->samples->n_states);
        zero_signs(spec->samples->rewards, spec->samples->n_rewards);
        break;
    case VEER__WIRE__TASK_SPEC__SOURCE_GOALS: {
        Veer__Wire__GoalStates *g = spec->goals;
        zero_signs(g->states, g->n_states);
        zero_signs(g->weights, g->n_weights);
        size_t ones = 0;
        while (ones < g->n_weights && g->weights[ones] == 1.0f)
            ones++;
        if (ones == g->n_weights)
            g->n_weights = 0;
        break;
    }
    case VEER__WIRE__TASK_SPEC__SOURCE_REFERENCE:
        zero_signs(spec->reference->rewards, spec->reference->n_rewards);
        break;
    default:
        break;
    }
    if (spec->options != NULL && spec->options->ridge == 0.0f)
        spec->options->ridge = 0.0f;
    size_t len = veer__wire__task_spec__get_packed_size(spec);
    uint8_t *buf = veer__malloc(len);
    if (buf == NULL)
        return veer__error_set(err, VEER_ENOMEM, "spec", NULL);
    veer__wire__task_spec__pack(spec, buf);
    int rc = veer__digest(buf, len, digest);
    veer__free(buf);
    if (rc < 0)
        return veer__error_set(err, rc, "spec", "digest failed");
    return 0;
}

static int check_finite(const float *v, size_t n, const char *prefix, const char *name, veer_error *err)
{
    for (size_t i = 0; i < n; i++) {
        if (!isfinite(v[i])) {
            char field[256];
            snprintf(field, sizeof field, "%s.%s[%zu]", prefix, name, i);
            return veer__error_set(err, VEER_ENONFINITE, field, "%s[%zu] is %s; every value must be finite",
                                   name, i, isnan(v[i]) ? "NaN" : "infinite");
        }
    }
    return 0;
}

static int all_zero(const float *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        if (v[i] != 0.0f)
            return 0;
    return 1;
}

static int choice(Veer__Wire__Choice c) { return c == VEER__WIRE__CHOICE__CHOICE_ON ? 1 : c == VEER__WIRE__CHOICE__CHOICE_OFF ? 0 : VEER_OPT_DEFAULT; }

int veer__spec_check(const Veer__Wire__TaskSpec *spec, const veer_model_info *info, uint32_t max_samples,
                     const char *prefix, veer_task_spec *out, veer_error *err)
{
    char field[256]; /* veer_error keeps the first VEER_ERROR_FIELD_MAX bytes */
    char sub[128];
    uint32_t sd = info->state_dim;
    const float *states = NULL, *values = NULL;
    size_t n_states = 0, n_values = 0, count = 0;
    const char *vname = "rewards";
    veer_task_source source;
    int rc;

    switch (spec->source_case) {
    case VEER__WIRE__TASK_SPEC__SOURCE_SAMPLES:
        source = VEER_TASK_SAMPLES;
        snprintf(sub, sizeof sub, "%s.samples", prefix);
        states = spec->samples->states;
        n_states = spec->samples->n_states;
        values = spec->samples->rewards;
        n_values = spec->samples->n_rewards;
        count = n_values;
        break;
    case VEER__WIRE__TASK_SPEC__SOURCE_GOALS:
        source = VEER_TASK_GOALS;
        snprintf(sub, sizeof sub, "%s.goals", prefix);
        states = spec->goals->states;
        n_states = spec->goals->n_states;
        values = spec->goals->weights;
        n_values = spec->goals->n_weights;
        vname = "weights";
        count = n_states / (sd ? sd : 1);
        break;
    case VEER__WIRE__TASK_SPEC__SOURCE_REFERENCE:
        source = VEER_TASK_REFERENCE;
        snprintf(sub, sizeof sub, "%s.reference", prefix);
        values = spec->reference->rewards;
        n_values = spec->reference->n_rewards;
        count = n_values;
        break;
    default:
        snprintf(field, sizeof field, "%s.source", prefix);
        return veer__error_set(err, VEER_EFIELD, field, "the task has no source: set samples, goals or reference");
    }

    if ((source == VEER_TASK_REFERENCE ? n_values : n_states) == 0) {
        snprintf(field, sizeof field, "%s.%s", sub, source == VEER_TASK_REFERENCE ? "rewards" : "states");
        return veer__error_set(err, VEER_EEMPTY, field, "the task has no %s",
                               source == VEER_TASK_REFERENCE ? "rewards" : "states");
    }
    if (count > max_samples) {
        snprintf(field, sizeof field, "%s.%s", sub, source == VEER_TASK_GOALS ? "states" : "rewards");
        return veer__error_set(err, VEER_ETOOMANY, field, "%zu entries; the limit is %u (--max-samples)", count,
                               max_samples);
    }
    if (states != NULL && n_states % sd != 0) {
        snprintf(field, sizeof field, "%s.states", sub);
        return veer__error_set(err, VEER_EDIM, field, "%zu values is not a whole number of states of %u features",
                               n_states, sd);
    }
    if (source == VEER_TASK_SAMPLES && n_states / sd != n_values) {
        snprintf(field, sizeof field, "%s.rewards", sub);
        return veer__error_set(err, VEER_EDIM, field, "%zu rewards for %zu states; give one reward per state",
                               n_values, n_states / sd);
    }
    if (source == VEER_TASK_GOALS && n_values != 0 && n_values != count) {
        snprintf(field, sizeof field, "%s.weights", sub);
        return veer__error_set(err, VEER_EDIM, field, "%zu weights for %zu goals; give one per goal or none",
                               n_values, count);
    }
    if (source == VEER_TASK_REFERENCE && n_values != info->reference_count) {
        snprintf(field, sizeof field, "%s.rewards", sub);
        if (info->reference_count == 0)
            return veer__error_set(err, VEER_EREFSHAPE, field, "the loaded model has no reference set");
        return veer__error_set(err, VEER_EDIM, field, "%zu rewards; the model's reference set has %u states",
                               n_values, info->reference_count);
    }
    if (states != NULL && (rc = check_finite(states, n_states, sub, "states", err)) < 0)
        return rc;
    if ((rc = check_finite(values, n_values, sub, vname, err)) < 0)
        return rc;
    if (n_values > 0 && all_zero(values, n_values)) {
        snprintf(field, sizeof field, "%s.%s", sub, vname);
        return veer__error_set(err, VEER_ENOSIGNAL, field, "every %s is zero: the task asks for nothing",
                               source == VEER_TASK_GOALS ? "weight" : "reward");
    }

    veer_task_spec_init(out, source);
    out->count = (uint32_t)count;
    out->states = states;
    out->values = n_values ? values : NULL;
    out->max_count = max_samples;
    if (spec->options != NULL) {
        const Veer__Wire__TaskOptions *o = spec->options;
        out->rescale = choice(o->rescale);
        out->center = choice(o->center);
        out->cov_correction = o->cov_correction ? 1 : 0;
        if (!isfinite(o->ridge) || o->ridge < 0.0f) {
            snprintf(field, sizeof field, "%s.options.ridge", prefix);
            return veer__error_set(err, VEER_EFIELD, field, "ridge must be a finite value >= 0 (0: the model's)");
        }
        if (o->ridge > 0.0f)
            out->ridge = o->ridge;
        if (o->cov_correction && source != VEER_TASK_SAMPLES) {
            snprintf(field, sizeof field, "%s.options.cov_correction", prefix);
            return veer__error_set(err, VEER_EFIELD, field, "covariance correction applies to reward samples only");
        }
    }
    return 0;
}

Veer__Wire__TaskSpec *veer__spec_copy(const Veer__Wire__TaskSpec *spec)
{
    size_t len = veer__wire__task_spec__get_packed_size(spec);
    uint8_t *buf = veer__malloc(len);
    if (buf == NULL)
        return NULL;
    veer__wire__task_spec__pack(spec, buf);
    Veer__Wire__TaskSpec *copy = veer__wire__task_spec__unpack(&veer__pb_heap, len, buf);
    veer__free(buf);
    return copy;
}

void veer__spec_free(Veer__Wire__TaskSpec *spec)
{
    if (spec != NULL)
        veer__wire__task_spec__free_unpacked(spec, &veer__pb_heap);
}
