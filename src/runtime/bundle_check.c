/* Validating a decoded Model before any of it is trusted. Every rule that a later stage relies
 * on (a layer's in_dim matching what feeds it, weights of the declared size, finite numbers,
 * sane bounds and fallback) is checked here, once, so the networks can be evaluated without a
 * single check on the act path. Each failure has its own code and names the field the way a
 * person would find it in the exporter's layout: "forward.branches[1].layers[0].in_dim".
 * The checks run in the order of the schema, and the first failure is reported. */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "runtime/bundle.h"

/* Field paths are truncated at VEER_ERROR_FIELD_MAX on purpose; vsnprintf keeps the compiler's
 * truncation warning, meant for data loss, away from a deliberate cut. */
static __attribute__((format(printf, 3, 4))) char *fieldf(char *buf, size_t n, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, n, fmt, ap);
    va_end(ap);
    return buf;
}
#define FIELD(buf, ...) fieldf((buf), sizeof(buf), __VA_ARGS__)

enum net_role { ROLE_F, ROLE_B, ROLE_ACTOR };

static int check_finite(const float *x, size_t n, const char *path, veer_error *err)
{
    for (size_t i = 0; i < n; i++)
        if (!isfinite(x[i])) {
            char f[VEER_ERROR_FIELD_MAX];
            return veer__error_set(err, VEER_ENONFINITE, FIELD(f, "%s[%zu]", path, i),
                                   "%s[%zu] is %g; every weight and statistic must be finite", path,
                                   i, (double)x[i]);
        }
    return 0;
}

/* The layers of one branch or head, starting from `width` inputs; *out gets the final width.
 * An embedding looks rows up by index, so it may only be the first layer of a branch whose
 * inputs are all indices (state features, or the discrete action as_index): `index_inputs`. */
static int check_layers(Veer__Bundle__Layer *const *layers, size_t count, uint32_t width,
                        int index_inputs, const char *path, uint32_t *out, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX], p[VEER_ERROR_FIELD_MAX];
    if (count > VEER__MAX_LAYERS)
        return veer__error_set(err, VEER_EFIELD, path, "%zu layers; at most %u are supported",
                               count, VEER__MAX_LAYERS);
    for (size_t i = 0; i < count; i++) {
        const Veer__Bundle__Layer *l = layers[i];
        FIELD(p, "%s[%zu]", path, i);
        if (l->in_dim != width)
            return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.in_dim", p),
                                   "%s.in_dim is %u but its input has %u values", p, l->in_dim,
                                   width);
        if (l->out_dim == 0 || l->out_dim > VEER__MAX_DIM)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.out_dim", p),
                                   "%s.out_dim is %u; it must be in 1..%u", p, l->out_dim,
                                   VEER__MAX_DIM);
        size_t in = l->in_dim, outd = l->out_dim;
        int rc;
        switch (l->kind) {
        case VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR:
            if (l->n_weight != in * outd)
                return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.weight", p),
                                       "%s.weight has %zu values; a %zu x %zu layer needs %zu", p,
                                       l->n_weight, outd, in, in * outd);
            if (l->n_bias != 0 && l->n_bias != outd)
                return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.bias", p),
                                       "%s.bias has %zu values; it needs %zu (or none)", p,
                                       l->n_bias, outd);
            break;
        case VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING: {
            if (i != 0 || !index_inputs)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.kind", p),
                                       "%s is an embedding; it must be the first layer of a "
                                       "branch that reads only state features or the action "
                                       "as_index",
                                       p);
            if (l->n_counts != in)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.counts", p),
                                       "%s.counts has %zu values; it needs one per input (%zu)", p,
                                       l->n_counts, in);
            uint64_t rows = 1;
            for (size_t j = 0; j < l->n_counts; j++) {
                if (l->counts[j] == 0 || l->counts[j] > VEER__MAX_EMBED_COUNT)
                    return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.counts[%zu]", p, j),
                                           "%s.counts[%zu] is %u; it must be in 1..%u", p, j,
                                           l->counts[j], VEER__MAX_EMBED_COUNT);
                rows *= l->counts[j];
                if (rows > l->n_weight) /* also keeps rows * out from overflowing */
                    break;
            }
            if (rows > l->n_weight || l->n_weight != rows * outd)
                return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.weight", p),
                                       "%s.weight has %zu values; the product of counts times "
                                       "out_dim (%zu) is needed",
                                       p, l->n_weight, outd);
            if (l->n_bias != 0)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.bias", p),
                                       "%s.bias must be empty for an embedding", p);
            break;
        }
        case VEER__BUNDLE__LAYER_KIND__LAYER_RELU:
        case VEER__BUNDLE__LAYER_KIND__LAYER_TANH:
        case VEER__BUNDLE__LAYER_KIND__LAYER_LAYER_NORM:
        case VEER__BUNDLE__LAYER_KIND__LAYER_RESCALE_NORM:
            if (outd != in)
                return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.out_dim", p),
                                       "%s.out_dim is %zu; this layer keeps its width (%zu)", p,
                                       outd, in);
            if (l->kind == VEER__BUNDLE__LAYER_KIND__LAYER_LAYER_NORM) {
                if (l->n_weight != 0 && l->n_weight != outd)
                    return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.weight", p),
                                           "%s.weight (gain) has %zu values; it needs %zu (or "
                                           "none)",
                                           p, l->n_weight, outd);
                if (l->n_bias != 0 && l->n_bias != outd)
                    return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.bias", p),
                                           "%s.bias has %zu values; it needs %zu (or none)", p,
                                           l->n_bias, outd);
                if (!isfinite(l->eps))
                    return veer__error_set(err, VEER_ENONFINITE, FIELD(f, "%s.eps", p),
                                           "%s.eps is not finite", p);
                if (!(l->eps > 0.0f))
                    return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.eps", p),
                                           "%s.eps is %g; it must be > 0 (1e-5 is usual)", p,
                                           (double)l->eps);
            } else if (l->n_weight != 0 || l->n_bias != 0) {
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.weight", p),
                                       "%s has weights but its kind takes none", p);
            }
            if (l->kind == VEER__BUNDLE__LAYER_KIND__LAYER_RESCALE_NORM) {
                if (!isfinite(l->norm))
                    return veer__error_set(err, VEER_ENONFINITE, FIELD(f, "%s.norm", p),
                                           "%s.norm is not finite", p);
                if (l->norm < 0.0f)
                    return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.norm", p),
                                           "%s.norm is negative (0 means sqrt(out_dim))", p);
            }
            break;
        default:
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.kind", p),
                                   "%s.kind is %d, not a known layer kind", p, (int)l->kind);
        }
        if (l->kind != VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING && l->n_counts != 0)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.counts", p),
                                   "%s.counts is for embedding layers only", p);
        if ((rc = check_finite(l->weight, l->n_weight, FIELD(f, "%s.weight", p), err)) != 0 ||
            (rc = check_finite(l->bias, l->n_bias, FIELD(f, "%s.bias", p), err)) != 0)
            return rc;
        width = l->out_dim;
    }
    *out = width;
    return 0;
}

/* One branch's inputs; *width gets the concatenated width. */
static int check_inputs(const Veer__Bundle__Branch *br, const char *path,
                        const Veer__Bundle__Model *m, enum net_role role, int *reads_action,
                        int *reads_task, uint32_t *width, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX], p[VEER_ERROR_FIELD_MAX];
    const Veer__Bundle__ActionSpace *as = m->action;
    int discrete = as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
    if (br->n_inputs == 0 || br->n_inputs > VEER__MAX_INPUTS)
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.inputs", path),
                               "%s has %zu inputs; it needs 1..%u", path, br->n_inputs,
                               VEER__MAX_INPUTS);
    uint64_t w = 0;
    for (size_t i = 0; i < br->n_inputs; i++) {
        const Veer__Bundle__Input *in = br->inputs[i];
        FIELD(p, "%s.inputs[%zu]", path, i);
        if (in->kind != VEER__BUNDLE__INPUT_KIND__INPUT_STATE && in->n_features != 0)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.features", p),
                                   "%s.features is for state inputs only", p);
        if (in->kind != VEER__BUNDLE__INPUT_KIND__INPUT_ACTION && in->as_index)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.as_index", p),
                                   "%s.as_index is for discrete action inputs only", p);
        switch (in->kind) {
        case VEER__BUNDLE__INPUT_KIND__INPUT_STATE:
            for (size_t j = 0; j < in->n_features; j++)
                if (in->features[j] >= m->state_dim)
                    return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.features[%zu]", p, j),
                                           "%s.features[%zu] is %u; the state has %u features", p,
                                           j, in->features[j], m->state_dim);
            if (in->n_features > VEER__MAX_DIM)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.features", p),
                                       "%s.features lists too many features", p);
            w += in->n_features ? in->n_features : m->state_dim;
            break;
        case VEER__BUNDLE__INPUT_KIND__INPUT_ACTION:
            if (role != ROLE_F)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.kind", p),
                                       "%s reads the action; only F may", p);
            if (in->as_index && !discrete)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.as_index", p),
                                       "%s.as_index is for discrete action inputs only", p);
            *reads_action = 1;
            w += discrete ? (in->as_index ? 1 : as->count) : as->dim;
            break;
        case VEER__BUNDLE__INPUT_KIND__INPUT_TASK:
            if (role == ROLE_B)
                return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.kind", p),
                                       "%s reads z; B reads the state only", p);
            *reads_task = 1;
            w += m->z_dim;
            break;
        default:
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.kind", p),
                                   "%s.kind is %d, not a known input kind", p, (int)in->kind);
        }
    }
    if (w > VEER__MAX_DIM)
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.inputs", path),
                               "%s's inputs add up to %llu values; at most %u", path,
                               (unsigned long long)w, VEER__MAX_DIM);
    *width = (uint32_t)w;
    return 0;
}

static int check_net(const Veer__Bundle__Network *net, const char *name,
                     const Veer__Bundle__Model *m, enum net_role role, uint32_t want,
                     const char *want_name, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX], p[VEER_ERROR_FIELD_MAX];
    int rc;
    if (net == NULL || net->n_branches == 0)
        return veer__error_set(err, VEER_ENETMISSING, name, "the bundle has no %s network%s", name,
                               net ? " (it has no branches)" : "");
    if (net->n_branches > VEER__MAX_BRANCHES)
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.branches", name),
                               "%s has %zu branches; at most %u", name, net->n_branches,
                               VEER__MAX_BRANCHES);

    uint32_t outs[VEER__MAX_BRANCHES];
    uint64_t total = 0;
    int reads_action = 0, reads_task = 0;
    for (size_t b = 0; b < net->n_branches; b++) {
        const Veer__Bundle__Branch *br = net->branches[b];
        uint32_t width = 0;
        FIELD(p, "%s.branches[%zu]", name, b);
        if ((rc = check_inputs(br, p, m, role, &reads_action, &reads_task, &width, err)) != 0)
            return rc;
        int index_inputs = 1;
        for (size_t i = 0; i < br->n_inputs; i++)
            index_inputs &= br->inputs[i]->kind == VEER__BUNDLE__INPUT_KIND__INPUT_STATE ||
                            (br->inputs[i]->kind == VEER__BUNDLE__INPUT_KIND__INPUT_ACTION &&
                             br->inputs[i]->as_index);
        if ((rc = check_layers(br->layers, br->n_layers, width, index_inputs,
                               FIELD(f, "%s.layers", p), &outs[b], err)) != 0)
            return rc;
        total += outs[b];
    }
    if (role == ROLE_F && !reads_action)
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.branches", name),
                               "F must read the action in one of its branches");
    if (role != ROLE_B && !reads_task)
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.branches", name),
                               "%s must read z in one of its branches", name);

    uint32_t merged;
    switch (net->merge) {
    case VEER__BUNDLE__MERGE_KIND__MERGE_CONCAT:
        if (net->bilinear_k != 0 || net->matrix_branch != 0 || net->bilinear_bias)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.bilinear_k", name),
                                   "%s: bilinear_k, matrix_branch and bilinear_bias are for a "
                                   "bilinear merge only",
                                   name);
        if (total > VEER__MAX_DIM)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.branches", name),
                                   "%s's branches add up to %llu values; at most %u", name,
                                   (unsigned long long)total, VEER__MAX_DIM);
        merged = (uint32_t)total;
        break;
    case VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR: {
        if (net->n_branches != 2)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.branches", name),
                                   "a bilinear merge needs exactly 2 branches; %s has %zu", name,
                                   net->n_branches);
        if (net->matrix_branch > 1)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.matrix_branch", name),
                                   "%s.matrix_branch is %u; it must be 0 or 1", name,
                                   net->matrix_branch);
        uint32_t k = net->bilinear_k, rows = k + (net->bilinear_bias ? 1 : 0);
        if (k == 0 || k > VEER__MAX_DIM)
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.bilinear_k", name),
                                   "%s.bilinear_k is %u; it must be in 1..%u", name, k,
                                   VEER__MAX_DIM);
        uint32_t mb = net->matrix_branch, vb = 1 - mb;
        if (outs[vb] != k)
            return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.bilinear_k", name),
                                   "%s.branches[%u] gives %u values but bilinear_k is %u", name, vb,
                                   outs[vb], k);
        if (outs[mb] % rows != 0)
            return veer__error_set(err, VEER_EDIMCHAIN, FIELD(f, "%s.branches[%u]", name, mb),
                                   "%s.branches[%u] gives %u values, not a multiple of the %u "
                                   "matrix rows (bilinear_k%s)",
                                   name, mb, outs[mb], rows, net->bilinear_bias ? " + 1" : "");
        merged = outs[mb] / rows;
        break;
    }
    default:
        return veer__error_set(err, VEER_EFIELD, FIELD(f, "%s.merge", name),
                               "%s.merge is %d; it must be CONCAT or BILINEAR", name,
                               (int)net->merge);
    }

    uint32_t out;
    if ((rc = check_layers(net->head, net->n_head, merged, 0, FIELD(p, "%s.head", name), &out,
                           err)) != 0)
        return rc;
    if (out != want) {
        if (net->n_head > 0)
            FIELD(f, "%s.head[%zu].out_dim", name, net->n_head - 1);
        else
            FIELD(f, "%s.head", name);
        return veer__error_set(err, VEER_EDIMCHAIN, f, "%s gives %u values but must give %u (%s)",
                               name, out, want, want_name);
    }
    return 0;
}

static int cmp_str(const void *a, const void *b)
{
    return strcmp(*(const char *const *)a, *(const char *const *)b);
}

static int check_features(const Veer__Bundle__Model *m, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX];
    if (m->n_feature_names != m->state_dim)
        return veer__error_set(err, VEER_EFIELD, "feature_names",
                               "feature_names has %zu names; state_dim is %u", m->n_feature_names,
                               m->state_dim);
    for (size_t i = 0; i < m->n_feature_names; i++)
        if (m->feature_names[i][0] == '\0')
            return veer__error_set(err, VEER_EFIELD, FIELD(f, "feature_names[%zu]", i),
                                   "feature_names[%zu] is empty", i);
    /* Drift reports name features; two features with one name would be indistinguishable. */
    const char **sorted = veer__malloc(m->n_feature_names * sizeof *sorted);
    if (sorted == NULL)
        return veer__error_set(err, VEER_ENOMEM, "feature_names", NULL);
    memcpy(sorted, m->feature_names, m->n_feature_names * sizeof *sorted);
    qsort(sorted, m->n_feature_names, sizeof *sorted, cmp_str);
    int rc = 0;
    for (size_t i = 1; i < m->n_feature_names; i++)
        if (strcmp(sorted[i - 1], sorted[i]) == 0) {
            rc = veer__error_set(err, VEER_EFIELD, "feature_names",
                                 "the feature name \"%.64s\" appears twice", sorted[i]);
            break;
        }
    veer__free(sorted);
    return rc;
}

static int check_action(const Veer__Bundle__Model *m, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX];
    const Veer__Bundle__ActionSpace *as = m->action;
    if (as == NULL)
        return veer__error_set(err, VEER_EFIELD, "action", "the action space is missing");
    if (as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS) {
        if (as->dim == 0 || as->dim > VEER__MAX_DIM)
            return veer__error_set(err, VEER_EFIELD, "action.dim",
                                   "action.dim is %u; it must be in 1..%u", as->dim, VEER__MAX_DIM);
        if (as->count != 0)
            return veer__error_set(err, VEER_EFIELD, "action.count",
                                   "action.count is for discrete actions only");
        if (as->n_low != as->dim)
            return veer__error_set(err, VEER_EBOUNDS, "action.low",
                                   "action.low has %zu values; action.dim is %u", as->n_low,
                                   as->dim);
        if (as->n_high != as->dim)
            return veer__error_set(err, VEER_EBOUNDS, "action.high",
                                   "action.high has %zu values; action.dim is %u", as->n_high,
                                   as->dim);
        for (size_t i = 0; i < as->dim; i++) {
            if (!isfinite(as->low[i]))
                return veer__error_set(err, VEER_EBOUNDS, FIELD(f, "action.low[%zu]", i),
                                       "action.low[%zu] is not finite", i);
            if (!isfinite(as->high[i]))
                return veer__error_set(err, VEER_EBOUNDS, FIELD(f, "action.high[%zu]", i),
                                       "action.high[%zu] is not finite", i);
            if (as->low[i] > as->high[i])
                return veer__error_set(err, VEER_EBOUNDS, FIELD(f, "action.low[%zu]", i),
                                       "action.low[%zu] = %g is above action.high[%zu] = %g", i,
                                       (double)as->low[i], i, (double)as->high[i]);
        }
        if (as->n_names != 0 && as->n_names != as->dim)
            return veer__error_set(err, VEER_EFIELD, "action.names",
                                   "action.names has %zu names; action.dim is %u", as->n_names,
                                   as->dim);
    } else if (as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE) {
        if (as->dim != 1)
            return veer__error_set(err, VEER_EFIELD, "action.dim",
                                   "action.dim is %u; a discrete action has dim 1", as->dim);
        if (as->count == 0 || as->count > VEER__MAX_DIM)
            return veer__error_set(err, VEER_EFIELD, "action.count",
                                   "action.count is %u; it must be in 1..%u", as->count,
                                   VEER__MAX_DIM);
        if (as->n_low != 0 || as->n_high != 0)
            return veer__error_set(err, VEER_EBOUNDS, as->n_low ? "action.low" : "action.high",
                                   "bounds are for continuous actions only");
        if (as->n_names != 0 && as->n_names != as->count)
            return veer__error_set(err, VEER_EFIELD, "action.names",
                                   "action.names has %zu names; action.count is %u", as->n_names,
                                   as->count);
    } else {
        return veer__error_set(err, VEER_EFIELD, "action.kind",
                               "action.kind is %d; it must be CONTINUOUS or DISCRETE",
                               (int)as->kind);
    }

    /* The fallback is what the machine does when everything else fails: it must be valid. */
    if (m->n_fallback_action != as->dim)
        return veer__error_set(err, VEER_EFALLBACK, "fallback_action",
                               "fallback_action has %zu values; the action has %u",
                               m->n_fallback_action, as->dim);
    for (size_t i = 0; i < as->dim; i++) {
        float v = m->fallback_action[i];
        FIELD(f, "fallback_action[%zu]", i);
        if (!isfinite(v))
            return veer__error_set(err, VEER_EFALLBACK, f, "%s is not finite", f);
        if (as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS &&
            (v < as->low[i] || v > as->high[i]))
            return veer__error_set(err, VEER_EFALLBACK, f, "%s = %g is outside [%g, %g]", f,
                                   (double)v, (double)as->low[i], (double)as->high[i]);
        if (as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE &&
            (v < 0.0f || v >= (float)as->count || v != floorf(v)))
            return veer__error_set(err, VEER_EFALLBACK, f,
                                   "%s = %g is not an action index below %u", f, (double)v,
                                   as->count);
    }
    return 0;
}

static int check_symmetric(const float *a, uint32_t n, const char *path, veer_error *err)
{
    char f[VEER_ERROR_FIELD_MAX];
    for (uint32_t i = 0; i < n; i++)
        for (uint32_t j = i + 1; j < n; j++) {
            float x = a[(size_t)i * n + j], y = a[(size_t)j * n + i];
            float scale = fmaxf(fmaxf(fabsf(x), fabsf(y)), 1e-30f);
            /* float32 export of a float64 matrix: asymmetry beyond rounding is a real error. */
            if (fabsf(x - y) > 1e-5f * scale)
                return veer__error_set(err, VEER_EFIELD,
                                       FIELD(f, "%s[%zu]", path, (size_t)i * n + j),
                                       "%s is not symmetric: [%u][%u] = %g but [%u][%u] = %g", path,
                                       i, j, (double)x, j, i, (double)y);
        }
    return 0;
}

static int check_stats(const Veer__Bundle__Model *m, veer_error *err)
{
    const Veer__Bundle__StateStats *st = m->stats;
    char f[VEER_ERROR_FIELD_MAX];
    size_t d = m->state_dim;
    int rc;
    if (st == NULL)
        return 0;
    if (st->count == 0)
        return veer__error_set(err, VEER_EFIELD, "stats.count",
                               "stats.count is 0; say how many states the statistics come from");
    if (st->n_mean != d)
        return veer__error_set(err, VEER_ESTATSSIZE, "stats.mean",
                               "stats.mean has %zu values; state_dim is %zu", st->n_mean, d);
    if (st->n_cov != d * d)
        return veer__error_set(err, VEER_ESTATSSIZE, "stats.cov",
                               "stats.cov has %zu values; state_dim^2 is %zu", st->n_cov, d * d);
    if (st->bins < 2 || st->bins > 4096)
        return veer__error_set(err, VEER_ESTATSSIZE, "stats.bins",
                               "stats.bins is %u; it must be in 2..4096", st->bins);
    size_t per = st->bins - 1;
    if (st->n_quantile_edges != d * per)
        return veer__error_set(err, VEER_ESTATSSIZE, "stats.quantile_edges",
                               "stats.quantile_edges has %zu values; state_dim x (bins - 1) is %zu",
                               st->n_quantile_edges, d * per);
    if ((rc = check_finite(st->mean, st->n_mean, "stats.mean", err)) != 0 ||
        (rc = check_finite(st->cov, st->n_cov, "stats.cov", err)) != 0 ||
        (rc = check_finite(st->quantile_edges, st->n_quantile_edges, "stats.quantile_edges",
                           err)) != 0 ||
        (rc = check_finite(&st->cov_ridge, 1, "stats.cov_ridge", err)) != 0 ||
        (rc = check_finite(&st->mahalanobis_p99, 1, "stats.mahalanobis_p99", err)) != 0 ||
        (rc = check_finite(&st->mahalanobis_p999, 1, "stats.mahalanobis_p999", err)) != 0)
        return rc;
    /* Equal neighbouring edges are allowed: a feature taking few values has tied quantiles. */
    for (size_t i = 0; i < d; i++)
        for (size_t j = 1; j < per; j++) {
            size_t at = i * per + j;
            if (st->quantile_edges[at] < st->quantile_edges[at - 1])
                return veer__error_set(
                    err, VEER_ESTATSSIZE, FIELD(f, "stats.quantile_edges[%zu]", at),
                    "the quantile edges of feature %zu decrease at edge %zu "
                    "(%g after %g)",
                    i, j, (double)st->quantile_edges[at], (double)st->quantile_edges[at - 1]);
        }
    if ((rc = check_symmetric(st->cov, m->state_dim, "stats.cov", err)) != 0)
        return rc;
    if (st->cov_ridge < 0.0f)
        return veer__error_set(err, VEER_EFIELD, "stats.cov_ridge", "stats.cov_ridge is negative");
    if (st->mahalanobis_p99 < 0.0f || st->mahalanobis_p999 < st->mahalanobis_p99)
        return veer__error_set(err, VEER_EFIELD, "stats.mahalanobis_p999",
                               "the Mahalanobis percentiles must satisfy 0 <= p99 (%g) <= p99.9 "
                               "(%g)",
                               (double)st->mahalanobis_p99, (double)st->mahalanobis_p999);
    return 0;
}

static int check_reference(const Veer__Bundle__Model *m, veer_error *err)
{
    const Veer__Bundle__ReferenceSet *ref = m->reference;
    int rc;
    if (ref != NULL) {
        size_t c = ref->count;
        if (ref->n_states != c * m->state_dim)
            return veer__error_set(err, VEER_EREFSHAPE, "reference.states",
                                   "reference.states has %zu values; count x state_dim is %zu",
                                   ref->n_states, c * m->state_dim);
        if (ref->n_b != c * m->z_dim)
            return veer__error_set(err, VEER_EREFSHAPE, "reference.b",
                                   "reference.b has %zu values; count x z_dim is %zu", ref->n_b,
                                   c * m->z_dim);
        if ((rc = check_finite(ref->states, ref->n_states, "reference.states", err)) != 0 ||
            (rc = check_finite(ref->b, ref->n_b, "reference.b", err)) != 0)
            return rc;
    }
    if (m->n_cov_b != 0) {
        if (m->n_cov_b != (size_t)m->z_dim * m->z_dim)
            return veer__error_set(err, VEER_ESTATSSIZE, "cov_b",
                                   "cov_b has %zu values; z_dim^2 is %zu", m->n_cov_b,
                                   (size_t)m->z_dim * m->z_dim);
        if ((rc = check_finite(m->cov_b, m->n_cov_b, "cov_b", err)) != 0 ||
            (rc = check_symmetric(m->cov_b, m->z_dim, "cov_b", err)) != 0)
            return rc;
    }
    return 0;
}

int veer__bundle_check(const Veer__Bundle__Model *m, veer_error *err)
{
    int rc;
    if (m->state_dim == 0 || m->state_dim > VEER__MAX_DIM)
        return veer__error_set(err, VEER_EFIELD, "state_dim",
                               "state_dim is %u; it must be in 1..%u", m->state_dim, VEER__MAX_DIM);
    if (m->z_dim == 0 || m->z_dim > VEER__MAX_DIM)
        return veer__error_set(err, VEER_EFIELD, "z_dim", "z_dim is %u; it must be in 1..%u",
                               m->z_dim, VEER__MAX_DIM);
    if (!(m->discount > 0.0f && m->discount < 1.0f))
        return veer__error_set(err, VEER_EFIELD, "discount",
                               "discount is %g; it must lie strictly between 0 and 1",
                               (double)m->discount);
    if (!(m->decision_step_s > 0.0f) || !isfinite(m->decision_step_s))
        return veer__error_set(err, VEER_EFIELD, "decision_step_s",
                               "decision_step_s is %g; give the training log's time step in "
                               "seconds (> 0)",
                               (double)m->decision_step_s);
    if ((rc = check_features(m, err)) != 0 || (rc = check_action(m, err)) != 0)
        return rc;

    const Veer__Bundle__TaskDefaults *td = m->task_defaults;
    if (td != NULL) {
        if (!(td->rescale_norm >= 0.0f) || !isfinite(td->rescale_norm))
            return veer__error_set(err, VEER_EFIELD, "task_defaults.rescale_norm",
                                   "task_defaults.rescale_norm is %g; it must be >= 0 (0 means "
                                   "sqrt(z_dim))",
                                   (double)td->rescale_norm);
        if (!(td->ridge >= 0.0f) || !isfinite(td->ridge))
            return veer__error_set(err, VEER_EFIELD, "task_defaults.ridge",
                                   "task_defaults.ridge is %g; it must be finite and >= 0",
                                   (double)td->ridge);
    }

    int continuous = m->action->kind == VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS;
    if ((rc = check_net(m->forward, "forward", m, ROLE_F, m->z_dim, "z_dim", err)) != 0 ||
        (rc = check_net(m->backward, "backward", m, ROLE_B, m->z_dim, "z_dim", err)) != 0)
        return rc;
    if (continuous) {
        if ((rc = check_net(m->actor, "actor", m, ROLE_ACTOR, m->action->dim, "action.dim", err)) !=
            0)
            return rc;
    } else {
        if (m->actor != NULL)
            return veer__error_set(err, VEER_EFIELD, "actor",
                                   "a discrete bundle acts by argmax over F and has no actor");
        if (m->actor_normalized)
            return veer__error_set(err, VEER_EFIELD, "actor_normalized",
                                   "actor_normalized is for continuous actions only");
    }
    if ((rc = check_stats(m, err)) != 0 || (rc = check_reference(m, err)) != 0)
        return rc;
    return 0;
}
