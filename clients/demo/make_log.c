/* veer-arm-log: writes a reward-free transition log of the demo arm for `veer train`.
 *
 * The arm's physics runs at 1 kHz; the log records one transition per decision (20 ms by
 * default), the torque held over the decision. Exploration alternates two kinds of segment
 * within each episode:
 *   - Ornstein-Uhlenbeck torques (Uhlenbeck & Ornstein, Phys. Rev. 1930; the usual exploration
 *     noise for continuous control), with random resets of the noise state, which give fast,
 *     varied swinging;
 *   - move-and-hold: a PD controller with gravity feed-forward drives the arm to a random pose
 *     and holds it, part of the time to a pose whose gripper lies near a bin.
 * Noise alone leaves slow states near the bins almost unseen, and an FB policy cannot reach
 * what the data never shows; the held segments cover them. The coverage figures printed at the
 * end (and stored in meta.json) say how well.
 *
 * Output folder: states.npy, actions.npy, next_states.npy (float32, N × 8, N × 2, N × 8),
 * dones.npy (float32, N, 1 at the last transition of each episode: a time limit, not a
 * terminal state, so next_states stays valid there) and meta.json. Actions are torques in N·m
 * within the torque limits, which meta.json states as the action bounds.
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "arm.h"
#include "base/base.h"
#include "bench.h"
#include "npy_write.h"
#include "train/rng.h" /* the trainer's xoshiro256**: one generator for the project */

#define EXIT_REFUSED 1
#define EXIT_USAGE 2
#define MAX_TRANSITIONS 50000000L

typedef struct log_options {
    long episodes;
    long length;      /* decisions per episode */
    long rng_key;     /* random stream */
    long decision_ms; /* physics steps per decision */
    double hold_fraction;
    double near_bin_fraction;
    double parcel_mass;
    const char *out;
    int overwrite;
    int quiet;
} log_options;

static void usage(FILE *to)
{
    fprintf(to,
            "usage: veer-arm-log --out DIR [options]\n"
            "Writes a reward-free transition log of the demo sorting arm (float32 .npy files\n"
            "and meta.json) for `veer train`.\n\n"
            "  --out DIR                 output folder (created if missing)\n"
            "  --episodes N              episodes (default 400)\n"
            "  --length N                decisions per episode (default 250)\n"
            "  --decision-ms N           decision step in ms, torque held between (default 20)\n"
            "  --rng N                   random stream number, same number same log (default 1)\n"
            "  --hold-fraction F         share of segments that move to a pose and hold it\n"
            "                            (default 0.5; 0 gives noise only)\n"
            "  --near-bin-fraction F     share of held poses near a bin (default 0.4)\n"
            "  --parcel-mass KG          parcel at the gripper (default 0.5)\n"
            "  --overwrite               replace an existing log in DIR\n"
            "  --quiet                   print nothing but errors\n"
            "exit codes: 0 ok, 1 refused (cannot write), 2 usage\n");
}

static int parse_long(const char *flag, const char *text, long lo, long hi, long *out)
{
    char *end;
    errno = 0;
    long v = text ? strtol(text, &end, 10) : 0;
    if (text == NULL || *text == '\0' || *end != '\0' || errno == ERANGE || v < lo || v > hi) {
        fprintf(stderr, "veer-arm-log: %s needs a whole number from %ld to %ld, got '%s'\n", flag,
                lo, hi, text ? text : "(nothing)");
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_double(const char *flag, const char *text, double lo, double hi, double *out)
{
    char *end;
    errno = 0;
    double v = text ? strtod(text, &end) : 0.0;
    if (text == NULL || *text == '\0' || *end != '\0' || errno == ERANGE || !isfinite(v) ||
        v < lo || v > hi) {
        fprintf(stderr, "veer-arm-log: %s needs a number from %g to %g, got '%s'\n", flag, lo, hi,
                text ? text : "(nothing)");
        return -1;
    }
    *out = v;
    return 0;
}

static int parse_args(int argc, char **argv, log_options *o)
{
    *o = (log_options){400, 250, 1, 20, 0.5, 0.4, 0.5, NULL, 0, 0};
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        const char *v = i + 1 < argc ? argv[i + 1] : NULL;
        int rc = 0, takes = 1;
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            usage(stdout);
            exit(0);
        } else if (strcmp(a, "--out") == 0) {
            if (v == NULL || *v == '\0') {
                fprintf(stderr, "veer-arm-log: --out needs a folder\n");
                return -1;
            }
            if (strlen(v) > 3000) {
                fprintf(stderr, "veer-arm-log: --out path is longer than 3000 characters\n");
                return -1;
            }
            o->out = v;
        } else if (strcmp(a, "--episodes") == 0) {
            rc = parse_long(a, v, 1, 1000000, &o->episodes);
        } else if (strcmp(a, "--length") == 0) {
            rc = parse_long(a, v, 1, 1000000, &o->length);
        } else if (strcmp(a, "--decision-ms") == 0) {
            rc = parse_long(a, v, 1, 1000, &o->decision_ms);
        } else if (strcmp(a, "--rng") == 0) {
            rc = parse_long(a, v, 0, LONG_MAX, &o->rng_key);
        } else if (strcmp(a, "--hold-fraction") == 0) {
            rc = parse_double(a, v, 0.0, 1.0, &o->hold_fraction);
        } else if (strcmp(a, "--near-bin-fraction") == 0) {
            rc = parse_double(a, v, 0.0, 1.0, &o->near_bin_fraction);
        } else if (strcmp(a, "--parcel-mass") == 0) {
            rc = parse_double(a, v, 0.0, 5.0, &o->parcel_mass);
        } else if (strcmp(a, "--overwrite") == 0) {
            o->overwrite = 1;
            takes = 0;
        } else if (strcmp(a, "--quiet") == 0) {
            o->quiet = 1;
            takes = 0;
        } else {
            fprintf(stderr, "veer-arm-log: unknown option '%s' (see --help)\n", a);
            return -1;
        }
        if (rc)
            return -1;
        i += takes;
    }
    if (o->out == NULL) {
        fprintf(stderr, "veer-arm-log: --out is required (the folder to write the log to)\n");
        return -1;
    }
    if (o->episodes * o->length > MAX_TRANSITIONS) {
        fprintf(stderr,
                "veer-arm-log: --episodes × --length = %ld transitions, over the limit of %ld\n",
                o->episodes * o->length, MAX_TRANSITIONS);
        return -1;
    }
    return 0;
}

/* ---- exploration ---------------------------------------------------------------------------*/

/* Ornstein-Uhlenbeck on the normalised torque: mean reversion rate 3 /s (correlation time about
 * 0.33 s, several decisions) and a stationary deviation of 0.6 of the torque limit; a reset to a
 * uniform value every second on average. Common practice, no source: values picked so the arm
 * swings through most of its range within an episode. */
#define OU_RATE 3.0
#define OU_STATIONARY_SD 0.6
#define OU_RESET_PER_S 1.0
/* PD gains of the hold controller (N·m/rad, N·m·s/rad), near critical damping for the default
 * arm's inertias (about 0.47 and 0.07 kg·m²) at the 20 ms decision rate; plus a small torque
 * noise so held states are not all identical. */
static const double HOLD_KP[2] = {30.0, 15.0};
static const double HOLD_KD[2] = {6.0, 1.8};
#define HOLD_NOISE 0.03
#define BIN_JITTER 0.04 /* m, spread of held poses around a bin's drop point */

typedef struct explorer {
    veer__rng rng;
    double ou[2];
    int hold; /* current segment kind */
    int left; /* decisions left in the segment */
    double target[2];
} explorer;

static double range(veer__rng *r, double lo, double hi)
{
    return lo + (hi - lo) * veer__rng_uniform(r);
}

static double clampd(double v, double lo, double hi)
{
    return v < lo ? lo : (v > hi ? hi : v);
}

static void pick_target(explorer *e, const veer_arm_params *p, double near_bin_fraction)
{
    if (veer__rng_uniform(&e->rng) < near_bin_fraction) {
        int b = (int)(veer__rng_uniform(&e->rng) * VEER_BENCH_BIN_COUNT);
        double x = veer_bench_bins[b].x + BIN_JITTER * veer__rng_normal(&e->rng);
        double y = veer_bench_bins[b].y + BIN_JITTER * veer__rng_normal(&e->rng);
        if (veer_arm_inverse(p, x, y, e->target, NULL) == 0)
            return;
    }
    for (int i = 0; i < 2; i++)
        e->target[i] = range(&e->rng, p->angle_min[i] + 0.15, p->angle_max[i] - 0.15);
}

static void new_segment(explorer *e, const veer_arm_params *p, const log_options *o)
{
    double decisions_per_s = 1000.0 / (double)o->decision_ms;
    e->hold = veer__rng_uniform(&e->rng) < o->hold_fraction;
    double seconds = e->hold ? range(&e->rng, 1.0, 3.0) : range(&e->rng, 0.4, 2.0);
    e->left = (int)ceil(seconds * decisions_per_s);
    if (e->hold)
        pick_target(e, p, o->near_bin_fraction);
}

static void choose_torque(explorer *e, const veer_arm *arm, const log_options *o, double tau[2])
{
    const veer_arm_params *p = &arm->params;
    double dt = (double)o->decision_ms * 1e-3;
    if (e->left <= 0)
        new_segment(e, p, o);
    e->left--;
    if (e->hold) {
        double g[2];
        veer_arm_gravity_torque(arm, arm->q, g);
        for (int i = 0; i < 2; i++)
            tau[i] = g[i] + HOLD_KP[i] * (e->target[i] - arm->q[i]) - HOLD_KD[i] * arm->qd[i] +
                     HOLD_NOISE * p->torque_max[i] * veer__rng_normal(&e->rng);
    } else {
        if (veer__rng_uniform(&e->rng) < OU_RESET_PER_S * dt) {
            e->ou[0] = range(&e->rng, -1.0, 1.0);
            e->ou[1] = range(&e->rng, -1.0, 1.0);
        }
        double sigma = OU_STATIONARY_SD * sqrt(2.0 * OU_RATE);
        for (int i = 0; i < 2; i++) {
            e->ou[i] += -OU_RATE * e->ou[i] * dt + sigma * sqrt(dt) * veer__rng_normal(&e->rng);
            tau[i] = clampd(e->ou[i], -1.0, 1.0) * p->torque_max[i];
        }
    }
    for (int i = 0; i < 2; i++)
        tau[i] = clampd(tau[i], -p->torque_max[i], p->torque_max[i]);
}

/* ---- coverage ------------------------------------------------------------------------------*/

typedef struct coverage {
    long states, slow;
    long near[VEER_BENCH_BIN_COUNT], slow_near[VEER_BENCH_BIN_COUNT];
    long in_zone;
} coverage;

static void count_state(coverage *c, const float *s)
{
    double v = hypot(s[VEER_ARM_QD1], s[VEER_ARM_QD2]);
    int slow = v < VEER_BENCH_SLOW_SPEED;
    c->states++;
    c->slow += slow;
    for (int b = 0; b < VEER_BENCH_BIN_COUNT; b++) {
        double d = hypot(s[VEER_ARM_GRIP_X] - veer_bench_bins[b].x,
                         s[VEER_ARM_GRIP_Y] - veer_bench_bins[b].y);
        if (d < VEER_BENCH_NEAR_RADIUS) {
            c->near[b]++;
            c->slow_near[b] += slow;
        }
    }
    c->in_zone += veer_bench_in_zone(&veer_bench_keepout, s[VEER_ARM_GRIP_X], s[VEER_ARM_GRIP_Y]);
}

/* ---- output --------------------------------------------------------------------------------*/

static int write_meta(const char *path, const log_options *o, const veer_arm_params *p,
                      const coverage *c, long n)
{
    cJSON *root = cJSON_CreateObject();
    if (root == NULL)
        return -1;
    cJSON_AddStringToObject(root, "kind", "veer transition log");
    cJSON_AddStringToObject(root, "machine", "demo two-joint sorting arm (clients/demo/arm.h)");
    cJSON_AddNumberToObject(root, "transitions", (double)n);
    cJSON_AddNumberToObject(root, "episodes", (double)o->episodes);
    cJSON_AddNumberToObject(root, "episode_length", (double)o->length);
    cJSON_AddNumberToObject(root, "decision_step_s", (double)o->decision_ms * 1e-3);
    cJSON_AddNumberToObject(root, "physics_step_s", VEER_ARM_PHYSICS_DT);
    cJSON_AddStringToObject(root, "action_kind", "continuous");
    cJSON_AddStringToObject(root, "action_unit", "N*m");
    cJSON_AddItemToObject(root, "state_features",
                          cJSON_CreateStringArray(veer_arm_feature_names, VEER_ARM_OBS_DIM));
    cJSON_AddItemToObject(root, "action_names",
                          cJSON_CreateStringArray(veer_arm_action_names, VEER_ARM_ACT_DIM));
    double lo[2] = {-p->torque_max[0], -p->torque_max[1]};
    cJSON_AddItemToObject(root, "action_low", cJSON_CreateDoubleArray(lo, 2));
    cJSON_AddItemToObject(root, "action_high", cJSON_CreateDoubleArray(p->torque_max, 2));
    cJSON_AddBoolToObject(root, "dones_are_time_limits", 1);
    cJSON_AddNumberToObject(root, "parcel_mass_kg", p->parcel_mass);
    cJSON *gen = cJSON_AddObjectToObject(root, "generator");
    cJSON_AddNumberToObject(gen, "rng", (double)o->rng_key);
    cJSON_AddNumberToObject(gen, "hold_fraction", o->hold_fraction);
    cJSON_AddNumberToObject(gen, "near_bin_fraction", o->near_bin_fraction);
    cJSON *cov = cJSON_AddObjectToObject(root, "coverage");
    cJSON_AddNumberToObject(cov, "slow_speed_rad_s", VEER_BENCH_SLOW_SPEED);
    cJSON_AddNumberToObject(cov, "near_radius_m", VEER_BENCH_NEAR_RADIUS);
    cJSON_AddNumberToObject(cov, "slow_fraction", (double)c->slow / (double)c->states);
    cJSON_AddNumberToObject(cov, "in_keepout_fraction", (double)c->in_zone / (double)c->states);
    cJSON *bins = cJSON_AddArrayToObject(cov, "bins");
    for (int b = 0; b < VEER_BENCH_BIN_COUNT; b++) {
        cJSON *e = cJSON_CreateObject();
        cJSON_AddStringToObject(e, "bin", veer_bench_bins[b].name);
        cJSON_AddNumberToObject(e, "near_states", (double)c->near[b]);
        cJSON_AddNumberToObject(e, "slow_near_states", (double)c->slow_near[b]);
        cJSON_AddItemToArray(bins, e);
    }
    char *text = cJSON_Print(root);
    cJSON_Delete(root);
    if (text == NULL)
        return -1;
    char tmp[4200];
    snprintf(tmp, sizeof tmp, "%s.part", path);
    FILE *f = fopen(tmp, "w");
    int ok = f != NULL && fputs(text, f) >= 0 && fputc('\n', f) != EOF;
    if (f != NULL && fclose(f) != 0)
        ok = 0;
    cJSON_free(text);
    if (!ok || rename(tmp, path) != 0) {
        fprintf(stderr, "veer-arm-log: cannot write %s: %s\n", path, strerror(errno));
        remove(tmp);
        return -1;
    }
    return 0;
}

static int prepare_folder(const log_options *o)
{
    if (mkdir(o->out, 0777) != 0 && errno != EEXIST) {
        fprintf(stderr, "veer-arm-log: cannot create folder %s: %s\n", o->out, strerror(errno));
        return -1;
    }
    struct stat st;
    if (stat(o->out, &st) != 0 || !S_ISDIR(st.st_mode)) {
        fprintf(stderr, "veer-arm-log: --out %s is not a folder\n", o->out);
        return -1;
    }
    char path[4096];
    snprintf(path, sizeof path, "%s/states.npy", o->out);
    if (!o->overwrite && stat(path, &st) == 0) {
        fprintf(stderr,
                "veer-arm-log: %s already holds a log (states.npy); pass --overwrite to replace "
                "it\n",
                o->out);
        return -1;
    }
    return 0;
}

int main(int argc, char **argv)
{
    log_options o;
    if (parse_args(argc, argv, &o) != 0)
        return EXIT_USAGE;
    if (prepare_folder(&o) != 0)
        return EXIT_REFUSED;

    veer_arm_params p;
    veer_arm_params_default(&p);
    p.parcel_mass = o.parcel_mass;

    size_t n = (size_t)(o.episodes * o.length);
    float *states = veer__malloc(n * VEER_ARM_OBS_DIM * sizeof(float));
    float *next = veer__malloc(n * VEER_ARM_OBS_DIM * sizeof(float));
    float *actions = veer__malloc(n * VEER_ARM_ACT_DIM * sizeof(float));
    float *dones = veer__calloc(n, sizeof(float));
    int status = EXIT_REFUSED;
    if (!states || !next || !actions || !dones) {
        fprintf(stderr, "veer-arm-log: out of memory for %zu transitions\n", n);
        goto done;
    }

    explorer e;
    veer__rng_init(&e.rng, (uint64_t)o.rng_key);
    coverage cov = {0};
    size_t t = 0;
    for (long ep = 0; ep < o.episodes; ep++) {
        double q[2], qd[2];
        for (int i = 0; i < 2; i++) {
            q[i] = range(&e.rng, p.angle_min[i] + 0.1, p.angle_max[i] - 0.1);
            qd[i] = veer__rng_normal(&e.rng);
        }
        veer_arm arm;
        veer_error err;
        if (veer_arm_init(&arm, &p, q, qd, &err) != 0) {
            fprintf(stderr, "veer-arm-log: %s: %s\n", err.field, err.message);
            goto done;
        }
        e.ou[0] = e.ou[1] = 0.0;
        e.left = 0;
        for (long k = 0; k < o.length; k++, t++) {
            double tau[2];
            veer_arm_observe(&arm, states + t * VEER_ARM_OBS_DIM);
            choose_torque(&e, &arm, &o, tau);
            if (veer_arm_advance(&arm, tau, (int)o.decision_ms) != 0) {
                fprintf(stderr, "veer-arm-log: the simulation failed in episode %ld\n", ep);
                goto done;
            }
            veer_arm_observe(&arm, next + t * VEER_ARM_OBS_DIM);
            actions[t * 2] = (float)tau[0];
            actions[t * 2 + 1] = (float)tau[1];
            count_state(&cov, states + t * VEER_ARM_OBS_DIM);
        }
        dones[t - 1] = 1.0f;
    }

    static const char *const names[4] = {"states.npy", "actions.npy", "next_states.npy",
                                         "dones.npy"};
    const float *arrays[4] = {states, actions, next, dones};
    const size_t cols[4] = {VEER_ARM_OBS_DIM, VEER_ARM_ACT_DIM, VEER_ARM_OBS_DIM, 0};
    for (int f = 0; f < 4; f++) {
        char path[4096];
        veer_error err;
        snprintf(path, sizeof path, "%s/%s", o.out, names[f]);
        if (veer_demo_npy_write_f32(path, arrays[f], n, cols[f], &err) != 0) {
            fprintf(stderr, "veer-arm-log: %s\n", err.message);
            goto done;
        }
    }
    char meta[4096];
    snprintf(meta, sizeof meta, "%s/meta.json", o.out);
    if (write_meta(meta, &o, &p, &cov, (long)n) != 0)
        goto done;

    if (!o.quiet) {
        printf("veer-arm-log: %zu transitions (%ld episodes x %ld decisions of %ld ms) in %s\n", n,
               o.episodes, o.length, o.decision_ms, o.out);
        printf("coverage: slow states (|qd| < %.1f rad/s) %.1f%%, in keep-out zone %.1f%%\n",
               VEER_BENCH_SLOW_SPEED, 100.0 * (double)cov.slow / (double)cov.states,
               100.0 * (double)cov.in_zone / (double)cov.states);
        for (int b = 0; b < VEER_BENCH_BIN_COUNT; b++)
            printf("  bin %-5s within %.2f m: %ld states, %ld of them slow\n",
                   veer_bench_bins[b].name, VEER_BENCH_NEAR_RADIUS, cov.near[b], cov.slow_near[b]);
    }
    status = 0;
done:
    veer__free(states);
    veer__free(next);
    veer__free(actions);
    veer__free(dones);
    return status;
}
