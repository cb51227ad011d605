/* `veer train`: turns a transition log (.npy files) into a model bundle with the offline FB
 * trainer (src/train). This file only reads flags into a veer_train_config: a preset first,
 * then every flag on top of it, each number checked strictly so a typo is an error rather
 * than a silently different model. */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "train/train.h"

static void usage(FILE *to)
{
    fprintf(to,
        "usage: veer train --states S.npy --actions A.npy --next-states N.npy [--dones D.npy]\n"
        "                  (--discrete COUNT | --continuous LOW:HIGH[,LOW:HIGH...])\n"
        "                  --step SECONDS --out MODEL.veer [options]\n"
        "\n"
        "Trains forward-backward representations on a reward-free transition log and writes a\n"
        "model bundle, its training curve (MODEL.veer.curve.csv) and a checkpoint\n"
        "(MODEL.veer.ckpt; run the same command again to resume an interrupted run).\n"
        "Logs are float32 .npy arrays: states and next states (n, features), actions (n, dim)\n"
        "or (n,) indices (int32/int64 also accepted for discrete), episode ends (n,) of 0/1.\n"
        "\n"
        "log:      --features NAME,...     state feature names (default f0, f1, ...)\n"
        "          --ends terminal|truncated  what the --dones rows mean: terminal states (no\n"
        "                                  successor; the default) or time-limit cuts whose\n"
        "                                  next states are real (training continues through)\n"
        "          --step SECONDS          decision time step of the log (stored in the bundle)\n"
        "presets:  --preset published|small|tabular   (default small; flags override it)\n"
        "networks: --arch mlp|split|table  --state-counts C,...  (table: count per state feature;\n"
        "                                  split: F embeds (state, action) and (state, z) apart)\n"
        "          --z-dim N  --hidden N  --b-hidden N  --layers N  --k N  --heads 1|2\n"
        "          --b-features I,...  --no-b-norm  --embed-std X\n"
        "          --input-norm            standardise each state feature by the log's mean\n"
        "                                  and spread for the networks (folded into the\n"
        "                                  bundle's first layers: it still reads raw states)\n"
        "training: --steps N  --batch N  --lr X (all three)  --lr-f X  --lr-b X  --lr-actor X\n"
        "          --lr-schedule constant|cosine   (cosine: every rate decays to 0 by --steps)\n"
        "          --average RATE          export an exponential moving average of the\n"
        "                                  parameters at this rate (0: the last ones)\n"
        "          --discount X  --tau X  --ortho X  --mix-ratio X  --noise X  --noise-clip X\n"
        "          --rng-key N  --threads N  --holdout FRACTION  --ref-count N\n"
        "output:   --eval-every N  --checkpoint FILE  --checkpoint-every N  --curve FILE\n"
        "          --model-version LABEL  --fallback V[,V...]  --quiet\n"
        "\n"
        "Same flags, same log and --threads 1 give the same bundle (set SOURCE_DATE_EPOCH to fix\n"
        "its creation date). veer drives machines: try every model in simulation first.\n");
}

static int bad_value(const char *flag, const char *v, const char *want)
{
    fprintf(stderr, "veer train: %s '%s': expected %s\n", flag, v ? v : "", want);
    return VEER_CLI_USAGE;
}

static int parse_u64(const char *flag, const char *v, uint64_t lo, uint64_t hi, uint64_t *out)
{
    char *end;
    errno = 0;
    if (v == NULL || *v == '\0' || *v == '-')
        return bad_value(flag, v, "a whole number");
    unsigned long long x = strtoull(v, &end, 10);
    if (errno || *end || x < lo || x > hi) {
        char want[96];
        snprintf(want, sizeof want, "a whole number in %llu..%llu", (unsigned long long)lo,
                 (unsigned long long)hi);
        return bad_value(flag, v, want);
    }
    *out = x;
    return 0;
}

static int parse_u32(const char *flag, const char *v, uint32_t lo, uint32_t hi, uint32_t *out)
{
    uint64_t x;
    int rc = parse_u64(flag, v, lo, hi, &x);
    if (rc == 0)
        *out = (uint32_t)x;
    return rc;
}

static int parse_float(const char *flag, const char *v, float *out)
{
    char *end;
    if (v == NULL || *v == '\0')
        return bad_value(flag, v, "a number");
    double x = strtod(v, &end);
    if (*end || !isfinite(x) || !isfinite((float)x))
        return bad_value(flag, v, "a finite number");
    *out = (float)x;
    return 0;
}

/* "1,2,3" into at most cap values. */
static int parse_u32_list(const char *flag, const char *v, uint32_t *out, uint32_t cap,
                          uint32_t *n)
{
    *n = 0;
    if (v == NULL || *v == '\0')
        return bad_value(flag, v, "a comma-separated list of whole numbers");
    char buf[1024];
    snprintf(buf, sizeof buf, "%s", v);
    for (char *save, *tok = strtok_r(buf, ",", &save); tok; tok = strtok_r(NULL, ",", &save)) {
        if (*n == cap)
            return bad_value(flag, v, "a shorter list");
        int rc = parse_u32(flag, tok, 0, UINT32_MAX, &out[(*n)++]);
        if (rc)
            return rc;
    }
    return *n ? 0 : bad_value(flag, v, "a comma-separated list of whole numbers");
}

static int parse_bounds(const char *v, veer_train_config *c)
{
    char buf[2048];
    snprintf(buf, sizeof buf, "%s", v ? v : "");
    c->action_dim = 0;
    for (char *save, *tok = strtok_r(buf, ",", &save); tok; tok = strtok_r(NULL, ",", &save)) {
        char *colon = strchr(tok, ':');
        if (colon == NULL || c->action_dim == VEER_TRAIN_MAX_ACTION_DIM)
            return bad_value("--continuous", v, "LOW:HIGH per action dimension, comma-separated");
        *colon = '\0';
        float lo, hi;
        if (parse_float("--continuous", tok, &lo) || parse_float("--continuous", colon + 1, &hi))
            return VEER_CLI_USAGE;
        if (!(lo < hi))
            return bad_value("--continuous", v, "LOW < HIGH in every dimension");
        c->low[c->action_dim] = lo;
        c->high[c->action_dim] = hi;
        c->action_dim++;
    }
    return c->action_dim ? 0 : bad_value("--continuous", v, "LOW:HIGH[,LOW:HIGH...]");
}

static int run(int argc, char **argv)
{
    static char *names[4096];
    static char names_buf[65536];
    veer_train_config c;
    memset(&c, 0, sizeof c);
    const char *preset = "small";
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--help") == 0 || strcmp(argv[i], "-h") == 0) {
            usage(stdout);
            return VEER_CLI_OK;
        }
        if (strcmp(argv[i], "--preset") == 0 && i + 1 < argc)
            preset = argv[i + 1];
    }
    if (veer__train_preset(&c, preset) != 0)
        return bad_value("--preset", preset, "published, small or tabular");
    c.progress = 1;
    int have_step = 0, rc = 0;
    uint64_t u;

    for (int i = 1; i < argc; i++) {
        const char *f = argv[i];
        const char *v = i + 1 < argc ? argv[i + 1] : NULL;
        int takes = 1;
#define IS(name) (strcmp(f, name) == 0)
        if (IS("--quiet")) {
            c.progress = 0;
            takes = 0;
        } else if (IS("--no-b-norm")) {
            c.b_norm = 0;
            takes = 0;
        } else if (IS("--input-norm")) {
            c.input_norm = 1;
            takes = 0;
        } else if (v == NULL) {
            fprintf(stderr, "veer train: %s needs a value (see veer train --help)\n", f);
            return VEER_CLI_USAGE;
        } else if (IS("--preset")) {
        } else if (IS("--states")) {
            c.states_path = v;
        } else if (IS("--actions")) {
            c.actions_path = v;
        } else if (IS("--next-states")) {
            c.next_states_path = v;
        } else if (IS("--dones")) {
            c.dones_path = v;
        } else if (IS("--out")) {
            c.out_path = v;
        } else if (IS("--curve")) {
            c.curve_path = v;
        } else if (IS("--checkpoint")) {
            c.checkpoint_path = v;
        } else if (IS("--model-version")) {
            c.model_version = v;
        } else if (IS("--discrete")) {
            rc = parse_u32(f, v, 2, 1u << 16, &c.action_count);
        } else if (IS("--continuous")) {
            rc = parse_bounds(v, &c);
        } else if (IS("--step")) {
            rc = parse_float(f, v, &c.decision_step_s);
            if (rc == 0 && !(c.decision_step_s > 0))
                rc = bad_value(f, v, "a positive number of seconds");
            have_step = 1;
        } else if (IS("--features")) {
            snprintf(names_buf, sizeof names_buf, "%s", v);
            c.nfeature_names = 0;
            for (char *save, *tok = strtok_r(names_buf, ",", &save); tok;
                 tok = strtok_r(NULL, ",", &save)) {
                if (c.nfeature_names == 4096)
                    return bad_value(f, v, "at most 4096 names");
                names[c.nfeature_names++] = tok;
            }
            c.feature_names = names;
        } else if (IS("--ends")) {
            if (strcmp(v, "terminal") == 0)
                c.ends_truncated = 0;
            else if (strcmp(v, "truncated") == 0)
                c.ends_truncated = 1;
            else
                rc = bad_value(f, v, "terminal or truncated");
        } else if (IS("--lr-schedule")) {
            if (strcmp(v, "constant") == 0)
                c.lr_cosine = 0;
            else if (strcmp(v, "cosine") == 0)
                c.lr_cosine = 1;
            else
                rc = bad_value(f, v, "constant or cosine");
        } else if (IS("--arch")) {
            if (strcmp(v, "mlp") == 0)
                c.arch = VEER_TRAIN_MLP;
            else if (strcmp(v, "table") == 0)
                c.arch = VEER_TRAIN_TABLE;
            else if (strcmp(v, "split") == 0)
                c.arch = VEER_TRAIN_SPLIT;
            else
                rc = bad_value(f, v, "mlp, split or table");
        } else if (IS("--state-counts")) {
            rc = parse_u32_list(f, v, c.state_counts, 3, &c.nstate_counts);
        } else if (IS("--b-features")) {
            rc = parse_u32_list(f, v, c.b_features, 64, &c.nb_features);
        } else if (IS("--z-dim")) {
            rc = parse_u32(f, v, 2, 4096, &c.z_dim);
        } else if (IS("--hidden")) {
            rc = parse_u32(f, v, 1, 65536, &c.hidden);
        } else if (IS("--b-hidden")) {
            rc = parse_u32(f, v, 1, 65536, &c.b_hidden);
        } else if (IS("--layers")) {
            rc = parse_u32(f, v, 1, 4, &c.layers);
        } else if (IS("--k")) {
            rc = parse_u32(f, v, 1, 4096, &c.bilinear_k);
        } else if (IS("--heads")) {
            rc = parse_u32(f, v, 1, 2, &c.heads);
        } else if (IS("--embed-std")) {
            rc = parse_float(f, v, &c.embed_std);
        } else if (IS("--batch")) {
            rc = parse_u32(f, v, 2, 65536, &c.batch);
        } else if (IS("--steps")) {
            rc = parse_u64(f, v, 1, UINT64_MAX / 2, &c.steps);
        } else if (IS("--lr")) {
            rc = parse_float(f, v, &c.lr_f);
            c.lr_b = c.lr_actor = c.lr_f;
        } else if (IS("--lr-f")) {
            rc = parse_float(f, v, &c.lr_f);
        } else if (IS("--lr-b")) {
            rc = parse_float(f, v, &c.lr_b);
        } else if (IS("--lr-actor")) {
            rc = parse_float(f, v, &c.lr_actor);
        } else if (IS("--discount")) {
            rc = parse_float(f, v, &c.discount);
        } else if (IS("--average")) {
            rc = parse_float(f, v, &c.average);
        } else if (IS("--tau")) {
            rc = parse_float(f, v, &c.tau);
        } else if (IS("--ortho")) {
            rc = parse_float(f, v, &c.ortho);
        } else if (IS("--mix-ratio")) {
            rc = parse_float(f, v, &c.mix_ratio);
        } else if (IS("--noise")) {
            rc = parse_float(f, v, &c.noise);
        } else if (IS("--noise-clip")) {
            rc = parse_float(f, v, &c.noise_clip);
        } else if (IS("--rng-key")) {
            rc = parse_u64(f, v, 0, UINT64_MAX, &c.rng_key);
        } else if (IS("--threads")) {
            rc = parse_u64(f, v, 1, 256, &u);
            c.threads = (int)u;
        } else if (IS("--holdout")) {
            rc = parse_float(f, v, &c.holdout);
        } else if (IS("--ref-count")) {
            rc = parse_u32(f, v, 1, 1u << 20, &c.ref_count);
        } else if (IS("--eval-every")) {
            rc = parse_u32(f, v, 1, UINT32_MAX, &c.eval_every);
        } else if (IS("--checkpoint-every")) {
            rc = parse_u32(f, v, 1, UINT32_MAX, &c.checkpoint_every);
        } else if (IS("--fallback")) {
            char buf[2048];
            snprintf(buf, sizeof buf, "%s", v);
            uint32_t k = 0;
            for (char *save, *tok = strtok_r(buf, ",", &save); tok && rc == 0;
                 tok = strtok_r(NULL, ",", &save)) {
                if (k == VEER_TRAIN_MAX_ACTION_DIM)
                    return bad_value(f, v, "one value per action dimension");
                rc = parse_float(f, tok, &c.fallback[k++]);
            }
            c.have_fallback = 1;
        } else {
            fprintf(stderr, "veer train: unknown flag '%s' (see veer train --help)\n", f);
            return VEER_CLI_USAGE;
        }
#undef IS
        if (rc != 0)
            return rc;
        i += takes;
    }

    const char *missing = !c.states_path ? "--states" : !c.actions_path ? "--actions"
                        : !c.next_states_path ? "--next-states" : !c.out_path ? "--out"
                        : !have_step ? "--step" : NULL;
    if (missing == NULL && !c.action_count && !c.action_dim)
        missing = "--discrete or --continuous";
    if (missing) {
        fprintf(stderr, "veer train: %s is required (see veer train --help)\n", missing);
        return VEER_CLI_USAGE;
    }
    if (c.action_count && c.action_dim) {
        fprintf(stderr, "veer train: give --discrete or --continuous, not both\n");
        return VEER_CLI_USAGE;
    }
    if (c.have_fallback) {
        float fb = c.fallback[0];
        if (c.action_count && (fb < 0 || fb >= (float)c.action_count || fb != floorf(fb))) {
            fprintf(stderr, "veer train: --fallback %g is not an action 0..%u\n", (double)fb,
                    c.action_count - 1);
            return VEER_CLI_USAGE;
        }
        for (uint32_t j = 0; !c.action_count && j < c.action_dim; j++)
            if (!(c.fallback[j] >= c.low[j] && c.fallback[j] <= c.high[j])) {
                fprintf(stderr, "veer train: --fallback value %u is outside [%g, %g]\n", j,
                        (double)c.low[j], (double)c.high[j]);
                return VEER_CLI_USAGE;
            }
    }

    veer_error err;
    veer_error_clear(&err);
    int code = veer__train_run(&c, &err);
    if (code != 0) {
        fprintf(stderr, "veer train: %s [%s%s%s]\n", err.message[0] ? err.message
                                                                    : veer_strerror(code),
                veer_errname(code), err.field[0] ? ", " : "", err.field);
        if (strcmp(err.field, "signal") == 0)
            return VEER_CLI_REFUSED;
        if (code == VEER_ELOG || code == VEER_ENPY || code == VEER_EIO)
            return VEER_CLI_INPUT;
        if (code == VEER_ECONFIG)
            return VEER_CLI_USAGE;
        return VEER_CLI_REFUSED;
    }
    if (c.progress)
        fprintf(stderr, "veer train: wrote %s\n", c.out_path);
    return VEER_CLI_OK;
}

const veer_cli_command veer_cli_cmd_train = {"train", "train an FB model from a transition log",
                                             run};
