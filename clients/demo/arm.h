/* The demo machine: a two-joint planar arm at the parcel-sorting bench, torque-controlled.
 *
 * Dynamics: the rigid-body equations of the two-link planar manipulator,
 *     M(q) q̈ + C(q, q̇) q̇ + g(q) = τ − B q̇ + τ_stop(q, q̇),
 * with M, C and g in the closed form of Spong, Hutchinson & Vidyasagar, Robot Modeling and
 * Control (Wiley, 2006), §7.4 "two-link revolute joint arm" (the planar elbow manipulator):
 *     m11 = m1 lc1² + m2 (l1² + lc2² + 2 l1 lc2 cos q2) + I1 + I2
 *     m12 = m21 = m2 (lc2² + l1 lc2 cos q2) + I2,   m22 = m2 lc2² + I2
 *     h = −m2 l1 lc2 sin q2,   C q̇ = [h q̇2² + 2 h q̇1 q̇2,  −h q̇1²]
 *     g = [(m1 lc1 + m2 l1) g0 cos q1 + m2 lc2 g0 cos(q1+q2),  m2 lc2 g0 cos(q1+q2)].
 * q1 is link 1's angle from the x axis, q2 link 2's angle relative to link 1; the plane is
 * vertical, y up, gravity g0 along −y. B is diagonal viscous friction.
 *
 * The parcel is a point mass at the gripper (the end of link 2). It is folded into link 2 as one
 * rigid body (combined mass, centre of mass, and inertia by the parallel-axis theorem), so the
 * textbook formulas above hold unchanged; changing the parcel mass changes M, C and g.
 *
 * Joint stops are handled physically as stiff spring-dampers: past a limit by δ, the stop
 * pushes back with −k δ − d q̇ min(1, δ/δ0). The damping fades in over the first δ0 of
 * penetration (after Hunt & Crossley, 1975) so the stop force is continuous in q, which keeps the
 * fixed-step integrator accurate through contact; a hard stop that zeroes the velocity would make
 * the state jump and would break the energy bookkeeping. Commanded torques are clamped to
 * ±torque_max before anything else.
 *
 * Integration: classic fourth-order Runge-Kutta with the torque held over the step, at 1 kHz.
 * RK4 rather than semi-implicit Euler because the arm's Hamiltonian is not separable (M depends
 * on q2), so semi-implicit Euler is neither symplectic here nor better than first order, while
 * RK4's O(dt⁴) error keeps 10 s of free motion within micro-joules of the true energy and costs
 * four evaluations of a 2×2 system (a fraction of a microsecond).
 *
 * The model state (the observation the FB model sees) has VEER_ARM_OBS_DIM features, named in
 * veer_arm_feature_names: sin and cos of both joint angles, both joint velocities, and the
 * gripper position.
 *
 * Nothing here allocates; a veer_arm is a plain value the caller owns. Not thread-safe per arm;
 * separate arms may be used from separate threads.
 */
#ifndef VEER_DEMO_ARM_H
#define VEER_DEMO_ARM_H

#include <stddef.h>

#include "veer/error.h"

#define VEER_ARM_OBS_DIM 8
#define VEER_ARM_ACT_DIM 2
#define VEER_ARM_PHYSICS_DT 1e-3 /* seconds: the physics runs at 1 kHz */

/* Observation feature indices. */
enum {
    VEER_ARM_SIN_Q1 = 0,
    VEER_ARM_COS_Q1,
    VEER_ARM_SIN_Q2,
    VEER_ARM_COS_Q2,
    VEER_ARM_QD1,
    VEER_ARM_QD2,
    VEER_ARM_GRIP_X,
    VEER_ARM_GRIP_Y,
};

extern const char *const veer_arm_feature_names[VEER_ARM_OBS_DIM];
extern const char *const veer_arm_action_names[VEER_ARM_ACT_DIM];

typedef struct veer_arm_params {
    double link_mass[2];    /* kg, links 1 and 2 without the parcel */
    double link_length[2];  /* m, l1 and l2 (l2 is elbow to gripper) */
    double com_distance[2]; /* m, lc1 and lc2: joint to the link's centre of mass */
    double link_inertia[2]; /* kg·m², about the link's centre of mass, normal to the plane */
    double parcel_mass;     /* kg, point mass at the gripper; 0 for an empty gripper */
    double friction[2];     /* N·m·s/rad, viscous, per joint */
    double gravity;         /* m/s², acting along −y */
    double angle_min[2];    /* rad, joint stops */
    double angle_max[2];
    double stop_stiffness; /* N·m/rad */
    double stop_damping;   /* N·m·s/rad, reached at stop_depth of penetration */
    double stop_depth;     /* rad, δ0 */
    double torque_max[2];  /* N·m, commanded torques are clamped to ±torque_max */
} veer_arm_params;

typedef struct veer_arm {
    veer_arm_params params;
    double q[2];  /* rad */
    double qd[2]; /* rad/s */
    double time;  /* s since init */
    /* Link 2 with the parcel folded in (derived from params by veer_arm_init/set_parcel). */
    double m2, lc2, i2;
} veer_arm;

/* The small sorting arm of the demo (values chosen for the demo, see arm.c). */
void veer_arm_params_default(veer_arm_params *p);

/* Checks every field: finite, masses/lengths/inertias positive (the parcel may be 0), each centre
 * of mass within its link, angle_min < angle_max, stop and friction values not negative, torque
 * limits positive. Returns 0 or VEER_EINVAL with `err` naming the field (e.g. "link_mass[1]"). */
int veer_arm_params_check(const veer_arm_params *p, veer_error *err);

/* Sets up `arm` at angles q and velocities qd (both of length 2). Angles may start past a stop
 * (the stop then pushes them back). Returns 0, VEER_EINVAL for bad params or
 * VEER_ENONFINITE for a non-finite q or qd; `arm` is untouched on error. */
int veer_arm_init(veer_arm *arm, const veer_arm_params *p, const double q[2], const double qd[2],
                  veer_error *err);

/* Changes the parcel mass in place (the state is kept). Returns 0 or VEER_EINVAL. */
int veer_arm_set_parcel(veer_arm *arm, double parcel_mass, veer_error *err);

/* Advances one step of `dt` seconds (VEER_ARM_PHYSICS_DT for the machine itself; planners may
 * use a coarser dt) with `torque` (N·m) clamped to the limits and held over the step.
 * Returns 0, or VEER_ENONFINITE leaving the state unchanged when a torque is NaN or infinite, or
 * VEER_EINVAL when dt is not positive and finite. (No veer_error here: this runs at 1 kHz inside
 * planners; callers name the field.) */
int veer_arm_step(veer_arm *arm, const double torque[2], double dt);

/* `steps` physics steps of VEER_ARM_PHYSICS_DT with the same held torque. */
int veer_arm_advance(veer_arm *arm, const double torque[2], int steps);

/* Writes the observation (see the feature indices above). */
void veer_arm_observe(const veer_arm *arm, float obs[VEER_ARM_OBS_DIM]);

/* Gripper position (m) for angles q, in the bench frame. */
void veer_arm_gripper(const veer_arm_params *p, const double q[2], double *x, double *y);

/* Recovers joint angles and velocities from an observation. Each angle comes from atan2 and is
 * taken modulo 2π into the turn centred on the middle of its stop range, so an angle a little
 * past a stop is read as pressing that stop, not as lying on the far side. */
void veer_arm_state_from_obs(const veer_arm_params *p, const float obs[VEER_ARM_OBS_DIM],
                             double q[2], double qd[2]);

/* The mass matrix M(q) (row-major 2×2) of the arm with its current parcel. */
void veer_arm_mass_matrix(const veer_arm *arm, const double q[2], double m[4]);

/* Joint accelerations for state (q, qd) under `torque` (clamped as in veer_arm_step). */
void veer_arm_accel(const veer_arm *arm, const double q[2], const double qd[2],
                    const double torque[2], double qdd[2]);

/* Gravity torques g(q) (N·m), for feed-forward in controllers that know the model. */
void veer_arm_gravity_torque(const veer_arm *arm, const double q[2], double tau[2]);

/* Total mechanical energy (J): kinetic ½ q̇ᵀMq̇ plus gravitational potential (zero at y = 0)
 * plus the elastic energy stored in any stop being pressed. */
double veer_arm_energy(const veer_arm *arm);

/* Inverse kinematics for a gripper target: of the two elbow solutions, the one inside the stops
 * with the largest margin to them (angle q1 taken modulo 2π into the stop range). Returns 0, or
 * VEER_EINVAL (field "target") when the point is out of reach or no solution fits the stops. */
int veer_arm_inverse(const veer_arm_params *p, double x, double y, double q[2], veer_error *err);

#endif
