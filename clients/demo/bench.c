/* The bench geometry's values (see bench.h for the frame and the reasons behind them). */
#include "bench.h"

#include <math.h>

const veer_bench_bin veer_bench_bins[VEER_BENCH_BIN_COUNT] = {
    {"left", -0.40, -0.25},
    {"near", 0.30, -0.40},
    {"far", 0.50, -0.10},
};

const veer_bench_zone veer_bench_keepout = {-0.15, 0.15, -0.70, -0.35};

double veer_bench_zone_distance(const veer_bench_zone *z, double x, double y)
{
    double dx = x < z->x_min ? z->x_min - x : (x > z->x_max ? x - z->x_max : 0.0);
    double dy = y < z->y_min ? z->y_min - y : (y > z->y_max ? y - z->y_max : 0.0);
    return sqrt(dx * dx + dy * dy);
}

int veer_bench_in_zone(const veer_bench_zone *z, double x, double y)
{
    return x >= z->x_min && x <= z->x_max && y >= z->y_min && y <= z->y_max;
}
