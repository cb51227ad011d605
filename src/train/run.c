/* The training run around the step: load and check the log, resume from a checkpoint, loop
 * with a progress bar, record the training curve, checkpoint regularly and on Ctrl-C, and
 * write the bundle.
 *
 * The checkpoint's fingerprint is the log's digest plus every setting except the step count,
 * so a run can be resumed, or extended with a larger --steps, but never continued on another
 * log or with other hyper-parameters by mistake. */
#include <errno.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "base/base.h"
#include "train/train.h"
#include "veer/runtime.h"

static volatile sig_atomic_t interrupted;

static void on_signal(int sig)
{
    (void)sig;
    interrupted = 1;
}

/* Every setting that shapes training, in a fixed order (the fingerprint and the provenance). */
static void describe(const veer_train_config *c, char *out, size_t cap)
{
    /* The cosine schedule depends on the length, so a run resumed with another --steps would
     * not be the same run: the length is part of it. */
    char schedule[96] = "";
    int sl = 0;
    if (c->lr_cosine)
        sl = snprintf(schedule, sizeof schedule, " lr_schedule=cosine:%llu",
                      (unsigned long long)c->steps);
    if (c->average > 0)
        sl += snprintf(schedule + sl, sizeof schedule - (size_t)sl, " average=%g",
                       (double)c->average);
    /* Named only when on, so the settings (and bundles) of runs without it stay as they were. */
    if (c->input_norm)
        snprintf(schedule + sl, sizeof schedule - (size_t)sl, " input_norm=1");
    int n = snprintf(out, cap,
                     "arch=%s z_dim=%u hidden=%u b_hidden=%u layers=%u k=%u heads=%u b_norm=%d "
                     "embed_std=%g batch=%u lr_f=%g lr_b=%g lr_actor=%g discount=%g tau=%g "
                     "ortho=%g mix_ratio=%g noise=%g noise_clip=%g rng_key=%llu holdout=%g "
                     "ref_count=%u ends=%s%s actions=",
                     c->arch == VEER_TRAIN_TABLE   ? "table"
                     : c->arch == VEER_TRAIN_SPLIT ? "split"
                                                   : "mlp", c->z_dim, c->hidden,
                     c->b_hidden, c->layers, c->bilinear_k, c->heads, c->b_norm,
                     (double)c->embed_std, c->batch, (double)c->lr_f, (double)c->lr_b,
                     (double)c->lr_actor, (double)c->discount, (double)c->tau, (double)c->ortho,
                     (double)c->mix_ratio, (double)c->noise, (double)c->noise_clip,
                     (unsigned long long)c->rng_key, (double)c->holdout, c->ref_count,
                     c->ends_truncated ? "truncated" : "terminal", schedule);
    if (c->action_count) {
        n += snprintf(out + n, cap - (size_t)n, "discrete:%u", c->action_count);
    } else {
        n += snprintf(out + n, cap - (size_t)n, "continuous");
        for (uint32_t j = 0; j < c->action_dim && (size_t)n < cap; j++)
            n += snprintf(out + n, cap - (size_t)n, "%s%g:%g", j ? "," : ":", (double)c->low[j],
                          (double)c->high[j]);
    }
    for (uint32_t i = 0; i < c->nstate_counts && (size_t)n < cap; i++)
        n += snprintf(out + n, cap - (size_t)n, "%s%u", i ? "," : " state_counts=",
                      c->state_counts[i]);
    for (uint32_t i = 0; i < c->nb_features && (size_t)n < cap; i++)
        n += snprintf(out + n, cap - (size_t)n, "%s%u", i ? "," : " b_features=", c->b_features[i]);
}

static void iso_now(char *out, size_t cap)
{
    time_t now = time(NULL);
    const char *sde = getenv("SOURCE_DATE_EPOCH"); /* reproducible-builds.org convention */
    if (sde != NULL && *sde != '\0') {
        char *end;
        long long v = strtoll(sde, &end, 10);
        if (*end == '\0' && v >= 0)
            now = (time_t)v;
    }
    struct tm tm;
    gmtime_r(&now, &tm);
    strftime(out, cap, "%Y-%m-%dT%H:%M:%SZ", &tm);
}

typedef struct curve {
    char *text;
    size_t len, cap;
} curve;

static int curve_add(curve *cv, const char *line)
{
    size_t l = strlen(line);
    if (cv->len + l + 1 > cv->cap) {
        size_t cap = cv->cap ? cv->cap * 2 : 4096;
        while (cap < cv->len + l + 1)
            cap *= 2;
        char *p = veer__realloc(cv->text, cap);
        if (p == NULL)
            return VEER_ENOMEM;
        cv->text = p;
        cv->cap = cap;
    }
    memcpy(cv->text + cv->len, line, l + 1);
    cv->len += l;
    return 0;
}

static int write_text(const char *path, const char *text, size_t len, veer_error *err)
{
    char tmp[4096];
    snprintf(tmp, sizeof tmp, "%s.tmp", path);
    FILE *f = fopen(tmp, "w");
    if (f == NULL)
        return veer__error_set(err, VEER_EIO, "--curve", "%.200s: cannot create: %s", tmp,
                               strerror(errno));
    int bad = fwrite(text, 1, len, f) != len;
    bad |= fclose(f) != 0;
    if (bad || rename(tmp, path) != 0) {
        remove(tmp);
        return veer__error_set(err, VEER_EIO, "--curve", "%.200s: write failed", path);
    }
    return 0;
}

static void progress(uint64_t step, uint64_t total, uint64_t first, double secs,
                     const veer__train_losses *l, double bellman, int tty, int force)
{
    static double last_print = -1;
    if (!force && tty && secs - last_print < 0.25)
        return;
    if (!force && !tty) {
        /* Not a terminal: one line per tenth of the run. */
        uint64_t tenth = total / 10 ? total / 10 : 1;
        if (step % tenth != 0)
            return;
    }
    last_print = secs;
    double rate = secs > 0 ? (double)(step - first) / secs : 0;
    double eta = rate > 0 ? (double)(total - step) / rate : 0;
    int width = 24, filled = (int)((double)width * (double)step / (double)total);
    char bar[32];
    for (int i = 0; i < width; i++)
        bar[i] = i < filled ? '#' : '-';
    bar[width] = '\0';
    long e = (long)eta;
    fprintf(stderr, "%strain [%s] %3d%% %llu/%llu %6.0f steps/s ETA %ld:%02ld:%02ld fb %.4f "
                    "orth %.4f bellman %.4f%s",
            tty ? "\r" : "", bar, (int)(100.0 * (double)step / (double)total),
            (unsigned long long)step, (unsigned long long)total, rate, e / 3600, e / 60 % 60,
            e % 60, l->fb, l->orth, bellman, tty ? "\033[K" : "\n");
    fflush(stderr);
}

int veer__train_run(const veer_train_config *c, veer_error *err)
{
    veer__tlog_spec spec = {
        .states_path = c->states_path,
        .actions_path = c->actions_path,
        .next_states_path = c->next_states_path,
        .dones_path = c->dones_path,
        .ends_truncated = c->ends_truncated,
        .action_count = c->action_count,
        .action_dim = c->action_count ? 1 : c->action_dim,
        .low = c->low,
        .high = c->high,
        .nstate_counts = c->arch == VEER_TRAIN_TABLE ? c->nstate_counts : 0,
        .state_counts = c->state_counts,
    };
    veer__tlog log;
    int rc = veer__tlog_load(&spec, &log, err);
    if (rc != 0)
        return rc;
    if (c->feature_names && c->nfeature_names != log.state_dim) {
        veer__tlog_free(&log);
        return veer__error_set(err, VEER_ECONFIG, "--features",
                               "%u feature names were given; the states have %u features",
                               c->nfeature_names, log.state_dim);
    }
    veer_blas_threads(c->threads > 0 ? c->threads : 1);

    veer__trainer *t = NULL;
    if ((rc = veer__trainer_create(c, &log, &t, err)) != 0) {
        veer__tlog_free(&log);
        return rc;
    }
    char ckpt[4096], curvep[4096], core[2048], fp[2600], settings[4096], created[32];
    snprintf(ckpt, sizeof ckpt, "%s", c->checkpoint_path ? c->checkpoint_path : "");
    if (!c->checkpoint_path)
        snprintf(ckpt, sizeof ckpt, "%.4000s.ckpt", c->out_path);
    if (c->curve_path)
        snprintf(curvep, sizeof curvep, "%s", c->curve_path);
    else
        snprintf(curvep, sizeof curvep, "%.4000s.curve.csv", c->out_path);
    describe(c, core, sizeof core);
    snprintf(fp, sizeof fp, "%s | %s", log.digest, core);

    curve cv = {0};
    uint64_t first = 0;
    if (access(ckpt, F_OK) == 0) {
        void *extra;
        size_t elen;
        if ((rc = veer__trainer_load(t, ckpt, fp, &extra, &elen, err)) != 0)
            goto done;
        cv.text = extra;
        cv.len = cv.cap = elen;
        first = t->step;
        if (c->progress)
            fprintf(stderr, "train: resuming from %s at step %llu\n", ckpt,
                    (unsigned long long)first);
    } else if ((rc = curve_add(&cv, "step,seconds,fb_loss,fb_offdiag,fb_diag,orth_loss,actor_q,"
                                    "bellman_heldout\n")) != 0) {
        veer__error_set(err, rc, "--curve", NULL);
        goto done;
    }

    uint64_t eval_every = c->eval_every ? c->eval_every : (c->steps / 50 ? c->steps / 50 : 1);
    uint64_t ckpt_every = c->checkpoint_every ? c->checkpoint_every
                                              : (c->steps / 10 ? c->steps / 10 : 1);
    struct sigaction sa = {0}, old_int, old_term;
    sa.sa_handler = on_signal;
    sigemptyset(&sa.sa_mask);
    interrupted = 0;
    sigaction(SIGINT, &sa, &old_int);
    sigaction(SIGTERM, &sa, &old_term);
    int tty = isatty(2);
    uint64_t t0 = veer__now_ns();
    veer__train_losses sum = {0}, last = {0};
    uint64_t nsum = 0;
    double bellman = NAN;
    if (t->step == 0 && t->nhold >= 2) {
        bellman = veer__trainer_bellman(t);
        char line[256];
        snprintf(line, sizeof line, "0,0,,,,,,%.6g\n", bellman);
        curve_add(&cv, line);
    }
    while (t->step < c->steps && !interrupted) {
        veer__train_losses l;
        if ((rc = veer__trainer_step(t, &l)) != 0) {
            veer__error_set(err, rc, "step", "a training step failed at step %llu",
                            (unsigned long long)t->step);
            break;
        }
        if (!isfinite(l.fb) || !isfinite(l.orth)) {
            rc = veer__error_set(err, VEER_ENONFINITE, "--lr",
                                 "the loss became %g at step %llu; lower the learning rates",
                                 l.fb, (unsigned long long)t->step);
            break;
        }
        sum.fb += l.fb, sum.fb_offdiag += l.fb_offdiag, sum.fb_diag += l.fb_diag;
        sum.orth += l.orth, sum.actor_q += l.actor_q;
        nsum++;
        last = l;
        double secs = (double)(veer__now_ns() - t0) * 1e-9;
        if (t->step % eval_every == 0 || t->step == c->steps) {
            bellman = veer__trainer_bellman(t);
            char line[256];
            snprintf(line, sizeof line, "%llu,%.3f,%.6g,%.6g,%.6g,%.6g,%.6g,%.6g\n",
                     (unsigned long long)t->step, secs, sum.fb / nsum, sum.fb_offdiag / nsum,
                     sum.fb_diag / nsum, sum.orth / nsum, sum.actor_q / nsum, bellman);
            if (curve_add(&cv, line) != 0 || write_text(curvep, cv.text, cv.len, err) != 0) {
                rc = err ? err->code : VEER_EIO;
                break;
            }
            memset(&sum, 0, sizeof sum);
            nsum = 0;
        }
        if (t->step % ckpt_every == 0 && t->step < c->steps &&
            (rc = veer__trainer_save(t, ckpt, fp, cv.text, cv.len, err)) != 0)
            break;
        if (c->progress)
            progress(t->step, c->steps, first, secs, &last, bellman, tty, 0);
    }
    sigaction(SIGINT, &old_int, NULL);
    sigaction(SIGTERM, &old_term, NULL);
    if (c->progress && tty && t->step > first)
        progress(t->step, c->steps, first, (double)(veer__now_ns() - t0) * 1e-9, &last, bellman,
                 tty, 1);
    if (c->progress && tty)
        fputc('\n', stderr);
    if (rc != 0)
        goto done;
    if ((rc = veer__trainer_save(t, ckpt, fp, cv.text, cv.len, err)) != 0)
        goto done;
    if (interrupted) {
        rc = veer__error_set(err, VEER_EIO, "signal",
                             "interrupted at step %llu; the checkpoint %.200s holds it: run the "
                             "same command to resume", (unsigned long long)t->step, ckpt);
        goto done;
    }
    if ((rc = write_text(curvep, cv.text, cv.len, err)) != 0)
        goto done;
    iso_now(created, sizeof created);
    /* Paths stay out of the provenance so the same training gives the same bundle wherever
     * it is written. */
    snprintf(settings, sizeof settings, "%s steps=%llu", core, (unsigned long long)c->steps);
    rc = veer__train_export(t, c->out_path, settings, created, err);
done:
    veer__free(cv.text);
    veer__trainer_destroy(t);
    veer__tlog_free(&log);
    return rc;
}
