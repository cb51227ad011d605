/* Turning a checked Model into the runtime's own structures. Every weight and statistic is
 * copied into 64-byte-aligned blocks owned by the bundle (so OpenBLAS reads whole cache lines
 * and the decoded protobuf can be freed at once), the networks get their evaluation plan
 * (widths, which branches read the action), and the one piece of real work is done: the
 * precision matrix (cov + cov_ridge I)^-1 that the drift monitor needs for Mahalanobis
 * distances, by Cholesky factorisation in double precision (LAPACK dpotrf/dpotri). */
#include <lapacke.h>
#include <math.h>
#include <string.h>

#include "base/base.h"
#include "runtime/bundle.h"
#include "runtime/kernels.h"

void *veer__bundle_alloc(struct veer_bundle *b, size_t n)
{
    /* The first 64 bytes of each block link the chain; the caller's part stays aligned. */
    unsigned char *block = veer__malloc_aligned(n + 64);
    if (block == NULL)
        return NULL;
    *(void **)block = b->blocks;
    b->blocks = block;
    b->memory += n + 64;
    return block + 64;
}

/* An aligned copy of n bytes; an empty source gives NULL, which the networks read as "none".
 * Running out of memory sets *failed, so a group of copies is checked once. */
static void *copy_bytes(struct veer_bundle *b, const void *src, size_t n, int *failed)
{
    if (n == 0)
        return NULL;
    void *d = veer__bundle_alloc(b, n);
    if (d == NULL) {
        *failed = 1;
        return NULL;
    }
    memcpy(d, src, n);
    return d;
}

static int copy_str(struct veer_bundle *b, const char *src, const char **dst)
{
    if (src == NULL)
        src = "";
    size_t n = strlen(src) + 1;
    char *d = veer__bundle_alloc(b, n);
    if (d == NULL)
        return VEER_ENOMEM;
    memcpy(d, src, n);
    *dst = d;
    return 0;
}

static uint32_t max_u32(uint32_t a, uint32_t b)
{
    return a > b ? a : b;
}

static int build_layers(struct veer_bundle *b, Veer__Bundle__Layer *const *src, size_t count,
                        veer__layer **out, uint32_t *max_width)
{
    *out = NULL;
    if (count == 0)
        return 0;
    veer__layer *layers = veer__bundle_alloc(b, count * sizeof *layers);
    if (layers == NULL)
        return VEER_ENOMEM;
    memset(layers, 0, count * sizeof *layers);
    for (size_t i = 0; i < count; i++) {
        const Veer__Bundle__Layer *s = src[i];
        veer__layer *l = &layers[i];
        l->kind = (int)s->kind; /* the schema's numbers are ours (see net.h) */
        l->in_dim = s->in_dim;
        l->out_dim = s->out_dim;
        l->eps = s->eps;
        l->norm = s->norm > 0.0f ? s->norm : sqrtf((float)s->out_dim);
        int failed = 0;
        l->weight = copy_bytes(b, s->weight, s->n_weight * sizeof *s->weight, &failed);
        l->bias = copy_bytes(b, s->bias, s->n_bias * sizeof *s->bias, &failed);
        l->counts = copy_bytes(b, s->counts, s->n_counts * sizeof *s->counts, &failed);
        if (failed)
            return VEER_ENOMEM;
        *max_width = max_u32(*max_width, l->out_dim);
    }
    *out = layers;
    return 0;
}

static int build_net(struct veer_bundle *b, const Veer__Bundle__Network *src,
                     const Veer__Bundle__Model *m, veer__net *net)
{
    int discrete = m->action->kind == VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
    int rc;
    memset(net, 0, sizeof *net);
    net->branch_count = (uint32_t)src->n_branches;
    net->branches = veer__bundle_alloc(b, src->n_branches * sizeof *net->branches);
    if (net->branches == NULL)
        return VEER_ENOMEM;
    memset(net->branches, 0, src->n_branches * sizeof *net->branches);

    for (size_t bi = 0; bi < src->n_branches; bi++) {
        const Veer__Bundle__Branch *sb = src->branches[bi];
        veer__branch *br = &net->branches[bi];
        br->input_count = (uint32_t)sb->n_inputs;
        br->inputs = veer__bundle_alloc(b, sb->n_inputs * sizeof *br->inputs);
        if (br->inputs == NULL)
            return VEER_ENOMEM;
        for (size_t i = 0; i < sb->n_inputs; i++) {
            const Veer__Bundle__Input *si = sb->inputs[i];
            veer__input *in = &br->inputs[i];
            in->features = NULL;
            switch (si->kind) {
            case VEER__BUNDLE__INPUT_KIND__INPUT_STATE:
                in->kind = VEER__INPUT_STATE;
                in->width = si->n_features ? (uint32_t)si->n_features : m->state_dim;
                int failed = 0;
                in->features =
                    copy_bytes(b, si->features, si->n_features * sizeof *si->features, &failed);
                if (failed)
                    return VEER_ENOMEM;
                break;
            case VEER__BUNDLE__INPUT_KIND__INPUT_ACTION:
                br->reads_action = 1;
                if (!discrete) {
                    in->kind = VEER__INPUT_ACTION;
                    in->width = m->action->dim;
                } else if (si->as_index) {
                    in->kind = VEER__INPUT_ACTION_INDEX;
                    in->width = 1;
                } else {
                    in->kind = VEER__INPUT_ACTION_ONEHOT;
                    in->width = m->action->count;
                }
                break;
            default: /* TASK; the checker allows nothing else */
                br->reads_task = 1;
                in->kind = VEER__INPUT_TASK;
                in->width = m->z_dim;
                break;
            }
            br->in_width += in->width;
        }
        net->max_in_width = max_u32(net->max_in_width, br->in_width);
        br->layer_count = (uint32_t)sb->n_layers;
        if ((rc = build_layers(b, sb->layers, sb->n_layers, &br->layers, &net->max_width)) != 0)
            return rc;
        br->out_dim = sb->n_layers ? sb->layers[sb->n_layers - 1]->out_dim : br->in_width;
        net->branch_width += br->out_dim;
    }

    if (src->merge == VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR) {
        net->merge = VEER__MERGE_BILINEAR;
        net->bilinear_k = src->bilinear_k;
        net->matrix_branch = src->matrix_branch;
        net->bilinear_bias = src->bilinear_bias;
        net->merged_width = net->branches[src->matrix_branch].out_dim /
                            (src->bilinear_k + (src->bilinear_bias ? 1u : 0u));
    } else {
        net->merge = VEER__MERGE_CONCAT;
        net->merged_width = net->branch_width;
    }
    net->max_width = max_u32(net->max_width, net->merged_width);
    net->head_count = (uint32_t)src->n_head;
    if ((rc = build_layers(b, src->head, src->n_head, &net->head, &net->max_width)) != 0)
        return rc;
    net->out_dim = src->n_head ? src->head[src->n_head - 1]->out_dim : net->merged_width;
    return 0;
}

/* The distinct state features B reads, in order of first appearance. */
static int build_b_features(struct veer_bundle *b, const Veer__Bundle__Model *m)
{
    uint32_t *list = veer__bundle_alloc(b, m->state_dim * sizeof *list);
    unsigned char *seen = veer__calloc(m->state_dim, 1);
    if (list == NULL || seen == NULL) {
        veer__free(seen);
        return VEER_ENOMEM;
    }
    uint32_t n = 0;
    for (size_t bi = 0; bi < m->backward->n_branches; bi++) {
        const Veer__Bundle__Branch *br = m->backward->branches[bi];
        for (size_t i = 0; i < br->n_inputs; i++) {
            const Veer__Bundle__Input *in = br->inputs[i];
            size_t count = in->n_features ? in->n_features : m->state_dim;
            for (size_t j = 0; j < count; j++) {
                uint32_t f = in->n_features ? in->features[j] : (uint32_t)j;
                if (!seen[f]) {
                    seen[f] = 1;
                    list[n++] = f;
                }
            }
        }
    }
    veer__free(seen);
    b->info.b_features = list;
    b->info.b_feature_count = n;
    return 0;
}

/* (cov + ridge I)^-1 through its Cholesky factor; ESINGULAR when not positive definite. */
static int build_precision(struct veer_bundle *b, const Veer__Bundle__StateStats *st, uint32_t n,
                           veer_error *err)
{
    size_t nn = (size_t)n * n;
    double *a = veer__malloc(nn * sizeof *a);
    float *p = veer__bundle_alloc(b, nn * sizeof *p);
    if (a == NULL || p == NULL) {
        veer__free(a);
        return veer__error_set(err, VEER_ENOMEM, "stats.cov", NULL);
    }
    for (size_t i = 0; i < nn; i++)
        a[i] = st->cov[i];
    for (uint32_t i = 0; i < n; i++)
        a[(size_t)i * n + i] += st->cov_ridge;
    lapack_int info = LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', (lapack_int)n, a, (lapack_int)n);
    if (info == 0)
        info = LAPACKE_dpotri(LAPACK_ROW_MAJOR, 'L', (lapack_int)n, a, (lapack_int)n);
    if (info != 0) {
        veer__free(a);
        if (info > 0)
            return veer__error_set(err, VEER_ESINGULAR, "stats.cov",
                                   "stats.cov + cov_ridge I is not positive definite (pivot %d); "
                                   "raise stats.cov_ridge",
                                   (int)info);
        return veer__error_set(err, VEER_ENOMEM, "stats.cov", "LAPACK failed (%d)", (int)info);
    }
    for (uint32_t i = 0; i < n; i++)
        for (uint32_t j = 0; j <= i; j++) {
            float v = (float)a[(size_t)i * n + j];
            p[(size_t)i * n + j] = v;
            p[(size_t)j * n + i] = v;
        }
    veer__free(a);
    if (!veer__k_all_finite(nn, p))
        return veer__error_set(err, VEER_ESINGULAR, "stats.cov",
                               "the precision matrix overflows a float; raise stats.cov_ridge");
    b->info.state_precision = p;
    return 0;
}

static int build_info(struct veer_bundle *b, const Veer__Bundle__Model *m, veer_error *err)
{
    veer_model_info *info = &b->info;
    const Veer__Bundle__ActionSpace *as = m->action;
    int rc, failed = 0;
    info->digest = b->digest;
    info->state_dim = m->state_dim;
    info->z_dim = m->z_dim;
    info->discount = m->discount;
    info->decision_step_s = m->decision_step_s;
    if (copy_str(b, m->model_version, &info->model_version) != 0)
        return VEER_ENOMEM;
    const char **names = veer__bundle_alloc(b, m->n_feature_names * sizeof *names);
    if (names == NULL)
        return VEER_ENOMEM;
    for (size_t i = 0; i < m->n_feature_names; i++)
        if (copy_str(b, m->feature_names[i], &names[i]) != 0)
            return VEER_ENOMEM;
    info->feature_names = names;

    if (as->kind == VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS) {
        info->action_kind = VEER_ACTION_CONTINUOUS;
        info->action_dim = as->dim;
        info->action_count = 0;
        info->action_low = copy_bytes(b, as->low, as->n_low * sizeof *as->low, &failed);
        info->action_high = copy_bytes(b, as->high, as->n_high * sizeof *as->high, &failed);
    } else {
        info->action_kind = VEER_ACTION_DISCRETE;
        info->action_dim = 1;
        info->action_count = as->count;
        float *idx = veer__bundle_alloc(b, as->count * sizeof *idx);
        if (idx == NULL)
            return VEER_ENOMEM;
        for (uint32_t i = 0; i < as->count; i++)
            idx[i] = (float)i;
        b->action_index = idx;
    }
    info->fallback_action = copy_bytes(b, m->fallback_action,
                                       m->n_fallback_action * sizeof *m->fallback_action, &failed);
    if (failed)
        return VEER_ENOMEM;
    if ((rc = build_b_features(b, m)) != 0)
        return rc;

    const Veer__Bundle__TaskDefaults *td = m->task_defaults;
    info->rescale = td ? td->rescale : 0;
    info->rescale_norm = td && td->rescale_norm > 0.0f ? td->rescale_norm : sqrtf((float)m->z_dim);
    info->center_rewards = td ? td->center_rewards : 0;
    info->ridge = td ? td->ridge : 0.0f;

    const Veer__Bundle__StateStats *st = m->stats;
    if (st != NULL) {
        info->has_stats = 1;
        info->stats_count = st->count;
        info->cov_ridge = st->cov_ridge;
        info->bins = st->bins;
        info->mahalanobis_p99 = st->mahalanobis_p99;
        info->mahalanobis_p999 = st->mahalanobis_p999;
        info->state_mean = copy_bytes(b, st->mean, st->n_mean * sizeof *st->mean, &failed);
        info->state_cov = copy_bytes(b, st->cov, st->n_cov * sizeof *st->cov, &failed);
        info->quantile_edges = copy_bytes(
            b, st->quantile_edges, st->n_quantile_edges * sizeof *st->quantile_edges, &failed);
        if (failed)
            return VEER_ENOMEM;
        if ((rc = build_precision(b, st, m->state_dim, err)) != 0)
            return rc;
    }
    if (m->reference != NULL && m->reference->count > 0) {
        info->reference_count = m->reference->count;
        const Veer__Bundle__ReferenceSet *ref = m->reference;
        info->reference_states =
            copy_bytes(b, ref->states, ref->n_states * sizeof *ref->states, &failed);
        info->reference_b = copy_bytes(b, ref->b, ref->n_b * sizeof *ref->b, &failed);
    }
    info->cov_b = copy_bytes(b, m->cov_b, m->n_cov_b * sizeof *m->cov_b, &failed);
    if (failed)
        return VEER_ENOMEM;

    const Veer__Bundle__Provenance *pv = m->provenance;
    if (copy_str(b, pv ? pv->producer : "", &info->producer) != 0 ||
        copy_str(b, pv ? pv->created : "", &info->created) != 0 ||
        copy_str(b, pv ? pv->source_digest : "", &info->source_digest) != 0 ||
        copy_str(b, pv ? pv->settings : "", &info->settings) != 0 ||
        copy_str(b, pv ? pv->notes : "", &info->notes) != 0)
        return VEER_ENOMEM;
    return 0;
}

/* Appends to the bundle's index checks the state features that `net`'s embeddings read. The
 * checker put every embedding first in a branch of index inputs, so input column j of such a
 * branch is index j of the embedding. */
static void collect_index_checks(struct veer_bundle *b, const Veer__Bundle__Network *net,
                                 uint32_t state_dim)
{
    for (size_t bi = 0; net != NULL && bi < net->n_branches; bi++) {
        const Veer__Bundle__Branch *br = net->branches[bi];
        if (br->n_layers == 0 || br->layers[0]->kind != VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING)
            continue;
        const uint32_t *counts = br->layers[0]->counts;
        size_t col = 0;
        for (size_t i = 0; i < br->n_inputs; i++) {
            const Veer__Bundle__Input *in = br->inputs[i];
            if (in->kind != VEER__BUNDLE__INPUT_KIND__INPUT_STATE) {
                col++; /* the action as_index: always valid, made by the runtime */
                continue;
            }
            size_t nf = in->n_features ? in->n_features : state_dim;
            for (size_t j = 0; j < nf; j++, col++) {
                b->index_features[b->index_check_count] =
                    in->n_features ? in->features[j] : (uint32_t)j;
                b->index_counts[b->index_check_count++] = counts[col];
            }
        }
    }
}

static size_t embedding_inputs(const Veer__Bundle__Network *net)
{
    size_t n = 0;
    for (size_t bi = 0; net != NULL && bi < net->n_branches; bi++) {
        const Veer__Bundle__Branch *br = net->branches[bi];
        if (br->n_layers > 0 && br->layers[0]->kind == VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING)
            n += br->layers[0]->in_dim;
    }
    return n;
}

int veer__bundle_build(struct veer_bundle *b, const Veer__Bundle__Model *m, veer_error *err)
{
    int rc = build_info(b, m, err);
    if (rc == 0)
        rc = build_net(b, m->forward, m, &b->forward);
    if (rc == 0)
        rc = build_net(b, m->backward, m, &b->backward);
    if (rc == 0 && m->actor != NULL) {
        rc = build_net(b, m->actor, m, &b->actor);
        b->has_actor = 1;
    }
    b->actor_normalized = m->actor_normalized;
    size_t checks = embedding_inputs(m->forward) + embedding_inputs(m->actor);
    if (rc == 0 && checks > 0) {
        b->index_features = veer__bundle_alloc(b, checks * sizeof *b->index_features);
        b->index_counts = veer__bundle_alloc(b, checks * sizeof *b->index_counts);
        if (b->index_features == NULL || b->index_counts == NULL)
            rc = VEER_ENOMEM;
        else {
            collect_index_checks(b, m->forward, m->state_dim);
            collect_index_checks(b, m->actor, m->state_dim);
        }
    }
    if (rc == VEER_ENOMEM && (err == NULL || err->code != VEER_ENOMEM))
        veer__error_set(err, rc, "bundle", "no memory for the model's %zu bytes so far", b->memory);
    return rc;
}
