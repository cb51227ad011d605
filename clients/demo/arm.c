/* The two-link arm's dynamics and its 1 kHz integrator (the equations and the reasons for the
 * stop model and for RK4 are in arm.h). Everything works on a caller-owned veer_arm value, so
 * the log generator, the planners and the demo controller can each run their own copies. */
#include "arm.h"

#include <math.h>

#include "base/base.h"

const char *const veer_arm_feature_names[VEER_ARM_OBS_DIM] = {
    "shoulder_sin", "shoulder_cos", "elbow_sin", "elbow_cos",
    "shoulder_vel", "elbow_vel",    "gripper_x", "gripper_y",
};

const char *const veer_arm_action_names[VEER_ARM_ACT_DIM] = {"shoulder_torque", "elbow_torque"};

/* A small sorting arm: aluminium links of 35 and 30 cm with motors at the joints, modelled as
 * uniform rods (I = m l²/12 about the centre). The torque limits let it hold the 0.5 kg default
 * parcel at full horizontal reach (about 9.2 N·m at the shoulder) with margin, but not a parcel
 * much above 1 kg, so a heavier parcel visibly changes what the arm can do. Values chosen for
 * the demo; the stop stiffness lets a stop yield about 0.012 rad under full shoulder torque and
 * keeps k/m_eff well inside RK4's stability region at 1 ms and at the planners' 5 ms. */
void veer_arm_params_default(veer_arm_params *p)
{
    *p = (veer_arm_params){
        .link_mass = {1.2, 0.8},
        .link_length = {0.35, 0.30},
        .com_distance = {0.175, 0.15},
        .link_inertia = {1.2 * 0.35 * 0.35 / 12.0, 0.8 * 0.30 * 0.30 / 12.0},
        .parcel_mass = 0.5,
        .friction = {0.1, 0.1},
        .gravity = 9.81,
        /* Link 1 cannot pass straight up (the cable carrier feeding the elbow motor is clamped
         * above the shoulder), so its range is centred on hanging straight down: −π/2 ± 2.6.
         * Link 2 cannot fold back onto link 1: ±2.6. */
        .angle_min = {-M_PI / 2.0 - 2.6, -2.6},
        .angle_max = {-M_PI / 2.0 + 2.6, 2.6},
        .stop_stiffness = 1000.0,
        .stop_damping = 5.0,
        .stop_depth = 0.01,
        .torque_max = {12.0, 6.0},
    };
}

static int check_positive(veer_error *err, const char *field, double v)
{
    if (!isfinite(v) || v <= 0.0)
        return veer__error_set(err, VEER_EINVAL, field,
                               "%s must be a positive finite number, got %g", field, v);
    return 0;
}

static int check_nonneg(veer_error *err, const char *field, double v)
{
    if (!isfinite(v) || v < 0.0)
        return veer__error_set(err, VEER_EINVAL, field,
                               "%s must be a finite number not below 0, got %g", field, v);
    return 0;
}

int veer_arm_params_check(const veer_arm_params *p, veer_error *err)
{
    static const char *const mass[2] = {"link_mass[0]", "link_mass[1]"};
    static const char *const len[2] = {"link_length[0]", "link_length[1]"};
    static const char *const com[2] = {"com_distance[0]", "com_distance[1]"};
    static const char *const inertia[2] = {"link_inertia[0]", "link_inertia[1]"};
    static const char *const fric[2] = {"friction[0]", "friction[1]"};
    static const char *const amin[2] = {"angle_min[0]", "angle_min[1]"};
    static const char *const tmax[2] = {"torque_max[0]", "torque_max[1]"};
    int rc;
    if (p == NULL)
        return veer__error_set(err, VEER_EINVAL, "params", "params must not be NULL");
    for (int i = 0; i < 2; i++) {
        if ((rc = check_positive(err, mass[i], p->link_mass[i])) ||
            (rc = check_positive(err, len[i], p->link_length[i])) ||
            (rc = check_nonneg(err, com[i], p->com_distance[i])) ||
            (rc = check_positive(err, inertia[i], p->link_inertia[i])) ||
            (rc = check_nonneg(err, fric[i], p->friction[i])) ||
            (rc = check_positive(err, tmax[i], p->torque_max[i])))
            return rc;
        if (p->com_distance[i] > p->link_length[i])
            return veer__error_set(err, VEER_EINVAL, com[i],
                                   "%s (%g m) lies beyond the link's length (%g m)", com[i],
                                   p->com_distance[i], p->link_length[i]);
        if (!isfinite(p->angle_min[i]) || !isfinite(p->angle_max[i]) ||
            !(p->angle_min[i] < p->angle_max[i]))
            return veer__error_set(err, VEER_EINVAL, amin[i],
                                   "joint %d stops must be finite with angle_min < angle_max, got "
                                   "[%g, %g]",
                                   i, p->angle_min[i], p->angle_max[i]);
    }
    if ((rc = check_nonneg(err, "parcel_mass", p->parcel_mass)) ||
        (rc = check_nonneg(err, "gravity", p->gravity)) ||
        (rc = check_nonneg(err, "stop_stiffness", p->stop_stiffness)) ||
        (rc = check_nonneg(err, "stop_damping", p->stop_damping)) ||
        (rc = check_positive(err, "stop_depth", p->stop_depth)))
        return rc;
    return 0;
}

/* Link 2 and the parcel as one rigid body: combined mass, centre of mass, and inertia about the
 * new centre by the parallel-axis theorem. */
static void fold_parcel(veer_arm *arm)
{
    const veer_arm_params *p = &arm->params;
    double m2 = p->link_mass[1], lc2 = p->com_distance[1], l2 = p->link_length[1];
    double mp = p->parcel_mass;
    arm->m2 = m2 + mp;
    arm->lc2 = (m2 * lc2 + mp * l2) / arm->m2;
    double a = arm->lc2 - lc2, b = l2 - arm->lc2;
    arm->i2 = p->link_inertia[1] + m2 * a * a + mp * b * b;
}

int veer_arm_init(veer_arm *arm, const veer_arm_params *p, const double q[2], const double qd[2],
                  veer_error *err)
{
    int rc = veer_arm_params_check(p, err);
    if (rc)
        return rc;
    for (int i = 0; i < 2; i++) {
        if (!isfinite(q[i]))
            return veer__error_set(err, VEER_ENONFINITE, i ? "q[1]" : "q[0]",
                                   "joint angle %d is not finite", i);
        if (!isfinite(qd[i]))
            return veer__error_set(err, VEER_ENONFINITE, i ? "qd[1]" : "qd[0]",
                                   "joint velocity %d is not finite", i);
    }
    arm->params = *p;
    arm->q[0] = q[0];
    arm->q[1] = q[1];
    arm->qd[0] = qd[0];
    arm->qd[1] = qd[1];
    arm->time = 0.0;
    fold_parcel(arm);
    return 0;
}

int veer_arm_set_parcel(veer_arm *arm, double parcel_mass, veer_error *err)
{
    int rc = check_nonneg(err, "parcel_mass", parcel_mass);
    if (rc)
        return rc;
    arm->params.parcel_mass = parcel_mass;
    fold_parcel(arm);
    return 0;
}

void veer_arm_mass_matrix(const veer_arm *arm, const double q[2], double m[4])
{
    const veer_arm_params *p = &arm->params;
    double m1 = p->link_mass[0], l1 = p->link_length[0], lc1 = p->com_distance[0];
    double i1 = p->link_inertia[0];
    double c2 = cos(q[1]);
    m[0] = m1 * lc1 * lc1 + arm->m2 * (l1 * l1 + arm->lc2 * arm->lc2 + 2.0 * l1 * arm->lc2 * c2) +
           i1 + arm->i2;
    m[1] = arm->m2 * (arm->lc2 * arm->lc2 + l1 * arm->lc2 * c2) + arm->i2;
    m[2] = m[1];
    m[3] = arm->m2 * arm->lc2 * arm->lc2 + arm->i2;
}

void veer_arm_gravity_torque(const veer_arm *arm, const double q[2], double tau[2])
{
    const veer_arm_params *p = &arm->params;
    double g0 = p->gravity;
    double c12 = cos(q[0] + q[1]);
    tau[1] = arm->m2 * arm->lc2 * g0 * c12;
    tau[0] = (p->link_mass[0] * p->com_distance[0] + arm->m2 * p->link_length[0]) * g0 * cos(q[0]) +
             tau[1];
}

static double clamp(double v, double lo, double hi)
{
    return v < lo ? lo : (v > hi ? hi : v);
}

/* Stop torque on one joint: a spring past the limit, with damping faded in over stop_depth so
 * the torque is continuous in q. */
static double stop_torque(const veer_arm_params *p, int i, double q, double qd)
{
    double delta;
    if (q > p->angle_max[i])
        delta = q - p->angle_max[i];
    else if (q < p->angle_min[i])
        delta = q - p->angle_min[i];
    else
        return 0.0;
    double fade = fabs(delta) < p->stop_depth ? fabs(delta) / p->stop_depth : 1.0;
    return -p->stop_stiffness * delta - p->stop_damping * fade * qd;
}

void veer_arm_accel(const veer_arm *arm, const double q[2], const double qd[2],
                    const double torque[2], double qdd[2])
{
    const veer_arm_params *p = &arm->params;
    double m[4], g[2];
    veer_arm_mass_matrix(arm, q, m);
    veer_arm_gravity_torque(arm, q, g);
    double h = -arm->m2 * p->link_length[0] * arm->lc2 * sin(q[1]);
    double rhs[2];
    for (int i = 0; i < 2; i++)
        rhs[i] = clamp(torque[i], -p->torque_max[i], p->torque_max[i]) - p->friction[i] * qd[i] +
                 stop_torque(p, i, q[i], qd[i]) - g[i];
    rhs[0] -= h * qd[1] * qd[1] + 2.0 * h * qd[0] * qd[1];
    rhs[1] -= -h * qd[0] * qd[0];
    /* M is symmetric positive definite (kinetic energy), so the 2×2 inverse by cofactors is safe:
     * det ≥ m1 lc1² m2 lc2² + ... > 0 for positive masses and inertias. */
    double det = m[0] * m[3] - m[1] * m[2];
    qdd[0] = (m[3] * rhs[0] - m[1] * rhs[1]) / det;
    qdd[1] = (m[0] * rhs[1] - m[2] * rhs[0]) / det;
}

int veer_arm_step(veer_arm *arm, const double torque[2], double dt)
{
    if (!isfinite(torque[0]))
        return VEER_ENONFINITE;
    if (!isfinite(torque[1]))
        return VEER_ENONFINITE;
    if (!isfinite(dt) || dt <= 0.0)
        return VEER_EINVAL;
    /* Classic RK4 on y = (q, q̇), torque held over the step. */
    const double *q = arm->q, *qd = arm->qd;
    double k1q[2], k1v[2], k2q[2], k2v[2], k3q[2], k3v[2], k4q[2], k4v[2], tq[2], tv[2];
    k1q[0] = qd[0];
    k1q[1] = qd[1];
    veer_arm_accel(arm, q, qd, torque, k1v);
    for (int i = 0; i < 2; i++) {
        tq[i] = q[i] + 0.5 * dt * k1q[i];
        tv[i] = qd[i] + 0.5 * dt * k1v[i];
    }
    k2q[0] = tv[0];
    k2q[1] = tv[1];
    veer_arm_accel(arm, tq, tv, torque, k2v);
    for (int i = 0; i < 2; i++) {
        tq[i] = q[i] + 0.5 * dt * k2q[i];
        tv[i] = qd[i] + 0.5 * dt * k2v[i];
    }
    k3q[0] = tv[0];
    k3q[1] = tv[1];
    veer_arm_accel(arm, tq, tv, torque, k3v);
    for (int i = 0; i < 2; i++) {
        tq[i] = q[i] + dt * k3q[i];
        tv[i] = qd[i] + dt * k3v[i];
    }
    k4q[0] = tv[0];
    k4q[1] = tv[1];
    veer_arm_accel(arm, tq, tv, torque, k4v);
    for (int i = 0; i < 2; i++) {
        arm->q[i] += dt / 6.0 * (k1q[i] + 2.0 * k2q[i] + 2.0 * k3q[i] + k4q[i]);
        arm->qd[i] += dt / 6.0 * (k1v[i] + 2.0 * k2v[i] + 2.0 * k3v[i] + k4v[i]);
    }
    arm->time += dt;
    return 0;
}

int veer_arm_advance(veer_arm *arm, const double torque[2], int steps)
{
    for (int s = 0; s < steps; s++) {
        int rc = veer_arm_step(arm, torque, VEER_ARM_PHYSICS_DT);
        if (rc)
            return rc;
    }
    return 0;
}

void veer_arm_gripper(const veer_arm_params *p, const double q[2], double *x, double *y)
{
    double a = q[0], b = q[0] + q[1];
    *x = p->link_length[0] * cos(a) + p->link_length[1] * cos(b);
    *y = p->link_length[0] * sin(a) + p->link_length[1] * sin(b);
}

void veer_arm_observe(const veer_arm *arm, float obs[VEER_ARM_OBS_DIM])
{
    double x, y;
    veer_arm_gripper(&arm->params, arm->q, &x, &y);
    obs[VEER_ARM_SIN_Q1] = (float)sin(arm->q[0]);
    obs[VEER_ARM_COS_Q1] = (float)cos(arm->q[0]);
    obs[VEER_ARM_SIN_Q2] = (float)sin(arm->q[1]);
    obs[VEER_ARM_COS_Q2] = (float)cos(arm->q[1]);
    obs[VEER_ARM_QD1] = (float)arm->qd[0];
    obs[VEER_ARM_QD2] = (float)arm->qd[1];
    obs[VEER_ARM_GRIP_X] = (float)x;
    obs[VEER_ARM_GRIP_Y] = (float)y;
}

static double stop_energy(const veer_arm_params *p, int i, double q)
{
    double delta = q > p->angle_max[i] ? q - p->angle_max[i]
                                       : (q < p->angle_min[i] ? q - p->angle_min[i] : 0.0);
    return 0.5 * p->stop_stiffness * delta * delta;
}

double veer_arm_energy(const veer_arm *arm)
{
    const veer_arm_params *p = &arm->params;
    double m[4];
    veer_arm_mass_matrix(arm, arm->q, m);
    const double *v = arm->qd;
    double kinetic = 0.5 * (m[0] * v[0] * v[0] + 2.0 * m[1] * v[0] * v[1] + m[3] * v[1] * v[1]);
    double s1 = sin(arm->q[0]), s12 = sin(arm->q[0] + arm->q[1]);
    double potential = p->gravity * (p->link_mass[0] * p->com_distance[0] * s1 +
                                     arm->m2 * (p->link_length[0] * s1 + arm->lc2 * s12));
    return kinetic + potential + stop_energy(p, 0, arm->q[0]) + stop_energy(p, 1, arm->q[1]);
}

/* Maps angle a into [lo, lo + 2π). */
static double wrap_from(double a, double lo)
{
    double two_pi = 2.0 * M_PI;
    double r = fmod(a - lo, two_pi);
    if (r < 0.0)
        r += two_pi;
    return lo + r;
}

void veer_arm_state_from_obs(const veer_arm_params *p, const float obs[VEER_ARM_OBS_DIM],
                             double q[2], double qd[2])
{
    for (int i = 0; i < 2; i++) {
        double mid = 0.5 * (p->angle_min[i] + p->angle_max[i]);
        double a = atan2(obs[i == 0 ? VEER_ARM_SIN_Q1 : VEER_ARM_SIN_Q2],
                         obs[i == 0 ? VEER_ARM_COS_Q1 : VEER_ARM_COS_Q2]);
        q[i] = wrap_from(a, mid - M_PI);
    }
    qd[0] = obs[VEER_ARM_QD1];
    qd[1] = obs[VEER_ARM_QD2];
}

int veer_arm_inverse(const veer_arm_params *p, double x, double y, double q[2], veer_error *err)
{
    double l1 = p->link_length[0], l2 = p->link_length[1];
    if (!isfinite(x) || !isfinite(y))
        return veer__error_set(err, VEER_EINVAL, "target", "target is not finite");
    double c2 = (x * x + y * y - l1 * l1 - l2 * l2) / (2.0 * l1 * l2);
    if (c2 < -1.0 || c2 > 1.0)
        return veer__error_set(err, VEER_EINVAL, "target",
                               "target (%g, %g) is out of the arm's reach", x, y);
    double best_margin = -INFINITY;
    for (int sign = -1; sign <= 1; sign += 2) {
        double q2 = sign * acos(c2);
        double q1 = atan2(y, x) - atan2(l2 * sin(q2), l1 + l2 * cos(q2));
        double cand[2] = {wrap_from(q1, p->angle_min[0]), wrap_from(q2, p->angle_min[1])};
        double margin = INFINITY;
        for (int i = 0; i < 2; i++) {
            margin = fmin(margin, cand[i] - p->angle_min[i]);
            margin = fmin(margin, p->angle_max[i] - cand[i]);
        }
        if (margin > best_margin) {
            best_margin = margin;
            q[0] = cand[0];
            q[1] = cand[1];
        }
    }
    if (best_margin < 0.0)
        return veer__error_set(err, VEER_EINVAL, "target",
                               "no elbow solution for (%g, %g) lies within the joint stops", x, y);
    return 0;
}
