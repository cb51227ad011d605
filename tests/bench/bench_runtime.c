/* bench_runtime: libveer's speed and memory against floors measured in the same run.
 *
 *   bench_runtime SMALL.veer STANDARD.veer [--act-only]   (tests/bench/run_bench_runtime.sh
 *                                                         makes both bundles)
 *
 * Prints, in one run: the OpenBLAS kernel and the CPUs the thread ran on; single-state act
 * latency p50/p99 for each bundle against the floor of the same layers as bare cblas calls;
 * task encoding from 5,000 and 50,000 samples against the bare sgemm floor of B; and resident
 * memory after loading the STANDARD bundle against its weights plus 16 MiB. Targets (issue 2):
 * act <= 1.2x floor, encoding <= 1.2x floor, RSS <= 1.2x weights + 16 MiB.
 *
 * The floors are read from the bundle itself (decoded here with protobuf-c), so they always
 * have the shapes of the model being measured:
 *   act      every linear layer of F as one cblas call with the rows veer must compute: a
 *            branch that reads the action runs once per action (sgemm, action_count rows), one
 *            that does not runs once (sgemv), the head runs per action; then Q = F z (sgemv).
 *            A first layer's columns that a state's action rows share (the state and z, the
 *            outputs of branches that do not read the action) count once, not once per action
 *            (src/runtime/net_repeat.h), and a one-hot action's columns count nothing.
 *            Continuous bundles: the actor's layers (sgemv) plus F at the chosen action.
 *            No activations, no layer norm, no input assembly, no argmax: a true lower bound.
 *   encode   every linear layer of B as sgemm over all samples, in the row-block size (256,
 *            1024 or 4096 rows) that is fastest in this run.
 * veer and its floor are timed in alternating rounds, so a burst of load from other users of
 * the machine hits both alike. This is a measurement, not a test: it asserts nothing and
 * always exits 0 after printing (2 on bad arguments or an unreadable bundle).
 */
#define _GNU_SOURCE
#include <cblas.h>
#include <math.h>
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "runtime/bundle_io.h"
#include "veer/runtime.h"
#include "splitmix.h"

#define MIB (1024.0 * 1024.0)

/* ---- small utilities ----------------------------------------------------------------- */

static long rss_kib(void)
{
    FILE *f = fopen("/proc/self/status", "r");
    char line[256];
    long kib = -1;
    while (f != NULL && fgets(line, sizeof line, f) != NULL)
        if (sscanf(line, "VmRSS: %ld kB", &kib) == 1)
            break;
    if (f != NULL)
        fclose(f);
    return kib;
}

static void load_average(char *out, size_t len)
{
    FILE *f = fopen("/proc/loadavg", "r");
    out[0] = '\0';
    if (f != NULL) {
        if (fgets(out, (int)len, f) == NULL)
            out[0] = '\0';
        fclose(f);
    }
    out[strcspn(out, "\n")] = '\0';
}

/* This thread's CPU time: against wall time it shows how much of the run other processes took. */
static double thread_cpu_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec / 1e9;
}

static uint64_t rng_state = 0x9e3779b97f4a7c15ull;

/* Uniform in [-1, 1): splitmix64, so every run draws the same inputs. */
static float uniform(void)
{
    uint64_t z = bench_splitmix64(&rng_state);
    return (float)((double)(z >> 40) / (double)(1ull << 23)) - 1.0f;
}

static float *random_floats(size_t n)
{
    float *a = malloc(sizeof(float) * (n ? n : 1));
    if (a == NULL) {
        fprintf(stderr, "bench_runtime: out of memory\n");
        exit(2);
    }
    for (size_t i = 0; i < n; i++)
        a[i] = uniform();
    return a;
}

static int cmp_u64(const void *a, const void *b)
{
    uint64_t x = *(const uint64_t *)a, y = *(const uint64_t *)b;
    return x < y ? -1 : x > y;
}

static double percentile_us(uint64_t *ns, size_t n, double p)
{
    qsort(ns, n, sizeof *ns, cmp_u64);
    size_t k = (size_t)ceil(p * (double)n) - 1;
    return (double)ns[k < n ? k : n - 1] / 1e3;
}

static double median(double *v, size_t n)
{
    for (size_t i = 1; i < n; i++)
        for (size_t j = i; j > 0 && v[j - 1] > v[j]; j--) {
            double t = v[j];
            v[j] = v[j - 1];
            v[j - 1] = t;
        }
    return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

/* The CPUs this thread was seen on, as a bit mask (sampled at every timed call). */
static uint64_t cpus_seen;

static void note_cpu(void)
{
    int c = sched_getcpu();
    if (c >= 0 && c < 64)
        cpus_seen |= 1ull << c;
}

/* ---- the bundle, decoded for its shapes and weights ----------------------------------- */

typedef struct model_file {
    uint8_t *data;
    size_t len;
    Veer__Bundle__BundleFile *frame;
    Veer__Bundle__Model *model;
} model_file;

static int model_file_read(const char *path, model_file *mf)
{
    memset(mf, 0, sizeof *mf);
    FILE *f = fopen(path, "rb");
    if (f == NULL)
        return -1;
    fseek(f, 0, SEEK_END);
    long len = ftell(f);
    fseek(f, 0, SEEK_SET);
    mf->data = malloc(len > 0 ? (size_t)len : 1);
    if (mf->data == NULL || len <= VEER__BUNDLE_MAGIC_LEN ||
        fread(mf->data, 1, (size_t)len, f) != (size_t)len) {
        fclose(f);
        return -1;
    }
    fclose(f);
    mf->len = (size_t)len;
    mf->frame = veer__bundle__bundle_file__unpack(NULL, mf->len - VEER__BUNDLE_MAGIC_LEN,
                                                  mf->data + VEER__BUNDLE_MAGIC_LEN);
    if (mf->frame == NULL)
        return -1;
    mf->model = veer__bundle__model__unpack(NULL, mf->frame->payload.len, mf->frame->payload.data);
    return mf->model != NULL ? 0 : -1;
}

static void model_file_free(model_file *mf)
{
    if (mf->model != NULL)
        veer__bundle__model__free_unpacked(mf->model, NULL);
    if (mf->frame != NULL)
        veer__bundle__bundle_file__free_unpacked(mf->frame, NULL);
    free(mf->data);
}

static size_t layers_bytes(Veer__Bundle__Layer **layers, size_t n)
{
    size_t b = 0;
    for (size_t i = 0; i < n; i++)
        b += (layers[i]->n_weight + layers[i]->n_bias) * sizeof(float);
    return b;
}

static size_t network_bytes(const Veer__Bundle__Network *net)
{
    if (net == NULL)
        return 0;
    size_t b = layers_bytes(net->head, net->n_head);
    for (size_t i = 0; i < net->n_branches; i++)
        b += layers_bytes(net->branches[i]->layers, net->branches[i]->n_layers);
    return b;
}

static size_t weights_bytes(const Veer__Bundle__Model *m)
{
    return network_bytes(m->forward) + network_bytes(m->backward) + network_bytes(m->actor);
}

/* ---- floors: a network's linear layers as bare cblas calls ---------------------------- */

typedef struct floor_op {
    const float *w;
    int rows, in, out;
    int ldw;   /* W's row stride: the layer's whole input width when the op is a block of it */
    int trans; /* 1: y = Wᵀx, one row (x has `out` values, y `in`): F's final layer projecting z */
    int per_row; /* 1: one sgemv per row; 0: one sgemm (chosen by timing both, plan_finish) */
} floor_op;

typedef struct floor_plan {
    floor_op ops[64];
    int n_ops;
    float *x, *y; /* ping-pong activations, sized for the widest op */
    size_t cap;
} floor_plan;

static int reads_action(const Veer__Bundle__Branch *br)
{
    for (size_t i = 0; i < br->n_inputs; i++)
        if (br->inputs[i]->kind == VEER__BUNDLE__INPUT_KIND__INPUT_ACTION)
            return 1;
    return 0;
}

static void add_op(floor_plan *p, const float *w, int rows, int in, int out, int ldw)
{
    if (p->n_ops < 64)
        p->ops[p->n_ops++] = (floor_op){.w = w, .rows = rows, .in = in, .out = out, .ldw = ldw};
}

/* The linear layers of `layers` over `rows` rows. When the rows are one state's actions and
 * `shared_in` > 0, the first layer's input has shared_in columns the same in every row (the
 * state, z, outputs of branches that do not read the action) and per_row_in columns that
 * differ: the shared block is one row's product and the rest `rows` rows' (src/runtime/
 * net_repeat.h; a one-hot action block, per_row_in 0, is a column added per row: no product). */
static void plan_layers(floor_plan *p, Veer__Bundle__Layer **layers, size_t n, int rows,
                        int shared_in, int per_row_in)
{
    for (size_t i = 0; i < n; i++) {
        const Veer__Bundle__Layer *l = layers[i];
        if (l->kind != VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR)
            continue;
        int in = (int)l->in_dim, out = (int)l->out_dim;
        if (i == 0 && rows > 1 && shared_in > 0) {
            add_op(p, l->weight, 1, shared_in, out, in);
            if (per_row_in > 0)
                add_op(p, l->weight + shared_in, rows, per_row_in, out, in);
        } else {
            add_op(p, l->weight, rows, in, out, in);
        }
    }
}

/* `action_rows`: rows for branches that read the action and for the head (when any branch
 * does); `state_rows`: rows for the other branches. `onehot`: the action's width in a branch's
 * input when it is a one-hot block (discrete acting), else 0. */
static void plan_network(floor_plan *p, const Veer__Bundle__Network *net, int action_rows,
                         int state_rows, int onehot)
{
    int any_action = 0, shared_out = 0, per_row_out = 0;
    for (size_t i = 0; i < net->n_branches; i++) {
        const Veer__Bundle__Branch *br = net->branches[i];
        int ra = reads_action(br);
        any_action |= ra;
        int shared_in = 0;
        if (ra && onehot > 0 && br->n_layers > 0 &&
            br->layers[0]->kind == VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR)
            shared_in = (int)br->layers[0]->in_dim - onehot;
        plan_layers(p, br->layers, br->n_layers, ra ? action_rows : state_rows, shared_in, 0);
        /* The branch's output width: that of its last linear or embedding layer (the layers
         * after it keep the width). */
        int width = 0;
        for (size_t j = 0; j < br->n_layers; j++)
            if (br->layers[j]->kind == VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR ||
                br->layers[j]->kind == VEER__BUNDLE__LAYER_KIND__LAYER_EMBEDDING)
                width = (int)br->layers[j]->out_dim;
        if (ra)
            per_row_out += width;
        else
            shared_out += width;
    }
    int concat = net->merge != VEER__BUNDLE__MERGE_KIND__MERGE_BILINEAR;
    plan_layers(p, net->head, net->n_head, any_action ? action_rows : state_rows,
                concat && onehot > 0 ? shared_out : 0, per_row_out);
}

static void floor_op_run(const floor_op *op, const float *x, float *y)
{
    if (op->trans) {
        cblas_sgemv(CblasRowMajor, CblasTrans, op->out, op->in, 1.0f, op->w, op->ldw, x, 1, 0.0f, y,
                    1);
    } else if (op->per_row) {
        for (int r = 0; r < op->rows; r++)
            cblas_sgemv(CblasRowMajor, CblasNoTrans, op->out, op->in, 1.0f, op->w, op->ldw,
                        x + (size_t)r * op->in, 1, 0.0f, y + (size_t)r * op->out, 1);
    } else {
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, op->rows, op->out, op->in, 1.0f, x,
                    op->in, op->w, op->ldw, 0.0f, y, op->out);
    }
}

static void plan_finish(floor_plan *p)
{
    size_t cap = 1;
    for (int i = 0; i < p->n_ops; i++) {
        size_t a = (size_t)p->ops[i].rows *
                   (size_t)(p->ops[i].in > p->ops[i].out ? p->ops[i].in : p->ops[i].out);
        if (a > cap)
            cap = a;
    }
    p->cap = cap;
    p->x = random_floats(cap);
    p->y = random_floats(cap);
    /* A few rows can go either way: OpenBLAS's sgemm packs its operands first, which one sgemv
     * per row avoids (src/runtime/kernels.h). The floor takes whichever is faster here, timed
     * now, so that it stays the best the bare library does whatever the runtime chose. */
    for (int i = 0; i < p->n_ops; i++) {
        floor_op *op = &p->ops[i];
        if (op->rows == 1 || op->trans) {
            op->per_row = 1;
            continue;
        }
        uint64_t best[2] = {UINT64_MAX, UINT64_MAX};
        for (int rep = 0; rep < 40; rep++)
            for (int v = 0; v < 2; v++) {
                op->per_row = v;
                uint64_t t0 = veer__now_ns();
                floor_op_run(op, p->x, p->y);
                uint64_t t = veer__now_ns() - t0;
                best[v] = t < best[v] ? t : best[v];
            }
        op->per_row = best[1] < best[0];
    }
}

static void plan_free(floor_plan *p)
{
    free(p->x);
    free(p->y);
}

/* One pass of the floor: every op once, alternating buffers as a network's data would. */
static void floor_run(floor_plan *p)
{
    float *x = p->x, *y = p->y;
    for (int i = 0; i < p->n_ops; i++) {
        floor_op_run(&p->ops[i], x, y);
        float *t = x;
        x = y;
        y = t;
    }
}

/* ---- act latency ------------------------------------------------------------------------ */

/* 1 when the runtime reads F·z as h·(Wᵀz) (veer__net_final_linear in src/runtime/net.h): F's
 * last layer is linear and is the head's, or F has no head and one branch that reads the
 * action. */
static int final_linear(const Veer__Bundle__Network *f)
{
    const Veer__Bundle__Layer *last = NULL;
    if (f->n_head > 0)
        last = f->head[f->n_head - 1];
    else if (f->n_branches == 1 && reads_action(f->branches[0]) && f->branches[0]->n_layers > 0)
        last = f->branches[0]->layers[f->branches[0]->n_layers - 1];
    return last != NULL && last->kind == VEER__BUNDLE__LAYER_KIND__LAYER_LINEAR;
}

typedef struct act_bench {
    veer_workspace *ws;
    const float *states; /* a pool of states to act on */
    int pool;
    int sdim, d, adim, actions;
    int q_width; /* d, or F's final layer's in_dim when z is projected through it */
    const float *z;
    floor_plan floor; /* F's (and the actor's) linear layers */
    float *f_out;     /* actions x q_width, for the floor's Q = F z (or h·(Wᵀz)) */
} act_bench;

static uint64_t time_veer_act(act_bench *a, int i)
{
    float action[16], value;
    uint32_t flags;
    const float *s = a->states + (size_t)(i % a->pool) * a->sdim;
    uint64_t t0 = veer__now_ns();
    veer_act(a->ws, s, a->z, action, &value, &flags);
    return veer__now_ns() - t0;
}

static uint64_t time_floor_act(act_bench *a)
{
    uint64_t t0 = veer__now_ns();
    floor_run(&a->floor);
    cblas_sgemv(CblasRowMajor, CblasNoTrans, a->actions, a->q_width, 1.0f, a->f_out, a->q_width,
                a->floor.x, 1, 0.0f, a->floor.y, 1);
    return veer__now_ns() - t0;
}

static void bench_act(const char *label, const veer_bundle *bundle, const Veer__Bundle__Model *m,
                      const float *z)
{
    const veer_model_info *info = veer_bundle_info(bundle);
    act_bench a;
    memset(&a, 0, sizeof a);
    veer_error err;
    if (veer_workspace_create(bundle, 1, &a.ws, &err) != 0) {
        printf("  %s: workspace: %s\n", label, err.message);
        return;
    }
    a.sdim = (int)info->state_dim;
    a.d = (int)info->z_dim;
    a.z = z;
    a.pool = 64;
    float *states = random_floats((size_t)a.pool * a.sdim);
    a.states = states;
    if (info->action_kind == VEER_ACTION_DISCRETE) {
        a.actions = (int)info->action_count;
        plan_network(&a.floor, m->forward, a.actions, 1, a.actions);
        /* F ending in a linear layer W: veer computes Wᵀz once and h·(Wᵀz) per action
         * (src/runtime/policy.c), so the floor's last op is that projection. */
        a.q_width = a.d;
        if (final_linear(m->forward) && a.floor.n_ops > 0) {
            floor_op *last = &a.floor.ops[a.floor.n_ops - 1];
            last->rows = 1;
            last->trans = 1;
            a.q_width = last->in;
        }
    } else {
        a.actions = 1;
        plan_network(&a.floor, m->actor, 1, 1, 0);
        plan_network(&a.floor, m->forward, 1, 1, 0);
    }
    if (a.q_width == 0)
        a.q_width = a.d;
    plan_finish(&a.floor);
    a.f_out = random_floats((size_t)a.actions * a.q_width);

    /* Warm up both (caches, OpenBLAS's buffers, page faults), then size the rounds so each
     * side gets about 2.5 s, within [400, 20000] calls. */
    uint64_t warm = veer__now_ns();
    int w = 0;
    for (; w < 200 || veer__now_ns() - warm < 300000000ull; w++) {
        time_veer_act(&a, w);
        time_floor_act(&a);
        if (w >= 20000)
            break;
    }
    double per_pair_ns = (double)(veer__now_ns() - warm) / w;
    int total = (int)(5e9 / per_pair_ns);
    total = total < 400 ? 400 : total > 20000 ? 20000 : total;
    int rounds = 20, per_round = (total + rounds - 1) / rounds;
    total = rounds * per_round;

    uint64_t *tv = malloc(sizeof(uint64_t) * total), *tf = malloc(sizeof(uint64_t) * total);
    int k = 0;
    for (int r = 0; r < rounds; r++) {
        for (int i = 0; i < per_round; i++) {
            tv[k + i] = time_veer_act(&a, k + i);
            if ((i & 63) == 0)
                note_cpu();
        }
        for (int i = 0; i < per_round; i++)
            tf[k + i] = time_floor_act(&a);
        k += per_round;
    }
    double v50 = percentile_us(tv, (size_t)total, 0.50),
           v99 = percentile_us(tv, (size_t)total, 0.99);
    double f50 = percentile_us(tf, (size_t)total, 0.50),
           f99 = percentile_us(tf, (size_t)total, 0.99);
    printf("  %-9s veer p50 %9.2f us  p99 %9.2f us | floor p50 %9.2f us  p99 %9.2f us | "
           "ratio p50 %.2fx  p99 %.2fx  (%d calls each, %d linear ops in the floor)\n",
           label, v50, v99, f50, f99, v50 / f50, v99 / f99, total, a.floor.n_ops);
    free(tv);
    free(tf);
    free(states);
    free(a.f_out);
    plan_free(&a.floor);
    veer_workspace_destroy(a.ws);
}

/* ---- acts answered together ------------------------------------------------------------ */

/* What veerd's --act-batch trades: one veer_act_each over n states (a task vector each, as
 * queued acts of different channels have) against n veer_act calls one after the other, both
 * hot (back to back) and cold (after sweeping a buffer larger than the last-level cache, as an
 * act thread finds its caches after the idle part of a 1 ms period). */
#define BATCH_SWEEP_BYTES (64u << 20)

static void sweep(volatile unsigned char *buf)
{
    for (size_t i = 0; i < BATCH_SWEEP_BYTES; i += 64)
        buf[i]++;
}

static void bench_batch(const char *label, const veer_bundle *bundle, const float *z)
{
    const veer_model_info *info = veer_bundle_info(bundle);
    enum { NMAX = 8, CALLS = 400 };
    veer_workspace *ws = NULL;
    veer_error err;
    if (veer_workspace_create(bundle, NMAX, &ws, &err) != 0) {
        printf("  %s: workspace: %s\n", label, err.message);
        return;
    }
    float *states = random_floats((size_t)NMAX * info->state_dim);
    float *zs = malloc(sizeof(float) * NMAX * info->z_dim);
    float *actions = malloc(sizeof(float) * NMAX * info->action_dim);
    float values[NMAX];
    uint32_t flags[NMAX];
    unsigned char *buf = calloc(BATCH_SWEEP_BYTES, 1);
    uint64_t *one = malloc(sizeof(uint64_t) * CALLS), *each = malloc(sizeof(uint64_t) * CALLS);
    for (int i = 0; i < NMAX; i++)
        memcpy(zs + (size_t)i * info->z_dim, z, info->z_dim * sizeof(float));
    static const int sizes[3] = {2, 4, 8};
    for (int cold = 0; cold < 2; cold++) {
        for (int k = 0; k < 3; k++) {
            int n = sizes[k];
            for (int c = 0; c < CALLS; c++) {
                /* Alternating the two ways call by call, so drift of the host falls on both. */
                if (cold)
                    sweep(buf);
                uint64_t t0 = veer__now_ns();
                for (int i = 0; i < n; i++)
                    veer_act(ws, states + (size_t)i * info->state_dim, zs + (size_t)i * info->z_dim,
                             actions + (size_t)i * info->action_dim, &values[i], &flags[i]);
                one[c] = veer__now_ns() - t0;
                if (cold)
                    sweep(buf);
                t0 = veer__now_ns();
                veer_act_each(ws, (size_t)n, states, zs, actions, values, flags);
                each[c] = veer__now_ns() - t0;
            }
            double o50 = percentile_us(one, CALLS, 0.50), e50 = percentile_us(each, CALLS, 0.50);
            printf("  %-9s %s n=%d: %d x veer_act p50 %8.2f us | one veer_act_each p50 %8.2f us | "
                   "ratio %.2f\n",
                   label, cold ? "cold" : "hot ", n, n, o50, e50, e50 / o50);
        }
    }
    free(one);
    free(each);
    free(buf);
    free(states);
    free(zs);
    free(actions);
    veer_workspace_destroy(ws);
}

/* ---- task encoding ------------------------------------------------------------------- */

/* Wall time and this thread's CPU time of one run. On a loaded machine the CPU time leaves
 * out the time other processes held the core, so its ratios are the steadier ones. */
typedef struct run_time {
    double wall, cpu;
} run_time;

static run_time clock_start(void)
{
    return (run_time){(double)veer__now_ns() / 1e9, thread_cpu_s()};
}

static run_time clock_since(run_time t0)
{
    return (run_time){(double)veer__now_ns() / 1e9 - t0.wall, thread_cpu_s() - t0.cpu};
}

/* The floor's input is random: only the shapes matter to sgemm. */
static run_time floor_encode(const Veer__Bundle__Model *m, int n, int block)
{
    floor_plan p;
    memset(&p, 0, sizeof p);
    plan_network(&p, m->backward, block, block, 0);
    plan_finish(&p);
    run_time t0 = clock_start();
    for (int off = 0; off < n; off += block) {
        int rows = n - off < block ? n - off : block;
        for (int i = 0; i < p.n_ops; i++)
            p.ops[i].rows = rows;
        floor_run(&p);
    }
    run_time t = clock_since(t0);
    plan_free(&p);
    return t;
}

static run_time veer_encode(const veer_bundle *bundle, const float *states, const float *r, int n,
                            int with_report, int *rc_out)
{
    veer_task_spec spec;
    veer_task_spec_init(&spec, VEER_TASK_SAMPLES);
    spec.count = (uint32_t)n;
    spec.states = states;
    spec.values = r;
    float z[1024];
    veer_task_report rep;
    run_time t0 = clock_start();
    *rc_out = veer_task_encode(bundle, &spec, z, with_report ? &rep : NULL, NULL);
    return clock_since(t0);
}

#define ENCODE_REPS_MAX 50

static double median_of(const run_time *t, int n, int cpu)
{
    double v[ENCODE_REPS_MAX];
    for (int i = 0; i < n; i++)
        v[i] = cpu ? t[i].cpu : t[i].wall;
    return median(v, (size_t)n);
}

static void bench_encode(const char *label, const veer_bundle *bundle, const Veer__Bundle__Model *m,
                         int n)
{
    const veer_model_info *info = veer_bundle_info(bundle);
    float *states = random_floats((size_t)n * info->state_dim);
    float *r = random_floats((size_t)n);
    static const int blocks[3] = {256, 1024, 4096};

    /* One untimed pass of veer warms caches and OpenBLAS; the floor's row-block size is the
     * fastest of three on (up to) 8,192 rows. Then veer (with and without the R² fit) and the
     * floor alternate, for at least 3 rounds and about 3 s per side. */
    int rc = 0;
    veer_encode(bundle, states, r, n, 1, &rc);
    if (rc != 0) {
        printf("  %-9s n=%-6d encode failed: %s\n", label, n, veer_strerror(rc));
        goto out;
    }
    int block = blocks[0];
    double best = 1e30;
    for (int b = 0; b < 3; b++) {
        double t = floor_encode(m, n < 8192 ? n : 8192, blocks[b]).cpu;
        if (t < best) {
            best = t;
            block = blocks[b];
        }
    }
    double probe = floor_encode(m, n, block).wall;
    int reps = (int)(3.0 / (probe > 1e-4 ? probe : 1e-4));
    reps = reps < 3 ? 3 : reps > ENCODE_REPS_MAX ? ENCODE_REPS_MAX : reps;
    run_time tv[ENCODE_REPS_MAX], tn[ENCODE_REPS_MAX], tf[ENCODE_REPS_MAX];
    /* The order rotates from round to round, so no side always runs on caches the previous
     * one left cold. */
    for (int k = 0; k < reps; k++) {
        for (int j = 0; j < 3; j++) {
            switch ((j + k) % 3) {
            case 0:
                tv[k] = veer_encode(bundle, states, r, n, 1, &rc);
                break;
            case 1:
                tn[k] = veer_encode(bundle, states, r, n, 0, &rc);
                break;
            default:
                tf[k] = floor_encode(m, n, block);
            }
        }
        note_cpu();
    }
    double v = median_of(tv, reps, 0), vn = median_of(tn, reps, 0), f = median_of(tf, reps, 0);
    double vc = median_of(tv, reps, 1), vnc = median_of(tn, reps, 1), fc = median_of(tf, reps, 1);
    printf("  %-9s n=%-6d veer %8.2f / %8.2f ms | floor %8.2f ms | ratio %.2fx / %.2fx wall, "
           "%.2fx / %.2fx CPU time  (medians of %d; floor in blocks of %d rows)\n",
           label, n, v * 1e3, vn * 1e3, f * 1e3, v / f, vn / f, vc / fc, vnc / fc, reps, block);
out:
    free(states);
    free(r);
}

/* ---- main ------------------------------------------------------------------------------- */

/* A task vector for acting: rewards over the reference set when the bundle has one. */
static int make_task(const veer_bundle *bundle, float *z)
{
    const veer_model_info *info = veer_bundle_info(bundle);
    veer_task_spec spec;
    float *r = NULL, *s = NULL;
    if (info->reference_count > 0) {
        veer_task_spec_init(&spec, VEER_TASK_REFERENCE);
        spec.count = info->reference_count;
        r = random_floats(spec.count);
    } else {
        veer_task_spec_init(&spec, VEER_TASK_GOALS);
        spec.count = 1;
        s = random_floats(info->state_dim);
        r = random_floats(1);
        r[0] = 1.0f;
        spec.states = s;
    }
    spec.values = r;
    veer_error err;
    int rc = veer_task_encode(bundle, &spec, z, NULL, &err);
    if (rc != 0)
        fprintf(stderr, "bench_runtime: encoding a task: %s: %s\n", err.field, err.message);
    free(r);
    free(s);
    return rc;
}

int main(int argc, char **argv)
{
    /* --act-only: memory and act latency alone, skipping the minutes of encoding. */
    int act_only = argc == 4 && strcmp(argv[3], "--act-only") == 0;
    if (argc != 3 && !act_only) {
        fprintf(stderr, "usage: bench_runtime SMALL.veer STANDARD.veer [--act-only]\n");
        return 2;
    }
    const char *paths[2] = {argv[1], argv[2]};
    const char *labels[2] = {"SMALL", "STANDARD"};
    veer_blas_threads(1);
    char load[128];
    load_average(load, sizeof load);
    long rss_start = rss_kib();
    double cpu0 = thread_cpu_s();
    uint64_t wall0 = veer__now_ns();
    note_cpu();

    /* Memory first, with only the STANDARD bundle open: open, encode a task, one workspace,
     * one act, and read VmRSS while the workspace is alive (a service always holds one). */
    veer_bundle *bundles[2] = {NULL, NULL};
    veer_error err;
    float *zs[2];
    long rss_loaded = -1;
    if (veer_bundle_open(paths[1], &bundles[1], &err) != 0) {
        fprintf(stderr, "bench_runtime: %s: %s: %s\n", paths[1], err.field, err.message);
        return 2;
    }
    zs[1] = calloc(veer_bundle_info(bundles[1])->z_dim, sizeof(float));
    if (make_task(bundles[1], zs[1]) != 0)
        return 2;
    {
        veer_workspace *ws = NULL;
        if (veer_workspace_create(bundles[1], 1, &ws, &err) != 0) {
            fprintf(stderr, "bench_runtime: workspace: %s\n", err.message);
            return 2;
        }
        float *s = random_floats(veer_bundle_info(bundles[1])->state_dim), action[16];
        veer_act(ws, s, zs[1], action, NULL, NULL);
        rss_loaded = rss_kib();
        free(s);
        veer_workspace_destroy(ws);
    }

    model_file files[2];
    for (int i = 0; i < 2; i++) {
        if (model_file_read(paths[i], &files[i]) != 0) {
            fprintf(stderr, "bench_runtime: %s: cannot decode the bundle\n", paths[i]);
            return 2;
        }
    }
    if (veer_bundle_open(paths[0], &bundles[0], &err) != 0) {
        fprintf(stderr, "bench_runtime: %s: %s: %s\n", paths[0], err.field, err.message);
        return 2;
    }
    zs[0] = calloc(veer_bundle_info(bundles[0])->z_dim, sizeof(float));
    if (make_task(bundles[0], zs[0]) != 0)
        return 2;

    printf("bench_runtime: libveer against bare-cblas floors, one OpenBLAS thread\n");
    printf("  OpenBLAS kernel: %s; config: %s\n", veer_blas_kernel(), openblas_get_config());
    printf("  load average at start: %s (a shared machine: figures vary with other users' load)\n",
           load);
    for (int i = 0; i < 2; i++) {
        const veer_model_info *info = veer_bundle_info(bundles[i]);
        printf("  %-9s %s: %u features, d=%u, %u actions, weights %.2f MiB\n", labels[i],
               info->model_version, info->state_dim, info->z_dim, info->action_count,
               (double)weights_bytes(files[i].model) / MIB);
    }

    printf("\nresident memory (VmRSS, /proc/self/status), STANDARD bundle open + 1 workspace:\n");
    double weights = (double)weights_bytes(files[1].model);
    double limit = 1.2 * weights + 16 * MIB;
    double rss = (double)rss_loaded * 1024.0;
    printf("  RSS at start %.1f MiB, after loading %.1f MiB (bundle's own memory %.1f MiB)\n",
           (double)rss_start / 1024.0, rss / MIB, (double)veer_bundle_memory(bundles[1]) / MIB);
    printf("  weights %.1f MiB; target 1.2 x weights + 16 MiB = %.1f MiB; RSS / target = %.2f\n",
           weights / MIB, limit / MIB, rss / limit);

    printf("\nsingle-state act latency (veer_act vs F's linear layers as bare cblas calls):\n");
    for (int i = 0; i < 2; i++)
        bench_act(labels[i], bundles[i], files[i].model, zs[i]);

    printf("\nacts answered together (veerd --act-batch): n states in one veer_act_each, a task "
           "vector each, against n veer_act calls; hot, and cold after a 64 MiB sweep:\n");
    bench_batch(labels[0], bundles[0], zs[0]);

    static const int counts[2] = {5000, 50000};
    if (act_only) {
        printf("\ntask encoding: skipped (--act-only)\n");
    } else {
        printf("\ntask encoding from reward samples (veer_task_encode with / without the R2 "
               "report, vs B's linear layers as bare sgemm; wall times):\n");
        for (int i = 0; i < 2; i++)
            for (int c = 0; c < 2; c++)
                bench_encode(labels[i], bundles[i], files[i].model, counts[c]);
    }

    char cpus[256] = "";
    for (int c = 0; c < 64; c++)
        if (cpus_seen & (1ull << c))
            snprintf(cpus + strlen(cpus), sizeof cpus - strlen(cpus), "%s%d", cpus[0] ? "," : "",
                     c);
    load_average(load, sizeof load);
    double wall = (double)(veer__now_ns() - wall0) / 1e9, cpu = thread_cpu_s() - cpu0;
    printf("\n  the thread had the CPU %.0f%% of the %.0f s run (CPU time / wall time; below 100%% "
           "means other processes took it)\n",
           100.0 * cpu / wall, wall);
    printf("  the thread ran on CPU(s) %s (sched_getcpu, sampled; not pinned); load average at "
           "end: %s\n",
           cpus, load);
    printf("  targets: act <= 1.2x floor, encoding <= 1.2x floor, RSS <= 1.2x weights + 16 MiB\n");

    for (int i = 0; i < 2; i++) {
        veer_bundle_close(bundles[i]);
        model_file_free(&files[i]);
        free(zs[i]);
    }
    return 0;
}
