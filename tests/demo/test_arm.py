"""The demo arm (clients/demo/arm.c) against the independent NumPy/SciPy model of armref.py
(Lagrangian equations of motion from Spong, Hutchinson & Vidyasagar 2006, §7.2-7.3, with
complex-step derivatives; an own RK4 and SciPy's DOP853)."""
import ctypes
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from armref import (FP, LIB, c_simulate, deriv, energy, inertia_matrix, params, ptr, rk4, vec)

# ---- the checks ------------------------------------------------------------------------------

# Starts (q1, q2, q̇1, q̇2) and held torques. The last two drive into a stop (the shoulder's
# upper one, the elbow's with a torque beyond the clamp).
FREE_CASES = [
    ((-0.9, 0.9, 0.0, 0.0), (0.0, 0.0)),
    ((-2.2, -0.6, 1.5, -2.0), (3.0, -1.0)),
    ((0.2, 0.4, -0.5, 1.0), (8.0, 2.5)),
]
CONTACT_CASES = [
    ((0.8, 0.3, 3.0, 0.0), (0.0, 0.0)),
    ((-1.0, 2.3, 0.0, 4.0), (-20.0, 9.0)),
]


# Stops moved out of reach: the smooth rigid-body motion alone (with friction and clamping).
NO_STOPS = dict(qmin1=-100.0, qmax1=100.0, qmin2=-100.0, qmax2=100.0)


@pytest.mark.parametrize("x0,tau", FREE_CASES + CONTACT_CASES)
@pytest.mark.parametrize("parcel", [0.0, 0.6, 1.4])
def test_one_second_matches_reference_rk4(x0, tau, parcel):
    p = params(mp=parcel)
    got, _ = c_simulate(p, x0, tau, 1000)
    want = rk4(p, x0, tau, 1000, 1e-3)
    assert np.max(np.abs(got - want)) < 1e-6, (got, want)


@pytest.mark.parametrize("x0,tau", FREE_CASES)
def test_one_second_matches_adaptive_integration(x0, tau):
    """Without stops the dynamics are smooth: DOP853 at rtol 1e-12 is an independent integrator;
    the 1 kHz RK4 must agree within 1e-6 (RK4's O(dt⁴) error). Not for CONTACT_CASES: the last
    one, driven at the torque limits to joint speeds above 20 rad/s, ends 6e-5 from the exact
    solution, which is the 1 kHz step's own truncation error, not a modelling difference."""
    p = params(**NO_STOPS)
    sol = solve_ivp(lambda t, x: deriv(p, x, np.array(tau)), (0.0, 1.0), np.array(x0, float),
                    method="DOP853", rtol=1e-12, atol=1e-12)
    got, _ = c_simulate(p, x0, tau, 1000)
    assert np.max(np.abs(got - sol.y[:, -1])) < 1e-6, (got, sol.y[:, -1])


def test_parcel_changes_the_motion():
    """The parcel parameter reaches the dynamics: 1 s of free motion differs by centimetres."""
    x0, tau = FREE_CASES[0]
    light, _ = c_simulate(params(mp=0.0), x0, tau, 1000)
    heavy, _ = c_simulate(params(mp=1.4), x0, tau, 1000)
    assert np.max(np.abs(light - heavy)) > 1e-2


ENERGY_STARTS = [(-0.9, 0.9, 0.0, 0.0), (-2.2, -0.6, 3.0, -4.0), (0.5, 1.5, 0.0, 0.0),
                 (-3.0, -2.0, 2.0, 2.0)]
# Bound on the energy error over 10 s (10,000 RK4 steps) with no torque and no friction: 1e-5 J,
# about 1e-6 of the ~5-10 J exchanged between kinetic and potential energy. RK4's global error is
# O(dt⁴); measured on these starts: 2e-9 to 4e-6 J.
ENERGY_BOUND = 1e-5
# With the stops in place (elastic only, their damping off, the stored spring energy counted)
# energy is conserved by the equations but RK4 drops to low order at each contact, where the
# stop torque's slope jumps. Measured on these starts: the two that reach a stop lose 0.005 and
# 0.011 J over 10 s of repeated slamming (the other two stay below 1e-7 J); stated bound 0.05 J,
# 1% of the energy in motion.
ENERGY_BOUND_STOPS = 0.05


@pytest.mark.parametrize("x0", ENERGY_STARTS)
def test_energy_conserved_without_torque_and_friction(x0):
    p = params(b1=0.0, b2=0.0, d=0.0, **NO_STOPS)
    _, e = c_simulate(p, x0, (0.0, 0.0), 10000, want_energy=True)
    assert abs(e[0] - energy(p, np.array(x0, float))) < 1e-12  # same energy, reference formula
    drift = np.max(np.abs(e - e[0]))
    print("energy drift over 10 s from", x0, "=", drift, "J")
    assert drift < ENERGY_BOUND


@pytest.mark.parametrize("x0", ENERGY_STARTS)
def test_energy_nearly_conserved_with_elastic_stops(x0):
    p = params(b1=0.0, b2=0.0, d=0.0)
    _, e = c_simulate(p, x0, (0.0, 0.0), 10000, want_energy=True)
    drift = np.max(np.abs(e - e[0]))
    print("energy drift over 10 s with stops from", x0, "=", drift, "J")
    assert drift < ENERGY_BOUND_STOPS


def test_energy_error_shrinks_at_fourth_order():
    """Halving dt divides RK4's energy error by about 2⁴ = 16 (accept 8 to 32): the integrator
    really is fourth order. Checked over 2 s of free motion at dt = 8 ms and 4 ms."""
    p = params(b1=0.0, b2=0.0, d=0.0, **NO_STOPS)
    x0 = (1.2, -0.6, 3.0, -4.0)
    _, e8 = c_simulate(p, x0, (0.0, 0.0), 250, dt=8e-3, want_energy=True)
    _, e4 = c_simulate(p, x0, (0.0, 0.0), 500, dt=4e-3, want_energy=True)
    ratio = np.max(np.abs(e8 - e8[0])) / np.max(np.abs(e4 - e4[0]))
    assert 8.0 < ratio < 32.0, ratio


def test_friction_only_removes_energy():
    """With friction and no torque, dE/dt = −Σ b q̇² − stop damping ≤ 0: the energy never rises
    (beyond rounding and RK4 error)."""
    p = params()
    _, e = c_simulate(p, (2.0, 1.0, 2.0, -3.0), (0.0, 0.0), 5000, want_energy=True)
    assert np.all(np.diff(e) < 1e-9)
    assert e[-1] < e[0] - 1.0


def test_mass_matrix_symmetric_positive_definite_over_a_grid():
    p = params(mp=1.0)
    m = np.zeros(4)
    for q1 in np.linspace(-math.pi, math.pi, 13):
        for q2 in np.linspace(-math.pi, math.pi, 25):
            q = np.array([q1, q2])
            assert LIB.arm_ctypes_mass_matrix(ptr(vec(p)), ptr(q), ptr(m)) == 0
            mm = m.reshape(2, 2)
            assert mm[0, 1] == mm[1, 0]
            assert np.all(np.linalg.eigvalsh(mm) > 0.0)
            assert np.allclose(mm, inertia_matrix(p, q), rtol=1e-12, atol=1e-14)


def test_observation_features():
    p = params()
    x = np.array([0.7, -1.1, 0.25, -0.5])
    obs = np.zeros(8, dtype=np.float32)
    assert LIB.arm_ctypes_observe(ptr(vec(p)), ptr(x), ptr(obs, FP)) == 0
    gx = p["l1"] * math.cos(x[0]) + p["l2"] * math.cos(x[0] + x[1])
    gy = p["l1"] * math.sin(x[0]) + p["l2"] * math.sin(x[0] + x[1])
    want = np.array([math.sin(x[0]), math.cos(x[0]), math.sin(x[1]), math.cos(x[1]),
                     x[2], x[3], gx, gy], dtype=np.float32)
    assert np.array_equal(obs, want)


@pytest.mark.parametrize("name,value", [("m1", -1.0), ("l2", 0.0), ("lc1", 0.5),
                                        ("I2", float("nan")), ("mp", -0.1), ("b2", -1.0),
                                        ("qmin2", 3.0), ("depth", 0.0), ("tmax1", 0.0),
                                        ("g", float("inf"))])
def test_bad_parameters_are_refused_with_the_field(name, value):
    field = ctypes.create_string_buffer(96)
    rc = LIB.arm_ctypes_check(ptr(vec(params(**{name: value}))), field)
    assert rc == -1  # VEER_EINVAL
    expect = {"m1": "link_mass[0]", "l2": "link_length[1]", "lc1": "com_distance[0]",
              "I2": "link_inertia[1]", "mp": "parcel_mass", "b2": "friction[1]",
              "qmin2": "angle_min[1]", "depth": "stop_depth", "tmax1": "torque_max[0]",
              "g": "gravity"}[name]
    assert field.value.decode() == expect


def test_non_finite_torque_or_state_refused():
    p = params()
    out = np.zeros(4)
    rc = LIB.arm_ctypes_simulate(ptr(vec(p)), ptr(np.zeros(4)), ptr(np.array([np.nan, 0.0])),
                                 10, 1e-3, ptr(out), None)
    assert rc == -16  # VEER_ENONFINITE
    rc = LIB.arm_ctypes_simulate(ptr(vec(p)), ptr(np.array([np.inf, 0, 0, 0])),
                                 ptr(np.zeros(2)), 10, 1e-3, ptr(out), None)
    assert rc == -16
