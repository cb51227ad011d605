/* `veer top`: a live terminal view of one veerd, redrawn every second from its /metrics:
 * channels and their tasks, act rate, latency percentiles per stage with a small histogram of
 * the last interval, and drift per feature with watch and alarm levels highlighted.
 *
 * Rates and the histogram are differences between two scrapes, so even `--once` scrapes twice,
 * one interval apart. Each frame is built in memory and written with one call after a
 * cursor-home and clear, so the screen does not flicker. Colour (ANSI SGR codes) is used when
 * stdout is a terminal, or as --color says. */
#include <math.h>
#include <signal.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "base/base.h"
#include "cli.h"
#include "cli_metrics.h"

static const char HELP[] =
    "usage: veer top [--http HOST:PORT] [--interval SECONDS] [--once] [--frames N]\n"
    "                [--color auto|always|never] [--timeout-ms N]\n"
    "Shows a live view of veerd from its HTTP /metrics endpoint (veerd --http), redrawn every\n"
    "interval (default 1 s): channels and their tasks, act rate, latency percentiles over the\n"
    "last 10 s and a histogram of the last interval, drift per feature (watch in yellow, alarm\n"
    "in red). Ctrl-C quits.\n"
    "  --http HOST:PORT   veerd's HTTP endpoint (VEER_HTTP; default " VEER_CLI_DEFAULT_HTTP ")\n"
    "  --once             print one frame (two scrapes one interval apart) and exit\n"
    "  --frames N         stop after N frames\n"
    "exit codes: 0 ok, 2 usage, 4 unreachable (with --once)\n";

#define MAX_BUCKETS 64
#define MAX_FEATURE_ROWS 24
#define BAR_WIDTH 40

static volatile sig_atomic_t interrupted;
static void on_sigint(int sig)
{
    (void)sig;
    interrupted = 1;
}

typedef struct screen {
    char *text;
    size_t len, cap;
    int color;
} screen;

static void put(screen *s, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static void put(screen *s, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    int n = vsnprintf(NULL, 0, fmt, ap);
    va_end(ap);
    if (n < 0)
        return;
    if (s->len + (size_t)n + 1 > s->cap) {
        size_t cap = s->cap ? s->cap * 2 : 8192;
        while (cap < s->len + (size_t)n + 1)
            cap *= 2;
        char *t = veer__realloc(s->text, cap);
        if (t == NULL)
            return;
        s->text = t;
        s->cap = cap;
    }
    va_start(ap, fmt);
    vsnprintf(s->text + s->len, (size_t)n + 1, fmt, ap);
    va_end(ap);
    s->len += (size_t)n;
}

/* ANSI SGR: 1 bold, 31 red, 33 yellow, 7 reverse; "" when colour is off. */
static const char *sgr(const screen *s, const char *code)
{
    return s->color ? code : "";
}
#define RESET(s) sgr(s, "\033[0m")

static double get(const veer_cli_metrics *m, const char *name, const char *key, const char *value)
{
    double v = NAN;
    veer_cli_metrics_get(m, name, key, value, &v);
    return v;
}

static const char *level_name(double level)
{
    return level >= 2 ? "ALARM" : level >= 1 ? "watch" : "ok";
}
static const char *level_color(const screen *s, double level)
{
    return level >= 2 ? sgr(s, "\033[1;31m") : level >= 1 ? sgr(s, "\033[33m") : "";
}

static void render_header(screen *s, const char *address, const veer_cli_metrics *cur,
                          const veer_cli_metrics *prev, double dt)
{
    const char *version = "?", *model = "?", *monitors = "?";
    for (size_t i = 0; i < cur->n; i++) {
        if (strcmp(cur->samples[i].name, "veer_info") == 0) {
            const char *v;
            if ((v = veer_cli_sample_label(&cur->samples[i], "version")) != NULL)
                version = v;
            if ((v = veer_cli_sample_label(&cur->samples[i], "model_version")) != NULL)
                model = v;
            if ((v = veer_cli_sample_label(&cur->samples[i], "monitors")) != NULL)
                monitors = v;
        }
    }
    time_t now = time(NULL);
    struct tm tm;
    localtime_r(&now, &tm);
    double ready = get(cur, "veer_ready", NULL, NULL);
    put(s, "%sveer top%s  %s  veerd %s  model %s  monitors %s  %s%s%s  %02d:%02d:%02d\n",
        sgr(s, "\033[1m"), RESET(s), address, version, model, monitors,
        ready == 1 ? "" : sgr(s, "\033[1;31m"), ready == 1 ? "ready" : "NOT READY", RESET(s),
        tm.tm_hour, tm.tm_min, tm.tm_sec);
    double acts = get(cur, "veer_acts_total", NULL, NULL);
    double rate = prev ? (acts - get(prev, "veer_acts_total", NULL, NULL)) / dt : NAN;
    double errors = 0;
    for (size_t i = 0; i < cur->n; i++)
        if (strcmp(cur->samples[i].name, "veer_act_errors_total") == 0)
            errors += cur->samples[i].value;
    double misses = get(cur, "veer_act_deadline_misses_total", NULL, NULL);
    put(s,
        "act rate %.1f/s   acts %.0f   fallbacks %.0f   %sdeadline misses %.0f%s   errors %.0f   "
        "switches %.0f   "
        "miss bursts %.0f\n\n",
        rate, acts, get(cur, "veer_act_fallbacks_total", NULL, NULL),
        misses > 0 ? sgr(s, "\033[33m") : "", misses, RESET(s), errors,
        get(cur, "veer_switches_total", NULL, NULL),
        get(cur, "veer_deadline_bursts_total", NULL, NULL));
}

/* A channel's p99 act time from its histogram buckets: over the last interval, or since start
 * when the interval had no act (NaN without a histogram: channels past the first 16). */
static double channel_p99(const veer_cli_metrics *cur, const veer_cli_metrics *prev, const char *ch)
{
    double le[MAX_BUCKETS], now[MAX_BUCKETS], ble[MAX_BUCKETS], before[MAX_BUCKETS];
    size_t n = veer_cli_metrics_buckets(cur, "veer_channel_act_seconds", "channel", ch, le, now,
                                        MAX_BUCKETS);
    size_t nb = prev ? veer_cli_metrics_buckets(prev, "veer_channel_act_seconds", "channel", ch,
                                                ble, before, MAX_BUCKETS)
                     : 0;
    if (n > 0 && nb == n && now[n - 1] > before[n - 1]) {
        for (size_t i = 0; i < n; i++)
            now[i] -= before[i];
    }
    return veer_cli_bucket_quantile(le, now, n, 0.99);
}

static void render_channels(screen *s, const veer_cli_metrics *cur, const veer_cli_metrics *prev,
                            double dt)
{
    put(s, "%s%-24s %-28s %10s %12s %9s %9s %8s%s\n", sgr(s, "\033[7m"), "CHANNEL", "TASK",
        "ACTS/S", "ACTS", "SWITCHES", "p99", "EXCEED", RESET(s));
    int rows = 0;
    for (size_t i = 0; i < cur->n; i++) {
        const veer_cli_sample *smp = &cur->samples[i];
        if (strcmp(smp->name, "veer_channel_task") != 0)
            continue;
        const char *ch = veer_cli_sample_label(smp, "channel"),
                   *task = veer_cli_sample_label(smp, "task");
        if (ch == NULL || task == NULL)
            continue;
        double acts = get(cur, "veer_channel_acts_total", "channel", ch);
        double before = prev ? get(prev, "veer_channel_acts_total", "channel", ch) : NAN;
        double rate = isfinite(before) ? (acts - before) / dt : NAN;
        char p99[32];
        veer_cli_duration(channel_p99(cur, prev, ch), p99, sizeof p99);
        /* The channel's own exceedance rate ("-" before its first state or without monitors);
         * "!" and the alarm colour when its exceedance alarm is raised. */
        double exceed = NAN, exceed_level = 0;
        veer_cli_metrics_get2(cur, "veer_drift_exceed_rate", "scope", "channel", "channel", ch,
                              &exceed);
        veer_cli_metrics_get2(cur, "veer_drift_exceed_level", "scope", "channel", "channel", ch,
                              &exceed_level);
        char drift[32] = "-";
        if (isfinite(exceed))
            snprintf(drift, sizeof drift, "%.1f%%%s", 100 * exceed, exceed_level >= 2 ? "!" : "");
        put(s, "%-24.24s %-28.28s %10.1f %12.0f %9.0f %9s %s%8s%s\n", ch, task[0] ? task : "(none)",
            rate, acts, get(cur, "veer_channel_switches_total", "channel", ch), p99,
            level_color(s, exceed_level), drift, exceed_level >= 1 ? RESET(s) : "");
        rows++;
    }
    if (rows == 0)
        put(s, "(no channel yet: a supervisor switches one with `veer switch`)\n");
    put(s, "\n");
}

static const char *const STAGES[] = {"decode", "policy", "reply", "total"};

static void render_latency(screen *s, const veer_cli_metrics *cur, const veer_cli_metrics *prev)
{
    put(s, "%s%-8s %10s %9s %9s %9s %9s %9s%s   (last 10 s)\n", sgr(s, "\033[7m"), "STAGE", "COUNT",
        "p50", "p90", "p99", "p99.9", "max", RESET(s));
    static const char *const Q[] = {"0.5", "0.9", "0.99", "0.999", "1"};
    for (size_t st = 0; st < sizeof STAGES / sizeof STAGES[0]; st++) {
        put(s, "%-8s %10.0f", STAGES[st],
            get(cur, "veer_act_stage_recent_count", "stage", STAGES[st]));
        for (size_t q = 0; q < 5; q++) {
            double v = NAN;
            veer_cli_metrics_get2(cur, "veer_act_stage_recent_seconds", "stage", STAGES[st],
                                  "quantile", Q[q], &v);
            char d[32];
            veer_cli_duration(v, d, sizeof d);
            put(s, " %9s", d);
        }
        put(s, "\n");
    }

    /* The histogram of the total time over the last interval, from the cumulative buckets. */
    double le[MAX_BUCKETS], now[MAX_BUCKETS], before[MAX_BUCKETS], ble[MAX_BUCKETS];
    size_t n = veer_cli_metrics_buckets(cur, "veer_act_stage_seconds", "stage", "total", le, now,
                                        MAX_BUCKETS);
    size_t nb = prev ? veer_cli_metrics_buckets(prev, "veer_act_stage_seconds", "stage", "total",
                                                ble, before, MAX_BUCKETS)
                     : 0;
    /* The last interval's requests; when there were none, everything since veerd started. */
    double count[MAX_BUCKETS], top = 0;
    size_t first = n, last = 0;
    int since_start = nb != n;
    for (int pass = 0; pass < 2 && first == n; pass++) {
        since_start = since_start || pass == 1;
        for (size_t i = 0; i < n; i++) {
            double c = now[i] - (i > 0 ? now[i - 1] : 0);
            if (!since_start)
                c -= before[i] - (i > 0 ? before[i - 1] : 0);
            count[i] = c;
            if (c > 0) {
                first = first < i ? first : i;
                last = i;
                top = c > top ? c : top;
            }
        }
    }
    put(s, "\ntotal time, %s:\n",
        since_start ? "requests since start" : "requests in the last interval");
    if (first == n) {
        put(s, "  (no requests)\n\n");
        return;
    }
    for (size_t i = first; i <= last; i++) {
        char lo[32], hi[32];
        veer_cli_duration(i > 0 ? le[i - 1] : 0, lo, sizeof lo);
        if (isinf(le[i]))
            snprintf(hi, sizeof hi, "inf");
        else
            veer_cli_duration(le[i], hi, sizeof hi);
        int w = (int)lround(BAR_WIDTH * count[i] / top);
        if (w == 0 && count[i] > 0)
            w = 1;
        put(s, "  %8s..%-8s |", lo, hi);
        for (int k = 0; k < w; k++)
            put(s, "#");
        put(s, "%*s %.0f\n", BAR_WIDTH - w, "", count[i]);
    }
    put(s, "\n");
}

typedef struct feature_row {
    const char *name;
    double psi, shift, level;
} feature_row;

static int by_psi_desc(const void *a, const void *b)
{
    double x = ((const feature_row *)a)->psi, y = ((const feature_row *)b)->psi;
    return (x < y) - (x > y);
}

static void render_drift(screen *s, const veer_cli_metrics *cur)
{
    double fill = get(cur, "veer_drift_window_states", "scope", "service");
    if (!isfinite(fill)) {
        put(s,
            "drift: not monitored (no training statistics in the bundle, or veerd --monitors 0)\n");
        return;
    }
    double level = get(cur, "veer_drift_level", "scope", "service");
    double exceed = get(cur, "veer_drift_exceed_level", "scope", "service");
    put(s,
        "drift  %slevel %s%s   window %.0f/%.0f   %sexceedance %.1f %% (%s)%s   out of coverage "
        "%.0f in window, "
        "%.0f total\n",
        level_color(s, level), level_name(level), RESET(s), fill,
        get(cur, "veer_drift_window_size", "scope", "service"), level_color(s, exceed),
        100 * get(cur, "veer_drift_exceed_rate", "scope", "service"), level_name(exceed), RESET(s),
        get(cur, "veer_drift_out_of_coverage_window", "scope", "service"),
        get(cur, "veer_drift_out_of_coverage_total", "scope", "service"));

    size_t nf = 0;
    for (size_t i = 0; i < cur->n; i++)
        nf += strcmp(cur->samples[i].name, "veer_drift_psi") == 0;
    feature_row *rows = veer__calloc(nf ? nf : 1, sizeof *rows);
    if (rows == NULL)
        return;
    size_t k = 0;
    for (size_t i = 0; i < cur->n && k < nf; i++) {
        const veer_cli_sample *smp = &cur->samples[i];
        const char *f = veer_cli_sample_label(smp, "feature");
        const char *scope = veer_cli_sample_label(smp, "scope");
        /* The service-wide rows (each channel's own series carry scope="channel"). */
        if (strcmp(smp->name, "veer_drift_psi") != 0 || f == NULL || scope == NULL ||
            strcmp(scope, "service") != 0)
            continue;
        rows[k].name = f;
        rows[k].psi = smp->value;
        rows[k].shift = rows[k].level = NAN;
        veer_cli_metrics_get2(cur, "veer_drift_mean_shift", "scope", "service", "feature", f,
                              &rows[k].shift);
        veer_cli_metrics_get2(cur, "veer_drift_psi_level", "scope", "service", "feature", f,
                              &rows[k].level);
        k++;
    }
    if (k > MAX_FEATURE_ROWS)
        qsort(rows, k, sizeof *rows, by_psi_desc); /* many features: the most drifted first */
    put(s, "%s%-24s %9s %12s  %-6s%s\n", sgr(s, "\033[7m"), "FEATURE", "PSI", "SHIFT (sd)", "LEVEL",
        RESET(s));
    for (size_t i = 0; i < k && i < MAX_FEATURE_ROWS; i++)
        put(s, "%s%-24.24s %9.4f %+12.3f  %-6s%s\n", level_color(s, rows[i].level), rows[i].name,
            rows[i].psi, rows[i].shift, level_name(rows[i].level), RESET(s));
    if (k > MAX_FEATURE_ROWS)
        put(s, "(%zu more features with lower PSI)\n", k - MAX_FEATURE_ROWS);
    veer__free(rows);
}

static void sleep_seconds(double seconds)
{
    struct timespec ts = {.tv_sec = (time_t)seconds,
                          .tv_nsec = (long)((seconds - floor(seconds)) * 1e9)};
    while (!interrupted && nanosleep(&ts, &ts) != 0) {
    }
}

/* Scrapes and parses; returns 0 or an exit code with `why` filled. */
static int scrape(const char *address, uint32_t timeout_ms, veer_cli_metrics *out, char *why,
                  size_t cap)
{
    char *body = NULL;
    int rc = veer_cli_metrics_fetch(address, timeout_ms, &body, why, cap);
    if (rc != 0)
        return rc;
    rc = veer_cli_metrics_parse(body, out, why, cap) == 0 ? 0 : VEER_CLI_REFUSED;
    veer__free(body);
    return rc;
}

static int run(int argc, char **argv)
{
    const char *address = getenv("VEER_HTTP") ? getenv("VEER_HTTP") : VEER_CLI_DEFAULT_HTTP;
    double interval = 1.0;
    long frames = -1;
    int once = 0, color = isatty(STDOUT_FILENO);
    uint32_t timeout_ms = 3000;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i], *v = i + 1 < argc ? argv[i + 1] : NULL;
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            fputs(HELP, stdout);
            return VEER_CLI_OK;
        } else if (strcmp(a, "--once") == 0) {
            once = 1;
        } else if (strcmp(a, "--http") == 0 && v) {
            address = argv[++i];
        } else if (strcmp(a, "--interval") == 0 && v) {
            char *end;
            interval = strtod(argv[++i], &end);
            if (*end != '\0' || !(interval >= 0.1 && interval <= 3600)) {
                fprintf(stderr,
                        "veer top: --interval: expected seconds from 0.1 to 3600, got '%s'\n", v);
                return VEER_CLI_USAGE;
            }
        } else if (strcmp(a, "--frames") == 0 && v) {
            char *end;
            frames = strtol(argv[++i], &end, 10);
            if (*end != '\0' || frames < 1) {
                fprintf(stderr, "veer top: --frames: expected a positive count, got '%s'\n", v);
                return VEER_CLI_USAGE;
            }
        } else if (strcmp(a, "--timeout-ms") == 0 && v) {
            char *end;
            long t = strtol(argv[++i], &end, 10);
            if (*end != '\0' || t < 1 || t > 600000) {
                fprintf(stderr, "veer top: --timeout-ms: expected 1 to 600000, got '%s'\n", v);
                return VEER_CLI_USAGE;
            }
            timeout_ms = (uint32_t)t;
        } else if (strcmp(a, "--color") == 0 && v) {
            v = argv[++i];
            if (strcmp(v, "always") == 0)
                color = 1;
            else if (strcmp(v, "never") == 0)
                color = 0;
            else if (strcmp(v, "auto") != 0) {
                fprintf(stderr, "veer top: --color: expected auto, always or never, got '%s'\n", v);
                return VEER_CLI_USAGE;
            }
        } else {
            fprintf(stderr, "veer top: unknown or incomplete argument '%s'\n%s", a, HELP);
            return VEER_CLI_USAGE;
        }
    }
    if (once)
        frames = 1;
    signal(SIGINT, on_sigint);
    signal(SIGTERM, on_sigint);

    veer_cli_metrics prev = {0}, cur = {0};
    int have_prev = 0;
    char why[512];
    struct timespec t_prev = {0}, t_now;
    int rc = scrape(address, timeout_ms, &prev, why, sizeof why);
    if (rc != 0 && once) {
        fprintf(stderr, "veer top: %s\n", why);
        return rc;
    }
    have_prev = rc == 0;
    clock_gettime(CLOCK_MONOTONIC, &t_prev);
    screen scr = {.color = color};
    for (long frame = 0; !interrupted && (frames < 0 || frame < frames); frame++) {
        sleep_seconds(interval);
        if (interrupted)
            break;
        rc = scrape(address, timeout_ms, &cur, why, sizeof why);
        clock_gettime(CLOCK_MONOTONIC, &t_now);
        double dt = (double)(t_now.tv_sec - t_prev.tv_sec) +
                    1e-9 * (double)(t_now.tv_nsec - t_prev.tv_nsec);
        scr.len = 0;
        if (!once)
            put(&scr, "\033[H\033[2J");
        if (rc != 0) {
            put(&scr, "veer top  %s  %sveerd not reachable%s: %s\n", address,
                sgr(&scr, "\033[1;31m"), RESET(&scr), why);
            if (once) {
                fputs(scr.text, stderr);
                break;
            }
        } else {
            const veer_cli_metrics *p = have_prev ? &prev : NULL;
            render_header(&scr, address, &cur, p, dt);
            render_channels(&scr, &cur, p, dt);
            render_latency(&scr, &cur, p);
            render_drift(&scr, &cur);
            veer_cli_metrics_free(&prev);
            prev = cur;
            memset(&cur, 0, sizeof cur);
            have_prev = 1;
        }
        t_prev = t_now;
        if (scr.text != NULL) {
            fwrite(scr.text, 1, scr.len, stdout);
            fflush(stdout);
        }
    }
    if (color)
        fputs("\033[0m", stdout);
    veer_cli_metrics_free(&prev);
    veer_cli_metrics_free(&cur);
    veer__free(scr.text);
    return rc;
}

const veer_cli_command veer_cli_cmd_top = {
    "top", "live terminal view of veerd's metrics (latency, drift)", run};
