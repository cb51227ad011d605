/* The parcel-sorting bench: where the bins and the keep-out zone are, in one place.
 *
 * Coordinates are metres in the arm's vertical plane, origin at the shoulder axis, x to the
 * right, y up (the frame of arm.h). The bench top lies at y = -0.70, just below the gripper's
 * lowest reach (0.65 m), so the arm needs no bench-collision model: the bins are crates standing
 * on the bench and a "bin" below is the drop point just above a crate's mouth. The keep-out zone
 * is the inbound chute under the shoulder where parcels arrive and a person may reach in; it
 * covers the pose the arm hangs in with no torque, so staying out of it takes effort.
 *
 * Every task, the log generator's coverage figures and the demo read these values; nothing else
 * states them.
 */
#ifndef VEER_DEMO_BENCH_H
#define VEER_DEMO_BENCH_H

#define VEER_BENCH_BIN_COUNT 3

typedef struct veer_bench_bin {
    const char *name; /* "left", "near", "far" */
    double x, y;      /* drop point above the crate's mouth, metres */
} veer_bench_bin;

typedef struct veer_bench_zone {
    double x_min, x_max, y_min, y_max; /* axis-aligned box, metres */
} veer_bench_zone;

extern const veer_bench_bin veer_bench_bins[VEER_BENCH_BIN_COUNT];
extern const veer_bench_zone veer_bench_keepout;

/* The bench top (metres, below the gripper's reach by construction). */
#define VEER_BENCH_TOP_Y (-0.70)

/* Coverage figures (log generator, evaluation): a state is "slow" when the joint speed
 * ||q̇||₂ is below VEER_BENCH_SLOW_SPEED rad/s, and "near a bin" when the gripper is within
 * VEER_BENCH_NEAR_RADIUS metres of the bin's drop point. Common practice, no source: 0.5 rad/s
 * at the 0.65 m reach is a tip speed of at most about 0.3 m/s, a parcel being set down. */
#define VEER_BENCH_SLOW_SPEED 0.5
#define VEER_BENCH_NEAR_RADIUS 0.08

/* Distance (metres) from point (x, y) to the box; 0 inside. */
double veer_bench_zone_distance(const veer_bench_zone *z, double x, double y);

/* 1 when (x, y) lies inside the box (boundary included), else 0. */
int veer_bench_in_zone(const veer_bench_zone *z, double x, double y);

#endif
