/* Writing the trained model as a bundle (proto/veer_bundle.proto) with protobuf-c and the
 * runtime's writer (veer__bundle_write_model: checksum, framing, atomic rename).
 *
 * Networks are exported as trained, layer for layer. The one rewrite: two F heads become one
 * network whose branches are the two heads' hidden stacks, concatenated, and whose head is a
 * single linear layer ½[W₁ W₂] with bias ½(b₁ + b₂), which is exactly the average of the two
 * heads' outputs, the F the trainer's targets used. The bundle also carries the drift
 * statistics, the reference set with its B embeddings, and E[BBᵀ] over the log's next states
 * (the distribution B was trained against). Every protobuf object is allocated from one arena
 * released at the end, so error paths cannot leak pieces of the message. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "base/base.h"
#include "runtime/bundle_io.h"
#include "train/stats.h"
#include "train/train.h"
#include "veer_bundle.pb-c.h"

typedef struct arena {
    void **ptrs;
    size_t n, cap;
    int oom;
} arena;

static void *ar_alloc(arena *a, size_t size)
{
    if (a->oom)
        return NULL;
    if (a->n == a->cap) {
        size_t cap = a->cap ? 2 * a->cap : 64;
        void **p = veer__realloc(a->ptrs, cap * sizeof *p);
        if (p == NULL) {
            a->oom = 1;
            return NULL;
        }
        a->ptrs = p;
        a->cap = cap;
    }
    void *p = veer__calloc(1, size ? size : 1);
    if (p == NULL) {
        a->oom = 1;
        return NULL;
    }
    a->ptrs[a->n++] = p;
    return p;
}

static void ar_free(arena *a)
{
    for (size_t i = 0; i < a->n; i++)
        veer__free(a->ptrs[i]);
    veer__free(a->ptrs);
}

static Veer__Bundle__Layer *layer_msg(arena *ar, const veer__nn *nn, const veer__nn_layer *l)
{
    Veer__Bundle__Layer *m = ar_alloc(ar, sizeof *m);
    if (m == NULL)
        return NULL;
    veer__bundle__layer__init(m);
    m->kind = (Veer__Bundle__LayerKind)l->kind;
    m->in_dim = l->in;
    m->out_dim = l->out;
    m->n_weight = l->nw;
    m->weight = (float *)(nn->params + l->w_off);
    m->n_bias = l->nb;
    m->bias = (float *)(nn->params + l->b_off);
    if (l->kind == VEER_NN_LAYER_NORM)
        m->eps = l->eps;
    if (l->kind == VEER_NN_RESCALE_NORM)
        m->norm = l->norm;
    if (l->kind == VEER_NN_EMBEDDING) {
        m->n_counts = l->ncounts;
        m->counts = (uint32_t *)l->counts;
    }
    return m;
}

/* A branch of `nn`, with its first `nlayers` layers. */
static Veer__Bundle__Branch *branch_msg(arena *ar, const veer__nn *nn, const veer__nn_chain *c,
                                        uint32_t nlayers)
{
    Veer__Bundle__Branch *b = ar_alloc(ar, sizeof *b);
    if (b == NULL)
        return NULL;
    veer__bundle__branch__init(b);
    b->name = (char *)c->name;
    b->n_inputs = c->ninputs;
    b->inputs = ar_alloc(ar, c->ninputs * sizeof *b->inputs);
    for (uint32_t i = 0; b->inputs && i < c->ninputs; i++) {
        Veer__Bundle__Input *in = ar_alloc(ar, sizeof *in);
        if (in == NULL)
            return NULL;
        veer__bundle__input__init(in);
        in->kind = (Veer__Bundle__InputKind)c->inputs[i].kind;
        in->n_features = c->inputs[i].nfeat;
        in->features = c->inputs[i].features;
        in->as_index = c->inputs[i].as_index;
        b->inputs[i] = in;
    }
    b->n_layers = nlayers;
    b->layers = ar_alloc(ar, nlayers * sizeof *b->layers);
    for (uint32_t i = 0; b->layers && i < nlayers; i++)
        if ((b->layers[i] = layer_msg(ar, nn, &c->layers[i])) == NULL)
            return NULL;
    return ar->oom ? NULL : b;
}

static Veer__Bundle__Network *net_msg(arena *ar, const veer__nn *nn)
{
    Veer__Bundle__Network *m = ar_alloc(ar, sizeof *m);
    if (m == NULL)
        return NULL;
    veer__bundle__network__init(m);
    m->n_branches = nn->nbranches;
    m->branches = ar_alloc(ar, nn->nbranches * sizeof *m->branches);
    for (uint32_t b = 0; m->branches && b < nn->nbranches; b++)
        m->branches[b] = branch_msg(ar, nn, &nn->branch[b], nn->branch[b].nlayers);
    m->merge = (Veer__Bundle__MergeKind)nn->merge;
    m->bilinear_k = nn->merge == VEER_NN_BILINEAR ? nn->bilinear_k : 0;
    m->matrix_branch = nn->matrix_branch;
    m->bilinear_bias = nn->bilinear_bias;
    m->n_head = nn->head.nlayers;
    m->head = ar_alloc(ar, nn->head.nlayers * sizeof *m->head);
    for (uint32_t i = 0; m->head && i < nn->head.nlayers; i++)
        m->head[i] = layer_msg(ar, nn, &nn->head.layers[i]);
    return ar->oom ? NULL : m;
}

/* Two single-branch heads ending in a linear layer -> one network computing their average. */
static Veer__Bundle__Network *averaged_msg(arena *ar, const veer__nn *f1, const veer__nn *f2)
{
    const veer__nn_chain *c1 = &f1->branch[0], *c2 = &f2->branch[0];
    const veer__nn_layer *l1 = &c1->layers[c1->nlayers - 1], *l2 = &c2->layers[c2->nlayers - 1];
    Veer__Bundle__Network *m = ar_alloc(ar, sizeof *m);
    Veer__Bundle__Layer *lin = ar_alloc(ar, sizeof *lin);
    if (m == NULL || lin == NULL)
        return NULL;
    veer__bundle__network__init(m);
    m->n_branches = 2;
    m->branches = ar_alloc(ar, 2 * sizeof *m->branches);
    if (m->branches == NULL)
        return NULL;
    m->branches[0] = branch_msg(ar, f1, c1, c1->nlayers - 1);
    m->branches[1] = branch_msg(ar, f2, c2, c2->nlayers - 1);
    if (m->branches[0] == NULL || m->branches[1] == NULL)
        return NULL;
    m->branches[0]->name = "first-head";
    m->branches[1]->name = "second-head";
    m->merge = VEER__BUNDLE__MERGE_KIND__MERGE_CONCAT;
    veer__bundle__layer__init(lin);
    uint32_t in1 = l1->in, in2 = l2->in, out = l1->out;
    lin->kind = VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR;
    lin->in_dim = in1 + in2;
    lin->out_dim = out;
    lin->n_weight = (size_t)out * (in1 + in2);
    lin->weight = ar_alloc(ar, lin->n_weight * sizeof(float));
    lin->n_bias = out;
    lin->bias = ar_alloc(ar, out * sizeof(float));
    if (lin->weight == NULL || lin->bias == NULL)
        return NULL;
    const float *w1 = f1->params + l1->w_off, *w2 = f2->params + l2->w_off;
    const float *b1 = f1->params + l1->b_off, *b2 = f2->params + l2->b_off;
    for (uint32_t o = 0; o < out; o++) {
        for (uint32_t i = 0; i < in1; i++)
            lin->weight[(size_t)o * (in1 + in2) + i] = 0.5f * w1[(size_t)o * in1 + i];
        for (uint32_t i = 0; i < in2; i++)
            lin->weight[(size_t)o * (in1 + in2) + in1 + i] = 0.5f * w2[(size_t)o * in2 + i];
        lin->bias[o] = 0.5f * (b1[o] + b2[o]);
    }
    m->n_head = 1;
    m->head = ar_alloc(ar, sizeof *m->head);
    if (m->head == NULL)
        return NULL;
    m->head[0] = lin;
    return ar->oom ? NULL : m;
}

/* B over `count` rows of `states`, in batches, into out (count x d). */
/* Two heads with branches and a head chain (--arch split) -> one network computing their
 * average: the branches of both side by side, so the merge is [first's, second's]; every head
 * layer but the last block-diagonal (linear) or over both halves (element-wise); the last
 * linear ½[W₁ W₂] with bias ½(b₁ + b₂). The zero blocks cost the runtime twice the head's
 * multiply-adds; F only gives the value reported beside a continuous action. */
static Veer__Bundle__Network *averaged_head_msg(arena *ar, const veer__nn *f1, const veer__nn *f2)
{
    Veer__Bundle__Network *m = ar_alloc(ar, sizeof *m);
    if (m == NULL)
        return NULL;
    veer__bundle__network__init(m);
    uint32_t nb = f1->nbranches + f2->nbranches, nh = f1->head.nlayers;
    m->n_branches = nb;
    m->branches = ar_alloc(ar, nb * sizeof *m->branches);
    m->n_head = nh;
    m->head = ar_alloc(ar, nh * sizeof *m->head);
    if (m->branches == NULL || m->head == NULL)
        return NULL;
    for (uint32_t b = 0; b < nb; b++) {
        const veer__nn *f = b < f1->nbranches ? f1 : f2;
        const veer__nn_chain *c = &f->branch[b < f1->nbranches ? b : b - f1->nbranches];
        if ((m->branches[b] = branch_msg(ar, f, c, c->nlayers)) == NULL)
            return NULL;
    }
    m->merge = VEER__BUNDLE__MERGE_KIND__MERGE_CONCAT;
    for (uint32_t i = 0; i < nh; i++) {
        const veer__nn_layer *l1 = &f1->head.layers[i], *l2 = &f2->head.layers[i];
        Veer__Bundle__Layer *lm = ar_alloc(ar, sizeof *lm);
        if (lm == NULL)
            return NULL;
        veer__bundle__layer__init(lm);
        lm->kind = (Veer__Bundle__LayerKind)l1->kind;
        uint32_t i1 = l1->in, i2 = l2->in, o1 = l1->out, o2 = l2->out;
        const float *w1 = f1->params + l1->w_off, *w2 = f2->params + l2->w_off;
        const float *b1 = f1->params + l1->b_off, *b2 = f2->params + l2->b_off;
        int last = i + 1 == nh;
        lm->in_dim = i1 + i2;
        lm->out_dim = last ? o1 : o1 + o2;
        if (l1->kind != VEER_NN_LINEAR) { /* element-wise: ReLU */
            m->head[i] = lm;
            continue;
        }
        lm->n_weight = (size_t)lm->out_dim * lm->in_dim;
        lm->weight = ar_alloc(ar, lm->n_weight * sizeof(float));
        lm->n_bias = lm->out_dim;
        lm->bias = ar_alloc(ar, lm->n_bias * sizeof(float));
        if (lm->weight == NULL || lm->bias == NULL)
            return NULL;
        float *w = lm->weight;
        size_t in = lm->in_dim;
        for (uint32_t o = 0; o < o1; o++) {
            float s = last ? 0.5f : 1.0f;
            for (uint32_t k = 0; k < i1; k++)
                w[(size_t)o * in + k] = s * w1[(size_t)o * i1 + k];
            if (last)
                for (uint32_t k = 0; k < i2; k++)
                    w[(size_t)o * in + i1 + k] = s * w2[(size_t)o * i2 + k];
            lm->bias[o] = last ? 0.5f * (b1[o] + b2[o]) : b1[o];
        }
        for (uint32_t o = 0; !last && o < o2; o++) {
            for (uint32_t k = 0; k < i2; k++)
                w[(size_t)(o1 + o) * in + i1 + k] = w2[(size_t)o * i2 + k];
            lm->bias[o1 + o] = b2[o];
        }
        m->head[i] = lm;
    }
    return ar->oom ? NULL : m;
}

static int b_of(const veer__trainer *t, veer__nn *b, const float *states, size_t count, float *out)
{
    size_t D = t->log->state_dim, d = t->d;
    for (size_t at = 0; at < count; at += t->n) {
        size_t m = count - at < t->n ? count - at : t->n;
        const float *y;
        int rc = veer__nn_forward(b, m, states + at * D, NULL, NULL, &y);
        if (rc != 0)
            return rc;
        memcpy(out + at * d, y, m * d * sizeof(float));
    }
    return 0;
}

int veer__train_export(const veer__trainer *t, const char *path, const char *settings,
                       const char *created, veer_error *err)
{
    const veer_train_config *c = &t->cfg;
    const veer__tlog *log = t->log;
    size_t D = log->state_dim, d = t->d, N = log->n;
    arena ar = {0};
    veer__tstats st = {0};
    veer__nn *f[VEER_TRAIN_MAX_HEADS] = {NULL}, *b = NULL, *actor = NULL;
    veer__nn *folded[VEER_TRAIN_MAX_HEADS + 2] = {NULL};
    int rc = veer__tstats_compute(log->states, N, (uint32_t)D, 10, &st, err);
    if (rc != 0)
        return rc;
    /* The networks; with --input-norm, copies with the standardisation folded into their first
     * layers, so that the bundle, its reference B and Cov(B) all take raw states. */
    veer__trainer_outputs(t, f, &b, &actor);
    if (t->in_mean) {
        veer__nn **nets[VEER_TRAIN_MAX_HEADS + 2] = {&b, &actor, &f[0], &f[1]};
        for (uint32_t i = 0; i < 2 + t->heads; i++) {
            if (*nets[i] == NULL)
                continue;
            if (veer__nn_clone(*nets[i], &folded[i]) != 0) {
                rc = veer__error_set(err, VEER_ENOMEM, "bundle", "no memory to fold --input-norm");
                goto done;
            }
            if (veer__nn_fold_state_affine(folded[i], t->in_mean, t->in_scale) != 0) {
                rc = veer__error_set(err, VEER_EINVAL, "--input-norm",
                                     "a network reads the state through a non-linear first layer");
                goto done;
            }
            *nets[i] = folded[i];
        }
    }

    Veer__Bundle__Model *m = ar_alloc(&ar, sizeof *m);
    Veer__Bundle__ActionSpace *as = ar_alloc(&ar, sizeof *as);
    Veer__Bundle__TaskDefaults *td = ar_alloc(&ar, sizeof *td);
    Veer__Bundle__StateStats *ss = ar_alloc(&ar, sizeof *ss);
    Veer__Bundle__ReferenceSet *ref = ar_alloc(&ar, sizeof *ref);
    Veer__Bundle__Provenance *pv = ar_alloc(&ar, sizeof *pv);
    if (ar.oom)
        goto oom;
    veer__bundle__model__init(m);
    veer__bundle__action_space__init(as);
    veer__bundle__task_defaults__init(td);
    veer__bundle__state_stats__init(ss);
    veer__bundle__reference_set__init(ref);
    veer__bundle__provenance__init(pv);

    char version[64];
    snprintf(version, sizeof version, "fb-%.20s", created);
    m->model_version = (char *)(c->model_version ? c->model_version : version);
    m->state_dim = (uint32_t)D;
    m->z_dim = (uint32_t)d;
    m->discount = c->discount;
    m->decision_step_s = c->decision_step_s;
    m->n_feature_names = D;
    m->feature_names = ar_alloc(&ar, D * sizeof(char *));
    if (m->feature_names == NULL)
        goto oom;
    for (size_t i = 0; i < D; i++) {
        if (c->feature_names) {
            m->feature_names[i] = c->feature_names[i];
        } else {
            char *s = ar_alloc(&ar, 24);
            if (s == NULL)
                goto oom;
            snprintf(s, 24, "f%zu", i);
            m->feature_names[i] = s;
        }
    }

    m->action = as;
    float fallback[VEER_TRAIN_MAX_ACTION_DIM];
    if (c->action_count) {
        as->kind = VEER__BUNDLE__ACTION_KIND__ACTION_DISCRETE;
        as->dim = 1;
        as->count = c->action_count;
        fallback[0] = c->have_fallback ? c->fallback[0] : 0.0f;
    } else {
        as->kind = VEER__BUNDLE__ACTION_KIND__ACTION_CONTINUOUS;
        as->dim = log->action_dim;
        as->n_low = as->n_high = log->action_dim;
        as->low = (float *)c->low;
        as->high = (float *)c->high;
        for (uint32_t j = 0; j < log->action_dim; j++)
            fallback[j] = c->have_fallback ? c->fallback[j] : t->act_center[j];
    }
    m->n_fallback_action = as->dim;
    m->fallback_action = fallback;

    /* Task defaults: rescale to sqrt(d) (published practice); no centring; a ridge of 1e-3 for
     * the covariance correction, small beside Cov(B) ≈ I (our choice). */
    td->rescale = 1;
    td->rescale_norm = 0.0f;
    td->center_rewards = 0;
    td->ridge = 1e-3f;
    m->task_defaults = td;

    m->forward = t->heads == 1             ? net_msg(&ar, f[0])
                 : f[0]->head.nlayers == 0 ? averaged_msg(&ar, f[0], f[1])
                                           : averaged_head_msg(&ar, f[0], f[1]);
    m->backward = net_msg(&ar, b);
    if (actor) {
        m->actor = net_msg(&ar, actor);
        m->actor_normalized = 1;
    }
    if (ar.oom || !m->forward || !m->backward || (actor && !m->actor))
        goto oom;

    ss->count = st.count;
    ss->n_mean = D;
    ss->mean = st.mean;
    ss->n_cov = D * D;
    ss->cov = st.cov;
    ss->cov_ridge = st.cov_ridge;
    ss->bins = st.bins;
    ss->n_quantile_edges = D * (st.bins - 1);
    ss->quantile_edges = st.quantile_edges;
    ss->mahalanobis_p99 = st.p99;
    ss->mahalanobis_p999 = st.p999;
    m->stats = ss;

    /* Reference set: ref_count distinct states drawn with their own generator (so the choice
     * does not depend on how long training ran), and their B. */
    size_t R = c->ref_count < N ? c->ref_count : N;
    size_t *perm = ar_alloc(&ar, N * sizeof *perm);
    float *rs = ar_alloc(&ar, R * D * sizeof(float)), *rb = ar_alloc(&ar, R * d * sizeof(float));
    float *cb = ar_alloc(&ar, d * d * sizeof(float));
    double *cbd = ar_alloc(&ar, d * d * sizeof(double));
    float *chunk = ar_alloc(&ar, t->n * d * sizeof(float));
    if (ar.oom)
        goto oom;
    veer__rng rr;
    veer__rng_init(&rr, c->rng_key ^ 0xA5A5A5A5ull);
    for (size_t i = 0; i < N; i++)
        perm[i] = i;
    for (size_t i = 0; i < R; i++) {
        size_t j = i + (size_t)veer__rng_below(&rr, N - i), tmp = perm[i];
        perm[i] = perm[j];
        perm[j] = tmp;
        memcpy(rs + i * D, log->states + perm[i] * D, D * sizeof(float));
    }
    if ((rc = b_of(t, b, rs, R, rb)) != 0) {
        veer__error_set(err, rc, "reference", "B failed on the reference states");
        goto done;
    }
    ref->count = (uint32_t)R;
    ref->n_states = R * D;
    ref->states = rs;
    ref->n_b = R * d;
    ref->b = rb;
    m->reference = ref;

    /* Cov(B) = E[B Bᵀ] over every next state of the log. */
    for (size_t at = 0; at < N; at += t->n) {
        size_t k = N - at < t->n ? N - at : t->n;
        if ((rc = b_of(t, b, log->next_states + at * D, k, chunk)) != 0) {
            veer__error_set(err, rc, "cov_b", "B failed on the log's next states");
            goto done;
        }
        for (size_t r = 0; r < k; r++)
            for (size_t i = 0; i < d; i++)
                for (size_t j = 0; j < d; j++)
                    cbd[i * d + j] += (double)chunk[r * d + i] * chunk[r * d + j];
    }
    for (size_t i = 0; i < d * d; i++)
        cb[i] = (float)(cbd[i] / (double)N);
    for (size_t i = 0; i < d; i++) /* exactly symmetric, as the loader checks */
        for (size_t j = i + 1; j < d; j++)
            cb[j * d + i] = cb[i * d + j];
    m->n_cov_b = d * d;
    m->cov_b = cb;

    char notes[128];
    snprintf(notes, sizeof notes, "%llu training steps", (unsigned long long)t->step);
    pv->producer = "veer-train 0.1";
    pv->created = (char *)created;
    pv->source_digest = (char *)log->digest;
    pv->settings = (char *)settings;
    pv->notes = notes;
    m->provenance = pv;

    rc = veer__bundle_write_model(m, path, err);
    goto done;
oom:
    rc = veer__error_set(err, VEER_ENOMEM, "bundle", "no memory to assemble the bundle");
done:
    ar_free(&ar);
    veer__tstats_free(&st);
    for (size_t i = 0; i < sizeof folded / sizeof folded[0]; i++)
        veer__nn_free(folded[i]);
    return rc;
}
