"""An independent NumPy model of the demo arm, and ctypes access to the C one (clients/demo/arm.c),
shared by the demo tests.

The reference does not reuse the closed-form matrices of arm.c. It builds the equations of
motion from the Lagrangian, the general route of Spong, Hutchinson & Vidyasagar, Robot Modeling
and Control (2006), §7.2-7.3:
    D(q) = Σ_bodies m Jvᵀ Jv + I Jωᵀ Jω            (the inertia matrix from body Jacobians)
    c_ijk = ½ (∂d_kj/∂q_i + ∂d_ki/∂q_j − ∂d_ij/∂q_k)  (Christoffel symbols)
    Σ_j d_kj q̈_j + Σ_ij c_ijk q̇_i q̇_j + ∂P/∂q_k = τ_k
with the parcel as a separate point mass at the gripper (arm.c folds it into link 2), and with
∂D/∂q and ∂P/∂q taken by complex-step differentiation (Squire & Trapp, SIAM Review 1998), which is
exact to rounding. Friction, torque clamping and the joint-stop law are the documented ones in
arm.h. Integration: an own RK4 (all starts, including stop contact) and SciPy's DOP853 at tight
tolerances (starts that stay clear of the stops).
"""
import ctypes
import math
import os

import numpy as np

BUILD = os.environ.get("VEER_BUILD_DIR", "build")
LIB = ctypes.CDLL(os.path.join(BUILD, "tests", "demo", "libveer_demo_arm_ctypes.so"))
DP = ctypes.POINTER(ctypes.c_double)
FP = ctypes.POINTER(ctypes.c_float)
LIB.arm_ctypes_simulate.argtypes = [DP, DP, DP, ctypes.c_int, ctypes.c_double, DP, DP]
LIB.arm_ctypes_mass_matrix.argtypes = [DP, DP, DP]
LIB.arm_ctypes_observe.argtypes = [DP, DP, FP]
LIB.arm_ctypes_check.argtypes = [DP, ctypes.c_char_p]
LIB.arm_ctypes_default_params.argtypes = [DP]
NPARAM = LIB.arm_ctypes_nparam()
NAMES = ["m1", "m2", "l1", "l2", "lc1", "lc2", "I1", "I2", "mp", "b1", "b2", "g",
         "qmin1", "qmin2", "qmax1", "qmax2", "k", "d", "depth", "tmax1", "tmax2"]
assert NPARAM == len(NAMES)


def ptr(a, t=DP):
    return a.ctypes.data_as(t)


def params(**over):
    """The test's own parameter set (values of a small arm, chosen here), overridable."""
    p = dict(m1=1.1, m2=0.7, l1=0.33, l2=0.31, lc1=0.16, lc2=0.14, I1=0.011, I2=0.0058,
             mp=0.6, b1=0.12, b2=0.09, g=9.81, qmin1=-4.17, qmin2=-2.6, qmax1=1.03, qmax2=2.6,
             k=1000.0, d=5.0, depth=0.01, tmax1=12.0, tmax2=6.0)
    p.update(over)
    return p


def vec(p):
    return np.array([p[n] for n in NAMES], dtype=np.float64)


# ---- the reference model ---------------------------------------------------------------------

def bodies(p, q):
    """(mass, inertia, position, Jv, Jw) of link 1, link 2 and the parcel; q may be complex."""
    q1, q2 = q
    c1, s1, c12, s12 = np.cos(q1), np.sin(q1), np.cos(q1 + q2), np.sin(q1 + q2)
    out = []
    pos1 = np.array([p["lc1"] * c1, p["lc1"] * s1])
    jv1 = np.array([[-p["lc1"] * s1, 0 * s1], [p["lc1"] * c1, 0 * c1]])
    out.append((p["m1"], p["I1"], pos1, jv1, np.array([1.0, 0.0])))
    for m, inertia, r in ((p["m2"], p["I2"], p["lc2"]), (p["mp"], 0.0, p["l2"])):
        pos = np.array([p["l1"] * c1 + r * c12, p["l1"] * s1 + r * s12])
        jv = np.array([[-p["l1"] * s1 - r * s12, -r * s12], [p["l1"] * c1 + r * c12, r * c12]])
        out.append((m, inertia, pos, jv, np.array([1.0, 1.0])))
    return out


def inertia_matrix(p, q):
    d = np.zeros((2, 2), dtype=np.result_type(q[0], q[1], float))
    for m, inertia, _, jv, jw in bodies(p, q):
        d = d + m * jv.T @ jv + inertia * np.outer(jw, jw)
    return d


def potential(p, q):
    return sum(m * p["g"] * pos[1] for m, _, pos, _, _ in bodies(p, q))


H = 1e-30  # complex-step size: the derivative is Im f(q + iH e_k) / H, no cancellation


def d_inertia(p, q):
    """∂D/∂q_k for k = 0, 1 by complex step."""
    out = []
    for k in range(2):
        qc = np.array(q, dtype=complex)
        qc[k] += 1j * H
        out.append(inertia_matrix(p, qc).imag / H)
    return out


def grad_potential(p, q):
    g = np.zeros(2)
    for k in range(2):
        qc = np.array(q, dtype=complex)
        qc[k] += 1j * H
        g[k] = potential(p, qc).imag / H
    return g


def stop_torque(p, i, q, qd):
    lo, hi = p["qmin%d" % (i + 1)], p["qmax%d" % (i + 1)]
    if q > hi:
        delta = q - hi
    elif q < lo:
        delta = q - lo
    else:
        return 0.0
    fade = min(1.0, abs(delta) / p["depth"])
    return -p["k"] * delta - p["d"] * fade * qd


def accel(p, x, tau):
    q, qd = x[:2], x[2:]
    d = inertia_matrix(p, q)
    dd = d_inertia(p, q)
    coriolis = np.zeros(2)
    for k in range(2):
        for i in range(2):
            for j in range(2):
                cijk = 0.5 * (dd[i][k, j] + dd[j][k, i] - dd[k][i, j])
                coriolis[k] += cijk * qd[i] * qd[j]
    tau_c = np.clip(tau, [-p["tmax1"], -p["tmax2"]], [p["tmax1"], p["tmax2"]])
    rhs = (tau_c - np.array([p["b1"], p["b2"]]) * qd
           + np.array([stop_torque(p, i, q[i], qd[i]) for i in range(2)])
           - coriolis - grad_potential(p, q))
    return np.linalg.solve(d, rhs)


def deriv(p, x, tau):
    return np.concatenate([x[2:], accel(p, x, tau)])


def rk4(p, x0, tau, steps, dt):
    x = np.array(x0, dtype=float)
    for _ in range(steps):
        k1 = deriv(p, x, tau)
        k2 = deriv(p, x + 0.5 * dt * k1, tau)
        k3 = deriv(p, x + 0.5 * dt * k2, tau)
        k4 = deriv(p, x + dt * k3, tau)
        x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
    return x


def energy(p, x):
    q, qd = x[:2], x[2:]
    e = 0.5 * qd @ inertia_matrix(p, q) @ qd + potential(p, q)
    for i in range(2):
        lo, hi = p["qmin%d" % (i + 1)], p["qmax%d" % (i + 1)]
        delta = max(0.0, q[i] - hi) + min(0.0, q[i] - lo)
        e += 0.5 * p["k"] * delta ** 2
    return e


def c_simulate(p, x0, tau, steps, dt=1e-3, want_energy=False):
    out = np.zeros(4)
    e = np.zeros(steps + 1) if want_energy else None
    rc = LIB.arm_ctypes_simulate(ptr(vec(p)), ptr(np.array(x0, float)),
                                 ptr(np.array(tau, float)), steps, dt, ptr(out),
                                 ptr(e) if want_energy else None)
    assert rc == 0
    return out, e
