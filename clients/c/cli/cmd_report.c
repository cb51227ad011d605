/* `veer report`: records veerd's /metrics for a while (or reads a recording it wrote earlier)
 * and writes one self-contained SVG page: latency histograms per stage over the recording,
 * latency percentiles and act rate over time, drift statistics over time with the watch and
 * alarm thresholds, and channel switches marked on the time axis.
 *
 * The recording is the scrapes themselves, each preceded by a line "#@frame UNIX_MS". Lines
 * starting with '#' are comments in the exposition format, so every frame stays a valid
 * exposition and the file can be read back, diffed or fed to other tools. Switches come from
 * the switch counter and the channel-task gauge, so the time of a switch is known to one
 * sampling interval; the page says so. The SVG uses no script, font file or external reference,
 * so it opens anywhere and can be attached to an incident note. */
#include <errno.h>
#include <math.h>
#include <signal.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "base/base.h"
#include "cli.h"
#include "cli_metrics.h"

static const char HELP[] =
    "usage: veer report -o PAGE.svg [--http HOST:PORT] [--seconds N] [--interval S]\n"
    "                   [--record FILE]\n"
    "       veer report -o PAGE.svg --from FILE\n"
    "Records veerd's /metrics every interval (default 1 s) for N seconds (default 60), or reads\n"
    "a recording made with --record, and writes one self-contained SVG page: latency histograms\n"
    "per stage, latency and act rate over time, drift (PSI per feature, exceedance rate) over\n"
    "time, and channel switches marked on the time axis.\n"
    "  --http HOST:PORT   veerd's HTTP endpoint (VEER_HTTP; default " VEER_CLI_DEFAULT_HTTP ")\n"
    "  --record FILE      also keep the scrapes in FILE (for --from later)\n"
    "exit codes: 0 ok, 2 usage, 3 recording unreadable or malformed, 4 unreachable\n";

#define FRAME_MARK "#@frame "
#define MAX_BUCKETS 64
#define MAX_LINES 8 /* features drawn in the drift panel: those with the highest PSI */

typedef struct frame {
    double t; /* seconds since the first frame */
    long long unix_ms;
    veer_cli_metrics m;
} frame;

typedef struct recording {
    frame *f;
    size_t n, cap;
} recording;

static void recording_free(recording *r)
{
    for (size_t i = 0; i < r->n; i++)
        veer_cli_metrics_free(&r->f[i].m);
    veer__free(r->f);
    memset(r, 0, sizeof *r);
}

static int add_frame(recording *r, long long unix_ms, const char *text, char *why, size_t cap)
{
    if (r->n == r->cap) {
        size_t c = r->cap ? 2 * r->cap : 64;
        frame *g = veer__realloc(r->f, c * sizeof *g);
        if (g == NULL) {
            snprintf(why, cap, "out of memory");
            return -1;
        }
        r->f = g;
        r->cap = c;
    }
    frame *fr = &r->f[r->n];
    memset(fr, 0, sizeof *fr);
    if (veer_cli_metrics_parse(text, &fr->m, why, cap) != 0)
        return -1;
    fr->unix_ms = unix_ms;
    fr->t = r->n ? (double)(unix_ms - r->f[0].unix_ms) / 1000.0 : 0.0;
    r->n++;
    return 0;
}

static long long unix_ms_now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (long long)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

static char *read_file(const char *path, char *why, size_t cap)
{
    FILE *f = fopen(path, "rb");
    if (f == NULL) {
        snprintf(why, cap, "cannot open '%s': %s", path, strerror(errno));
        return NULL;
    }
    size_t len = 0, size = 1 << 16;
    char *text = veer__malloc(size);
    while (text != NULL) {
        size_t n = fread(text + len, 1, size - len - 1, f);
        len += n;
        if (n == 0)
            break;
        if (len + 1 == size) {
            char *g = veer__realloc(text, size * 2);
            if (g == NULL) {
                veer__free(text);
                text = NULL;
                break;
            }
            text = g;
            size *= 2;
        }
    }
    int bad = ferror(f);
    fclose(f);
    if (text == NULL || bad) {
        snprintf(why, cap, "cannot read '%s'", path);
        veer__free(text);
        return NULL;
    }
    text[len] = '\0';
    return text;
}

/* Splits a recording into frames at the "#@frame" lines. */
static int load_recording(const char *path, recording *r, char *why, size_t cap)
{
    char *text = read_file(path, why, cap);
    if (text == NULL)
        return -1;
    int rc = 0;
    char *p = text;
    if (strncmp(p, FRAME_MARK, strlen(FRAME_MARK)) != 0) {
        snprintf(why, cap, "'%s' is not a veer report recording (it must start with '%s')", path,
                 FRAME_MARK);
        rc = -1;
    }
    while (rc == 0 && p != NULL && *p) {
        char *end = NULL;
        long long ms = strtoll(p + strlen(FRAME_MARK), &end, 10);
        if (end == p + strlen(FRAME_MARK) || (*end != '\n' && *end != '\0')) {
            snprintf(why, cap, "'%s': frame %zu has no time after '%s'", path, r->n + 1,
                     FRAME_MARK);
            rc = -1;
            break;
        }
        char *body = *end ? end + 1 : end;
        char *next = strstr(body, "\n" FRAME_MARK);
        if (next != NULL)
            *next = '\0';
        char inner[256];
        if (add_frame(r, ms, body, inner, sizeof inner) != 0) {
            snprintf(why, cap, "'%s': frame %zu: %s", path, r->n + 1, inner);
            rc = -1;
        }
        p = next ? next + 1 : NULL;
    }
    if (rc == 0 && r->n == 0) {
        snprintf(why, cap, "'%s' holds no frame", path);
        rc = -1;
    }
    veer__free(text);
    return rc;
}

/* ---- the page ------------------------------------------------------------------------------ */

#define PAGE_W 1100
#define LEFT 90
#define RIGHT 1060
#define PANEL_H 170
#define GAP 70

typedef struct svg {
    FILE *out;
} svg;

static void esc(FILE *out, const char *s)
{
    for (; *s; s++) {
        switch (*s) {
        case '&':
            fputs("&amp;", out);
            break;
        case '<':
            fputs("&lt;", out);
            break;
        case '>':
            fputs("&gt;", out);
            break;
        case '"':
            fputs("&quot;", out);
            break;
        default:
            fputc(*s, out);
        }
    }
}

static void text(FILE *out, double x, double y, const char *anchor, int size, const char *fmt, ...)
    __attribute__((format(printf, 6, 7)));
static void text(FILE *out, double x, double y, const char *anchor, int size, const char *fmt, ...)
{
    char buf[512];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    fprintf(out, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"%s\" font-size=\"%d\">", x, y, anchor,
            size);
    esc(out, buf);
    fputs("</text>\n", out);
}

static double metric(const veer_cli_metrics *m, const char *name, const char *k, const char *v)
{
    double x = NAN;
    veer_cli_metrics_get(m, name, k, v, &x);
    return x;
}

/* A panel with a time axis: frame, title, y ticks. Returns the top y. */
typedef struct panel {
    double top, ymin, ymax, tmax;
} panel;

static double px(const panel *p, double t)
{
    return LEFT + (RIGHT - LEFT) * (p->tmax > 0 ? t / p->tmax : 0.5);
}
static double py(const panel *p, double v)
{
    double f = p->ymax > p->ymin ? (v - p->ymin) / (p->ymax - p->ymin) : 0;
    f = f < 0 ? 0 : f > 1 ? 1 : f;
    return p->top + PANEL_H * (1 - f);
}

static void panel_frame(FILE *out, const panel *p, const char *title, const char *unit,
                        double scale)
{
    text(out, LEFT, p->top - 10, "start", 14, "%s", title);
    fprintf(
        out,
        "<rect x=\"%d\" y=\"%.1f\" width=\"%d\" height=\"%d\" fill=\"#fafafa\" stroke=\"#999\"/>\n",
        LEFT, p->top, RIGHT - LEFT, PANEL_H);
    for (int k = 0; k <= 4; k++) {
        double v = p->ymin + (p->ymax - p->ymin) * k / 4.0;
        double y = py(p, v);
        fprintf(out, "<line x1=\"%d\" y1=\"%.1f\" x2=\"%d\" y2=\"%.1f\" stroke=\"#e4e4e4\"/>\n",
                LEFT, y, RIGHT, y);
        text(out, LEFT - 6, y + 4, "end", 10, "%.3g%s", v * scale, unit);
    }
    for (int k = 0; k <= 6; k++) {
        double t = p->tmax * k / 6.0;
        text(out, px(p, t), p->top + PANEL_H + 14, "middle", 10, "%.0f s", t);
    }
}

static void polyline(FILE *out, const panel *p, const double *t, const double *v, size_t n,
                     const char *color, const char *dash)
{
    fprintf(out, "<polyline fill=\"none\" stroke=\"%s\" stroke-width=\"1.5\"%s%s%s points=\"",
            color, dash ? " stroke-dasharray=\"" : "", dash ? dash : "", dash ? "\"" : "");
    for (size_t i = 0; i < n; i++)
        if (isfinite(v[i]))
            fprintf(out, "%.1f,%.1f ", px(p, t[i]), py(p, v[i]));
    fputs("\"/>\n", out);
}

static const char *const STAGES[] = {"decode", "policy", "reply", "total"};
static const char *const COLORS[] = {"#1f77b4", "#d62728", "#2ca02c", "#9467bd",
                                     "#ff7f0e", "#8c564b", "#e377c2", "#17becf"};

static void latency_histograms(FILE *out, const recording *r, double top)
{
    const veer_cli_metrics *first = &r->f[0].m, *last = &r->f[r->n - 1].m;
    fprintf(out, "<g id=\"latency-histograms\">\n");
    text(out, LEFT, top - 30, "start", 16, "Latency per stage over the recording (%s)",
         r->n > 1 ? "requests between the first and the last scrape" : "since veerd started");
    double w = (RIGHT - LEFT - 3 * 30) / 4.0;
    for (size_t s = 0; s < 4; s++) {
        double le[MAX_BUCKETS], a[MAX_BUCKETS], ble[MAX_BUCKETS], b[MAX_BUCKETS] = {0};
        size_t n = veer_cli_metrics_buckets(last, "veer_act_stage_seconds", "stage", STAGES[s], le,
                                            a, MAX_BUCKETS);
        size_t nb = r->n > 1 ? veer_cli_metrics_buckets(first, "veer_act_stage_seconds", "stage",
                                                        STAGES[s], ble, b, MAX_BUCKETS)
                             : 0;
        double cum[MAX_BUCKETS], cnt[MAX_BUCKETS], top_count = 0;
        size_t lo = n, hi = 0;
        for (size_t i = 0; i < n; i++) {
            cum[i] = a[i] - (nb == n ? b[i] : 0);
            cnt[i] = cum[i] - (i ? cum[i - 1] : 0);
            if (cnt[i] > 0) {
                lo = lo < i ? lo : i;
                hi = i;
                top_count = cnt[i] > top_count ? cnt[i] : top_count;
            }
        }
        double x0 = LEFT + s * (w + 30);
        fprintf(out, "<g id=\"latency-%s\">\n", STAGES[s]);
        text(out, x0, top - 8, "start", 13, "%s", STAGES[s]);
        fprintf(out,
                "<rect x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%d\" fill=\"#fafafa\" "
                "stroke=\"#999\"/>\n",
                x0, top, w, PANEL_H);
        if (lo == n) {
            text(out, x0 + w / 2, top + PANEL_H / 2.0, "middle", 11, "no requests recorded");
        } else {
            size_t bars = hi - lo + 1;
            double bw = w / (double)bars;
            for (size_t i = lo; i <= hi; i++) {
                double h = (PANEL_H - 20) * cnt[i] / top_count;
                double bx = x0 + (double)(i - lo) * bw;
                char label[32];
                veer_cli_duration(le[i], label, sizeof label);
                fprintf(out,
                        "<rect x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\" fill=\"%s\">"
                        "<title>le %s: %.0f</title></rect>\n",
                        bx + 1, top + PANEL_H - h, bw - 2, h, COLORS[s], label, cnt[i]);
                if (bars <= 8 || (i - lo) % 2 == 0)
                    text(out, bx + bw / 2, top + PANEL_H + 12, "middle", 8, "%s", label);
            }
            char p50[32], p99[32];
            veer_cli_duration(veer_cli_bucket_quantile(le, cum, n, 0.5), p50, sizeof p50);
            veer_cli_duration(veer_cli_bucket_quantile(le, cum, n, 0.99), p99, sizeof p99);
            text(out, x0 + w - 4, top + 14, "end", 10, "n %.0f  p50 ~%s  p99 ~%s", cum[n - 1], p50,
                 p99);
        }
        fprintf(out, "</g>\n");
    }
    fprintf(out, "</g>\n");
}

static void series(const recording *r, const char *name, const char *k1, const char *v1,
                   const char *k2, const char *v2, double *t, double *v)
{
    for (size_t i = 0; i < r->n; i++) {
        t[i] = r->f[i].t;
        v[i] = NAN;
        veer_cli_metrics_get2(&r->f[i].m, name, k1, v1, k2, v2, &v[i]);
    }
}

static double max_of(const double *v, size_t n, double floor_value)
{
    double m = floor_value;
    for (size_t i = 0; i < n; i++)
        if (isfinite(v[i]) && v[i] > m)
            m = v[i];
    return m;
}

static void latency_over_time(FILE *out, const recording *r, double *t, double *v, double top,
                              double tmax)
{
    double *p99 = veer__calloc(r->n, sizeof *p99);
    if (p99 == NULL)
        return;
    series(r, "veer_act_stage_recent_seconds", "stage", "total", "quantile", "0.5", t, v);
    series(r, "veer_act_stage_recent_seconds", "stage", "total", "quantile", "0.99", t, p99);
    panel p = {.top = top, .ymin = 0, .ymax = max_of(p99, r->n, 1e-6) * 1.1, .tmax = tmax};
    fprintf(out, "<g id=\"latency-over-time\">\n");
    panel_frame(out, &p,
                "Total act time over the last 10 s at each scrape: p50 (solid), p99 (dashed)", "us",
                1e6);
    polyline(out, &p, t, v, r->n, COLORS[0], NULL);
    polyline(out, &p, t, p99, r->n, COLORS[1], "6,3");
    fprintf(out, "</g>\n");
    veer__free(p99);
}

static void act_rate(FILE *out, const recording *r, double *t, double *v, double top, double tmax)
{
    double prev = NAN;
    for (size_t i = 0; i < r->n; i++) {
        double acts = metric(&r->f[i].m, "veer_acts_total", NULL, NULL);
        t[i] = r->f[i].t;
        v[i] =
            i > 0 && r->f[i].t > r->f[i - 1].t ? (acts - prev) / (r->f[i].t - r->f[i - 1].t) : NAN;
        prev = acts;
    }
    panel p = {.top = top, .ymin = 0, .ymax = max_of(v, r->n, 1) * 1.1, .tmax = tmax};
    fprintf(out, "<g id=\"act-rate\">\n");
    panel_frame(out, &p, "Act rate (requests answered per second)", "/s", 1);
    polyline(out, &p, t, v, r->n, COLORS[2], NULL);
    fprintf(out, "</g>\n");
}

typedef struct feature {
    const char *name;
    double peak;
} feature;

static int by_peak_desc(const void *a, const void *b)
{
    double x = ((const feature *)a)->peak, y = ((const feature *)b)->peak;
    return (x < y) - (x > y);
}

static void drift_over_time(FILE *out, const recording *r, double *t, double *v, double top,
                            double tmax)
{
    const veer_cli_metrics *last = &r->f[r->n - 1].m;
    size_t nf = 0;
    for (size_t i = 0; i < last->n; i++)
        nf += strcmp(last->samples[i].name, "veer_drift_psi") == 0;
    fprintf(out, "<g id=\"drift-over-time\">\n");
    panel p = {.top = top, .ymin = 0, .ymax = 0.3, .tmax = tmax};
    feature *fs = veer__calloc(nf ? nf : 1, sizeof *fs);
    size_t k = 0;
    for (size_t i = 0; fs != NULL && i < last->n && k < nf; i++) {
        const char *f = veer_cli_sample_label(&last->samples[i], "feature");
        const char *scope = veer_cli_sample_label(&last->samples[i], "scope");
        /* The service-wide series only (per-channel ones, scope="channel", follow them). */
        if (strcmp(last->samples[i].name, "veer_drift_psi") != 0 || f == NULL || scope == NULL ||
            strcmp(scope, "service") != 0)
            continue;
        series(r, "veer_drift_psi", "feature", f, NULL, NULL, t, v);
        fs[k].name = f;
        fs[k].peak = max_of(v, r->n, 0);
        p.ymax = fs[k].peak * 1.1 > p.ymax ? fs[k].peak * 1.1 : p.ymax;
        k++;
    }
    qsort(fs, k, sizeof *fs, by_peak_desc);
    panel_frame(out, &p,
                "Drift: PSI per feature (the highest ones), watch at 0.10 and alarm at 0.25", "",
                1);
    if (k == 0)
        text(out, (LEFT + RIGHT) / 2.0, top + PANEL_H / 2.0, "middle", 12,
             "no drift statistics (bundle without training statistics, or veerd --monitors 0)");
    for (size_t lvl = 0; lvl < 2; lvl++) {
        double y = py(&p, lvl ? 0.25 : 0.10);
        fprintf(out,
                "<line x1=\"%d\" y1=\"%.1f\" x2=\"%d\" y2=\"%.1f\" stroke=\"%s\" "
                "stroke-dasharray=\"4,4\"/>\n",
                LEFT, y, RIGHT, y, lvl ? "#d62728" : "#e0a000");
    }
    for (size_t i = 0; i < k && i < MAX_LINES; i++) {
        series(r, "veer_drift_psi", "feature", fs[i].name, NULL, NULL, t, v);
        polyline(out, &p, t, v, r->n, COLORS[i % 8], NULL);
        fprintf(out, "<rect x=\"%d\" y=\"%.1f\" width=\"10\" height=\"10\" fill=\"%s\"/>\n",
                RIGHT + 8, top + 14.0 * (double)i, COLORS[i % 8]);
        text(out, RIGHT + 22, top + 9 + 14.0 * (double)i, "start", 10, "%s (peak %.3f)", fs[i].name,
             fs[i].peak);
    }
    fprintf(out, "</g>\n");
    veer__free(fs);

    series(r, "veer_drift_exceed_rate", "scope", "service", NULL, NULL, t, v);
    panel e = {
        .top = top + PANEL_H + GAP, .ymin = 0, .ymax = max_of(v, r->n, 0.04) * 1.1, .tmax = tmax};
    fprintf(out, "<g id=\"exceedance-over-time\">\n");
    panel_frame(out, &e,
                "Share of window states beyond the training p99 distance (about 1 % without drift; "
                "alarm at 3 %)",
                "%", 100);
    for (size_t lvl = 0; lvl < 2; lvl++) {
        double y = py(&e, lvl ? 0.03 : 0.01);
        fprintf(out,
                "<line x1=\"%d\" y1=\"%.1f\" x2=\"%d\" y2=\"%.1f\" stroke=\"%s\" "
                "stroke-dasharray=\"4,4\"/>\n",
                LEFT, y, RIGHT, y, lvl ? "#d62728" : "#999");
    }
    polyline(out, &e, t, v, r->n, COLORS[3], NULL);
    fprintf(out, "</g>\n");
}

/* Vertical marks where the switch counter grew, labelled with the channels whose task changed. */
static void switch_marks(FILE *out, const recording *r, double top, double bottom, double tmax)
{
    panel p = {.top = top, .tmax = tmax};
    fprintf(out, "<g id=\"switches\">\n");
    int marks = 0;
    for (size_t i = 1; i < r->n; i++) {
        double before = metric(&r->f[i - 1].m, "veer_switches_total", NULL, NULL);
        double now = metric(&r->f[i].m, "veer_switches_total", NULL, NULL);
        if (!(now > before))
            continue;
        double x = px(&p, r->f[i].t);
        fprintf(out,
                "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"#444\" "
                "stroke-width=\"1\" "
                "stroke-dasharray=\"2,3\"/>\n",
                x, top, x, bottom);
        char label[256] = "";
        size_t used = 0;
        const veer_cli_metrics *m = &r->f[i].m;
        for (size_t k = 0; k < m->n && used + 1 < sizeof label; k++) {
            if (strcmp(m->samples[k].name, "veer_channel_switches_total") != 0)
                continue;
            const char *ch = veer_cli_sample_label(&m->samples[k], "channel");
            double was =
                ch ? metric(&r->f[i - 1].m, "veer_channel_switches_total", "channel", ch) : NAN;
            if (ch == NULL || (isfinite(was) && !(m->samples[k].value > was)))
                continue;
            const char *task = "";
            for (size_t j = 0; j < m->n; j++) {
                const char *c2 = veer_cli_sample_label(&m->samples[j], "channel");
                if (strcmp(m->samples[j].name, "veer_channel_task") == 0 && c2 &&
                    strcmp(c2, ch) == 0)
                    task = veer_cli_sample_label(&m->samples[j], "task");
            }
            used += (size_t)snprintf(label + used, sizeof label - used, "%s%s -> %s",
                                     used ? ", " : "", ch, task ? task : "");
        }
        fprintf(out, "<g class=\"switch\">");
        text(out, x + 3, top + 10 + 12.0 * (marks % 4), "start", 10, "switch +%.0f: %s",
             now - before, label);
        fprintf(out, "</g>\n");
        marks++;
    }
    fprintf(out, "</g>\n");
}

static int write_page(const char *path, const recording *r, const char *source)
{
    FILE *out = fopen(path, "w");
    if (out == NULL) {
        fprintf(stderr, "veer report: cannot write '%s': %s\n", path, strerror(errno));
        return VEER_CLI_INPUT;
    }
    double *t = veer__calloc(r->n, sizeof *t), *v = veer__calloc(r->n, sizeof *v);
    if (t == NULL || v == NULL) {
        fclose(out);
        veer__free(t);
        veer__free(v);
        fprintf(stderr, "veer report: out of memory\n");
        return VEER_CLI_INPUT;
    }
    double tmax = r->f[r->n - 1].t;
    const int hist_top = 110, over_top = hist_top + PANEL_H + GAP + 10;
    const int page_h = over_top + 4 * (PANEL_H + GAP) + 40;
    fprintf(
        out,
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n"
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"%d\" height=\"%d\" viewBox=\"0 0 %d "
        "%d\" "
        "font-family=\"sans-serif\">\n<rect width=\"100%%\" height=\"100%%\" fill=\"white\"/>\n",
        PAGE_W + 140, page_h, PAGE_W + 140, page_h);
    const char *version = "?", *model = "?";
    const veer_cli_metrics *last = &r->f[r->n - 1].m;
    for (size_t i = 0; i < last->n; i++) {
        if (strcmp(last->samples[i].name, "veer_info") == 0) {
            const char *a = veer_cli_sample_label(&last->samples[i], "version");
            const char *b = veer_cli_sample_label(&last->samples[i], "model_version");
            version = a ? a : "?";
            model = b ? b : "?";
        }
    }
    time_t t0 = (time_t)(r->f[0].unix_ms / 1000);
    struct tm tm;
    gmtime_r(&t0, &tm);
    char when[64];
    strftime(when, sizeof when, "%Y-%m-%d %H:%M:%S UTC", &tm);
    fprintf(out, "<g id=\"header\">\n");
    text(out, LEFT, 36, "start", 22, "veer report: model %s, veerd %s", model, version);
    text(out, LEFT, 60, "start", 12,
         "%zu scrapes from %s over %.0f s (%s). Switch times are known to one scrape "
         "interval.",
         r->n, when, tmax, source);
    fprintf(out, "</g>\n");
    latency_histograms(out, r, hist_top);
    latency_over_time(out, r, t, v, over_top, tmax);
    act_rate(out, r, t, v, over_top + PANEL_H + GAP, tmax);
    drift_over_time(out, r, t, v, over_top + 2 * (PANEL_H + GAP), tmax);
    switch_marks(out, r, over_top, over_top + 3 * (PANEL_H + GAP) + PANEL_H, tmax);
    fputs("</svg>\n", out);
    veer__free(t);
    veer__free(v);
    if (fclose(out) != 0) {
        fprintf(stderr, "veer report: cannot write '%s': %s\n", path, strerror(errno));
        return VEER_CLI_INPUT;
    }
    return VEER_CLI_OK;
}

static volatile sig_atomic_t interrupted;
static void on_sigint(int sig)
{
    (void)sig;
    interrupted = 1;
}

/* Scrapes `seconds` long every `interval`, keeping each scrape (and writing it to `record`). */
static int record_frames(const char *address, double seconds, double interval,
                         const char *record_path, recording *r)
{
    FILE *rec = NULL;
    if (record_path != NULL && (rec = fopen(record_path, "w")) == NULL) {
        fprintf(stderr, "veer report: cannot write '%s': %s\n", record_path, strerror(errno));
        return VEER_CLI_INPUT;
    }
    signal(SIGINT, on_sigint);
    char why[512];
    int rc = 0;
    long long start = unix_ms_now();
    for (long k = 0; !interrupted; k++) {
        long long due = start + (long long)llround(k * interval * 1000);
        if ((double)(due - start) > seconds * 1000 + 1)
            break;
        for (long long now = unix_ms_now(); now < due && !interrupted; now = unix_ms_now()) {
            struct timespec ts = {.tv_sec = (due - now) / 1000,
                                  .tv_nsec = ((due - now) % 1000) * 1000000};
            nanosleep(&ts, NULL);
        }
        char *body = NULL;
        long long at = unix_ms_now();
        rc = veer_cli_metrics_fetch(address,
                                    (uint32_t)(interval * 1000 > 2000 ? interval * 1000 : 2000),
                                    &body, why, sizeof why);
        if (rc != 0) {
            fprintf(stderr, "veer report: %s%s\n", why,
                    r->n ? "; the page shows the scrapes made before" : "");
            if (r->n > 0)
                rc = 0; /* veerd went away mid-recording: what was recorded still makes a page */
            break;
        }
        if (add_frame(r, at, body, why, sizeof why) != 0) {
            fprintf(stderr, "veer report: scrape %ld: %s\n", k + 1, why);
            veer__free(body);
            rc = VEER_CLI_REFUSED;
            break;
        }
        if (rec != NULL)
            fprintf(rec, FRAME_MARK "%lld\n%s%s", at, body,
                    body[0] && body[strlen(body) - 1] != '\n' ? "\n" : "");
        veer__free(body);
    }
    if (rec != NULL && fclose(rec) != 0) {
        fprintf(stderr, "veer report: cannot write '%s': %s\n", record_path, strerror(errno));
        rc = VEER_CLI_INPUT;
    }
    /* Interrupted with frames in hand: write the page from what was recorded. */
    return r->n > 0 && (rc == 0 || interrupted) ? 0 : rc;
}

static int parse_seconds(const char *flag, const char *v, double lo, double hi, double *out)
{
    char *end = NULL;
    double x = strtod(v, &end);
    if (*end != '\0' || !(x >= lo && x <= hi)) {
        fprintf(stderr, "veer report: %s: expected seconds from %g to %g, got '%s'\n", flag, lo, hi,
                v);
        return VEER_CLI_USAGE;
    }
    *out = x;
    return 0;
}

static int run(int argc, char **argv)
{
    const char *address = getenv("VEER_HTTP") ? getenv("VEER_HTTP") : VEER_CLI_DEFAULT_HTTP;
    const char *out = NULL, *from = NULL, *record = NULL;
    double seconds = 60, interval = 1;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i], *v = i + 1 < argc ? argv[i + 1] : NULL;
        int rc = 0;
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            fputs(HELP, stdout);
            return VEER_CLI_OK;
        } else if ((strcmp(a, "-o") == 0 || strcmp(a, "--out") == 0) && v) {
            out = argv[++i];
        } else if (strcmp(a, "--from") == 0 && v) {
            from = argv[++i];
        } else if (strcmp(a, "--record") == 0 && v) {
            record = argv[++i];
        } else if (strcmp(a, "--http") == 0 && v) {
            address = argv[++i];
        } else if (strcmp(a, "--seconds") == 0 && v) {
            rc = parse_seconds(a, argv[++i], 0, 86400, &seconds);
        } else if (strcmp(a, "--interval") == 0 && v) {
            rc = parse_seconds(a, argv[++i], 0.1, 3600, &interval);
        } else {
            fprintf(stderr, "veer report: unknown or incomplete argument '%s'\n%s", a, HELP);
            return VEER_CLI_USAGE;
        }
        if (rc != 0)
            return rc;
    }
    if (out == NULL) {
        fprintf(stderr, "veer report: -o PAGE.svg is required\n%s", HELP);
        return VEER_CLI_USAGE;
    }
    if (from != NULL && record != NULL) {
        fprintf(stderr,
                "veer report: --from reads a recording; --record writes one: give one of them\n");
        return VEER_CLI_USAGE;
    }
    recording r = {0};
    int rc;
    if (from != NULL) {
        char why[512];
        rc = load_recording(from, &r, why, sizeof why) == 0 ? 0 : VEER_CLI_INPUT;
        if (rc != 0)
            fprintf(stderr, "veer report: %s\n", why);
    } else {
        rc = record_frames(address, seconds, interval, record, &r);
    }
    if (rc == 0)
        rc = write_page(out, &r, from ? from : address);
    if (rc == 0)
        printf("veer report: %zu scrapes over %.0f s written to %s\n", r.n,
               r.n ? r.f[r.n - 1].t : 0.0, out);
    recording_free(&r);
    return rc;
}

const veer_cli_command veer_cli_cmd_report = {
    "report", "record veerd's metrics and write an SVG report", run};
