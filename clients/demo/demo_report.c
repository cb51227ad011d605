/* The demo's picture: one SVG file with the gripper's path under each task, the act round-trip
 * histogram, and the drift gauges over time.
 *
 * Written by hand as SVG text (no plotting library in C is packaged for Debian that fits in a
 * few lines); every number drawn comes from the run's records (demo_run.h): the controller's
 * per-tick latencies, flags and gripper positions, the supervisor's switch records and its
 * once-a-second readings of veerd's /metrics.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "bench.h"
#include "demo_run.h"
#include "veer/runtime.h"

static const char *const task_colour[VEER_ARM_TASK_COUNT] = {
    "#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2",
};

/* One small panel: the bench (bins, keep-out zone, bench top) and the gripper's path during
 * every segment of task `task`; before the parcel change in the task's colour, after it dashed. */
static void trajectory_panel(FILE *f, const veer_demo_run *run, int task, double px, double py,
                             double size)
{
    const double span = 0.80; /* metres from the shoulder shown each way */
    double s = size / (2 * span);
#define X(x) (px + ((x) + span) * s)
#define Y(y) (py + (span - (y)) * s)
    fprintf(
        f, "<g><rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#fafafa' stroke='#ccc'/>\n",
        px, py, size, size);
    fprintf(f, "<text x='%.1f' y='%.1f' font-size='13' fill='%s'>%s</text>\n", px + 4, py + 15,
            task_colour[task], veer_arm_tasks[task].name);
    const veer_bench_zone *z = &veer_bench_keepout;
    fprintf(f,
            "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#f4cccc' stroke='#c00' "
            "stroke-dasharray='3,2'/>\n",
            X(z->x_min), Y(z->y_max), (z->x_max - z->x_min) * s, (z->y_max - z->y_min) * s);
    fprintf(f, "<line x1='%.1f' y1='%.1f' x2='%.1f' y2='%.1f' stroke='#888'/>\n", X(-span),
            Y(VEER_BENCH_TOP_Y), X(span), Y(VEER_BENCH_TOP_Y));
    for (int b = 0; b < VEER_BENCH_BIN_COUNT; b++) {
        const veer_bench_bin *bin = &veer_bench_bins[b];
        int target = veer_arm_tasks[task].bin == b;
        fprintf(f, "<circle cx='%.1f' cy='%.1f' r='%.1f' fill='%s' stroke='#555'/>\n", X(bin->x),
                Y(bin->y), VEER_BENCH_NEAR_RADIUS * s, target ? "#ffe08a" : "none");
    }
    fprintf(f, "<circle cx='%.1f' cy='%.1f' r='3' fill='#333'/>\n", X(0.0), Y(0.0));
    long points = run->ticks / VEER_DEMO_TRACE_EVERY;
    long done = atomic_load(&run->ticks_done) / VEER_DEMO_TRACE_EVERY;
    int open = 0, open_heavy = 0;
    for (long i = 0; i < points && i < done; i++) {
        long tick = i * VEER_DEMO_TRACE_EVERY;
        int here = veer_demo_task_at_epoch(run, run->epoch[tick]) == task;
        int heavy = tick >= run->heavy_tick && tick < run->light_tick;
        if (open && (!here || heavy != open_heavy)) {
            fprintf(f, "'/>\n");
            open = 0;
        }
        if (here && !open) {
            fprintf(f, "<polyline fill='none' stroke='%s' stroke-width='1.4'%s points='",
                    task_colour[task], heavy ? " stroke-dasharray='4,2'" : "");
            open = 1;
            open_heavy = heavy;
        }
        if (here)
            fprintf(f, "%.1f,%.1f ", X(run->trace[VEER_ARM_OBS_DIM * i + VEER_ARM_GRIP_X]),
                    Y(run->trace[VEER_ARM_OBS_DIM * i + VEER_ARM_GRIP_Y]));
    }
    if (open)
        fprintf(f, "'/>\n");
    fprintf(f, "</g>\n");
#undef X
#undef Y
}

static void latency_panel(FILE *f, const veer_demo_run *run, double px, double py, double w,
                          double h)
{
    /* Log-spaced bins from 10 µs to 100 ms, 8 per decade. */
    enum { NB = 32 };
    long counts[NB + 1] = {0}, total = 0, misses = 0, maxc = 1;
    long done = atomic_load(&run->ticks_done);
    for (long k = 0; k < done; k++) {
        double us = run->latency_us[k] > 0 ? run->latency_us[k] : 1;
        int b = (int)floor(8.0 * (log10(us) - 1.0));
        b = b < 0 ? 0 : (b > NB ? NB : b);
        counts[b]++;
        total++;
        misses += (run->flags[k] & VEER_ACT_DEADLINE) != 0;
    }
    for (int b = 0; b <= NB; b++)
        maxc = counts[b] > maxc ? counts[b] : maxc;
    fprintf(f,
            "<g><text x='%.1f' y='%.1f' font-size='14'>Act round trip (controller to veerd and "
            "back), %ld acts, %ld past the %u us deadline</text>\n",
            px, py - 8, total, misses, run->opt.deadline_us);
    fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='none' stroke='#ccc'/>\n",
            px, py, w, h);
    double bw = w / (NB + 1);
    for (int b = 0; b <= NB; b++) {
        if (counts[b] == 0)
            continue;
        /* Bar heights on a log scale so a handful of slow acts stay visible. */
        double bh = (h - 20) * log10(1.0 + counts[b]) / log10(1.0 + maxc);
        fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#4c72b0'/>\n",
                px + b * bw + 1, py + h - bh, bw - 2, bh);
    }
    for (int dec = 1; dec <= 5; dec++) {
        double x = px + (dec - 1) * 8 * bw;
        static const char *const lab[] = {"", "10 us", "100 us", "1 ms", "10 ms", "100 ms"};
        fprintf(f, "<text x='%.1f' y='%.1f' font-size='11' fill='#555'>%s</text>\n", x, py + h + 13,
                lab[dec]);
        fprintf(f, "<line x1='%.1f' y1='%.1f' x2='%.1f' y2='%.1f' stroke='#ddd'/>\n", x, py, x,
                py + h);
    }
    double dl = px + 8 * bw * (log10((double)run->opt.deadline_us) - 1.0);
    fprintf(f,
            "<line x1='%.1f' y1='%.1f' x2='%.1f' y2='%.1f' stroke='#c00' stroke-dasharray='5,3'/>"
            "<text x='%.1f' y='%.1f' font-size='11' fill='#c00'>deadline</text>\n",
            dl, py, dl, py + h, dl + 3, py + 12);
    fprintf(f,
            "<text x='%.1f' y='%.1f' font-size='11' fill='#555'>bar height: log(1 + count); "
            "tallest %ld</text></g>\n",
            px + w - 210, py + 12, maxc);
}

static void drift_panel(FILE *f, const veer_demo_run *run, double px, double py, double w, double h)
{
    double dur = run->opt.duration_s;
    fprintf(f,
            "<g><text x='%.1f' y='%.1f' font-size='14'>Drift seen by veerd (read from /metrics "
            "once a second)</text>\n",
            px, py - 8);
    fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='none' stroke='#ccc'/>\n",
            px, py, w, h);
    /* Task bands along the top. */
    for (int i = 0; i < run->nswitches; i++) {
        double t0 = run->switches[i].tick / 1000.0;
        double t1 = i + 1 < run->nswitches ? run->switches[i + 1].tick / 1000.0 : dur;
        fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='8' fill='%s' opacity='0.7'/>\n",
                px + w * t0 / dur, py, w * (t1 - t0) / dur, task_colour[run->switches[i].task]);
    }
    double hx = px + w * (run->heavy_tick / 1000.0) / dur;
    double lx = px + w * (run->light_tick / 1000.0) / dur;
    if (lx > px + w)
        lx = px + w;
    fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#000' opacity='0.06'/>"
               "<text x='%.1f' y='%.1f' font-size='11'>%.0f kg parcel</text>\n",
            hx, py + 8, lx - hx, h - 8, hx + 3, py + 22, run->opt.heavy_mass_kg);
    /* Share of states beyond the training p99 distance, 0..max(10 %, observed). */
    double top = 0.10;
    for (int i = 0; i < run->ndrift; i++)
        if (run->drift[i].ok && run->drift[i].exceed_rate > top)
            top = run->drift[i].exceed_rate;
    double raise_y = py + h - h * 0.03 / top;
    fprintf(f,
            "<line x1='%.1f' y1='%.1f' x2='%.1f' y2='%.1f' stroke='#c00' stroke-dasharray='2,2'/>"
            "<text x='%.1f' y='%.1f' font-size='10' fill='#c00'>alarm at 3 %%</text>\n",
            px, raise_y, px + w, raise_y, px + 3, raise_y - 2);
    fprintf(f, "<polyline fill='none' stroke='#c44e52' stroke-width='2' points='");
    for (int i = 0; i < run->ndrift; i++)
        if (run->drift[i].ok)
            fprintf(f, "%.1f,%.1f ", px + w * run->drift[i].t_s / dur,
                    py + h - h * run->drift[i].exceed_rate / top);
    fprintf(f, "'/>\n");
    /* PSI max on the same box, scaled to max(0.5, observed). */
    double ptop = 0.5;
    for (int i = 0; i < run->ndrift; i++)
        if (run->drift[i].ok && run->drift[i].psi_max > ptop)
            ptop = run->drift[i].psi_max;
    fprintf(f, "<polyline fill='none' stroke='#55a868' stroke-width='1.5' stroke-dasharray='6,3' "
               "points='");
    for (int i = 0; i < run->ndrift; i++)
        if (run->drift[i].ok)
            fprintf(f, "%.1f,%.1f ", px + w * run->drift[i].t_s / dur,
                    py + h - h * run->drift[i].psi_max / ptop);
    fprintf(f, "'/>\n");
    fprintf(f,
            "<text x='%.1f' y='%.1f' font-size='11' fill='#c44e52'>solid: share of states "
            "beyond the training p99 distance (top of box %.0f %%)</text>\n",
            px, py + h + 14, 100 * top);
    fprintf(f,
            "<text x='%.1f' y='%.1f' font-size='11' fill='#55a868'>dashed: largest feature PSI "
            "(top of box %.2f)</text>\n",
            px, py + h + 28, ptop);
    fprintf(f,
            "<text x='%.1f' y='%.1f' font-size='11' fill='#555'>0 s</text><text x='%.1f' "
            "y='%.1f' font-size='11' fill='#555'>%.0f s</text></g>\n",
            px, py + h + 42, px + w - 24, py + h + 42, dur);
}

int veer_demo_report_svg(const veer_demo_run *run, const char *path)
{
    FILE *f = fopen(path, "w");
    if (f == NULL) {
        perror(path);
        return -1;
    }
    const double W = 1200, H = 960;
    fprintf(f,
            "<?xml version='1.0' encoding='UTF-8'?>\n"
            "<svg xmlns='http://www.w3.org/2000/svg' width='%.0f' height='%.0f' "
            "viewBox='0 0 %.0f %.0f' font-family='sans-serif'>\n"
            "<rect width='100%%' height='100%%' fill='white'/>\n",
            W, H, W, H);
    fprintf(f, "<text x='20' y='28' font-size='18'>veer demo: the sorting arm at 1 kHz, driven "
               "over ZeroMQ by the FB policy veerd serves</text>\n");
    fprintf(f, "<text x='20' y='48' font-size='12' fill='#555'>Gripper paths per task (metres, "
               "shoulder at the dot; circles: bins, the task's own filled; red box: keep-out "
               "chute; dashed path: while the heavy parcel was on)</text>\n");
    double size = 270;
    for (int t = 0; t < VEER_ARM_TASK_COUNT; t++)
        trajectory_panel(f, run, t, 20 + (t % 4) * (size + 20), 60 + (t / 4) * (size + 12), size);
    /* Legend in the eighth slot. */
    fprintf(f,
            "<g font-size='12'><text x='%.1f' y='%.1f'>Run: %.0f s, task switch every %.0f s,"
            "</text><text x='%.1f' y='%.1f'>deadline %u us, %ld overruns of the 1 ms "
            "schedule.</text><text x='%.1f' y='%.1f'>veer is not a safety system.</text></g>\n",
            20 + 3 * (size + 20), 60 + size + 40, run->opt.duration_s, run->opt.switch_every_s,
            20 + 3 * (size + 20), 60 + size + 58, run->opt.deadline_us, run->overruns,
            20 + 3 * (size + 20), 60 + size + 76);
    latency_panel(f, run, 20, 680, 540, 200);
    drift_panel(f, run, 620, 680, 560, 200);
    fprintf(f, "</svg>\n");
    if (fclose(f) != 0) {
        perror(path);
        return -1;
    }
    return 0;
}
