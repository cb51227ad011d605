"""The task suite, the evaluation loop and the baselines of the demo arm.

References: the reward formulas restated from tasks.h and computed here in NumPy; planar
two-link forward kinematics (Spong, Hutchinson & Vidyasagar 2006, §3); the independent arm model
of armref.py for a whole episode; and two known optima: holding still from rest scores exactly 1
per decision, and a reach planner must end at the bin.
"""
import ctypes
import json
import os
import subprocess

import numpy as np
import pytest

from armref import DP, FP, LIB, params, rk4

BUILD = os.environ.get("VEER_BUILD_DIR", "build")
TOOL = os.path.join(BUILD, "bin", "veer-arm-eval-baselines")
LIB.arm_ctypes_task_name.restype = ctypes.c_char_p
LIB.arm_ctypes_task_rewards.argtypes = [ctypes.c_char_p, FP, ctypes.c_int, FP, ctypes.c_char_p]
LIB.arm_ctypes_task_goal.argtypes = [ctypes.c_char_p, DP, FP, ctypes.c_char_p]
LIB.arm_ctypes_episode.argtypes = [ctypes.c_char_p, DP, ctypes.c_int, ctypes.c_int, ctypes.c_int,
                                   ctypes.c_ulonglong, DP, FP, ctypes.c_char_p]
LIB.arm_ctypes_cem_config.argtypes = [ctypes.c_char_p, ctypes.c_double, ctypes.c_char_p]
LIB.arm_ctypes_normalised_score.argtypes = [ctypes.c_double] * 3
LIB.arm_ctypes_normalised_score.restype = ctypes.c_double

BINS = {"left": (-0.40, -0.25), "near": (0.30, -0.40), "far": (0.50, -0.10)}  # bench.c
ZONE = (-0.15, 0.15, -0.70, -0.35)  # bench.c: x_min, x_max, y_min, y_max
TASKS = [LIB.arm_ctypes_task_name(i).decode() for i in range(LIB.arm_ctypes_task_count())]
EINVAL, ENONFINITE = -1, -16


def default_params():
    v = np.zeros(LIB.arm_ctypes_nparam())
    LIB.arm_ctypes_default_params(v.ctypes.data_as(DP))
    return v


def obs_of(p, q1, q2, qd1, qd2):
    """Observation features from the angles (arm.h's order), forward kinematics in NumPy."""
    l1, l2 = p[2], p[3]
    return np.stack([np.sin(q1), np.cos(q1), np.sin(q2), np.cos(q2), qd1, qd2,
                     l1 * np.cos(q1) + l2 * np.cos(q1 + q2),
                     l1 * np.sin(q1) + l2 * np.sin(q1 + q2)], axis=-1)


def reward_reference(task, s):
    """tasks.h's formulas, restated."""
    s = s.astype(np.float64)
    x, y, v2 = s[:, 6], s[:, 7], s[:, 4] ** 2 + s[:, 5] ** 2
    if task.startswith("reach_") or task.startswith("slow_reach_"):
        bx, by = BINS[task.split("_")[-1]]
        d = np.hypot(x - bx, y - by)
        if task.startswith("reach_"):
            return np.exp(-d / 0.10)
        return np.exp(-d / 0.25) - 0.02 * np.minimum(v2, 20.0)
    if task == "keep_high":
        return np.clip((y + 0.65) / 1.30, 0.0, 1.0)
    if task == "keep_still":
        return np.exp(-v2 / 0.25)
    if task == "avoid_chute":
        dx = np.maximum(np.maximum(ZONE[0] - x, x - ZONE[1]), 0.0)
        dy = np.maximum(np.maximum(ZONE[2] - y, y - ZONE[3]), 0.0)
        return np.minimum(1.0, np.hypot(dx, dy) / 0.05)
    raise AssertionError(task)


def c_rewards(task, s):
    s = np.ascontiguousarray(s, dtype=np.float32)
    r = np.full(len(s), -7.0, dtype=np.float32)
    field = ctypes.create_string_buffer(96)
    rc = LIB.arm_ctypes_task_rewards(task.encode(), s.ctypes.data_as(FP), len(s),
                                     r.ctypes.data_as(FP), field)
    return rc, r, field.value.decode()


def episode(task, start, decisions, kind, query_ms=20, key=1):
    ret = ctypes.c_double(0.0)
    trace = np.zeros((decisions, 8), dtype=np.float32)
    field = ctypes.create_string_buffer(96)
    rc = LIB.arm_ctypes_episode(task.encode(), np.array(start, float).ctypes.data_as(DP),
                                decisions, query_ms, kind, key, ctypes.byref(ret),
                                trace.ctypes.data_as(FP), field)
    return rc, ret.value, trace, field.value.decode()


def test_suite_has_the_five_kinds():
    assert TASKS == ["reach_left", "reach_near", "reach_far", "keep_high", "keep_still",
                     "avoid_chute", "slow_reach_near"]


@pytest.mark.parametrize("task", TASKS)
def test_rewards_match_the_formulas(task):
    rng = np.random.default_rng(3)
    p = default_params()
    n = 2000
    s = obs_of(p, rng.uniform(-4.2, 1.1, n), rng.uniform(-2.6, 2.6, n), rng.normal(0, 2, n),
               rng.normal(0, 2, n))
    s = s.astype(np.float32)
    # Put a share of the states right at the bins and in or near the zone, where shapes change.
    for k, (bx, by) in enumerate(BINS.values()):
        s[k * 100:(k + 1) * 100, 6] = bx + rng.normal(0, 0.03, 100)
        s[k * 100:(k + 1) * 100, 7] = by + rng.normal(0, 0.03, 100)
    s[300:500, 6] = rng.uniform(-0.25, 0.25, 200)
    s[300:500, 7] = rng.uniform(-0.75, -0.30, 200)
    rc, r, _ = c_rewards(task, s)
    assert rc == 0
    assert np.allclose(r, reward_reference(task, s), rtol=1e-6, atol=1e-7)


def test_rewards_refuse_non_finite_states_and_write_nothing():
    s = np.zeros((6, 8), dtype=np.float32)
    s[3, 5] = np.nan
    rc, r, field = c_rewards("keep_still", s)
    assert rc == ENONFINITE and field == "states[3][5]"
    assert np.all(r == -7.0)
    rc, _, field = c_rewards("no_such_task", s[:2])
    assert rc == EINVAL and field == "task"


@pytest.mark.parametrize("task", [t for t in TASKS if "reach" in t])
def test_goal_observation_puts_the_gripper_on_the_bin_at_rest(task):
    p = default_params()
    obs = np.zeros(8, dtype=np.float32)
    field = ctypes.create_string_buffer(96)
    assert LIB.arm_ctypes_task_goal(task.encode(), p.ctypes.data_as(DP), obs.ctypes.data_as(FP),
                                    field) == 0
    q1, q2 = np.arctan2(obs[0], obs[1]), np.arctan2(obs[2], obs[3])
    want = obs_of(p, q1, q2, 0.0, 0.0)
    assert np.allclose(obs, want, atol=1e-6)
    bx, by = BINS[task.split("_")[-1]]
    assert np.hypot(obs[6] - bx, obs[7] - by) < 1e-6
    assert obs[4] == 0.0 and obs[5] == 0.0
    # Inside the stops, the shoulder angle taken into the turn around the middle of its range.
    mid = 0.5 * (p[12] + p[14])
    q1 = mid - np.pi + np.mod(q1 - (mid - np.pi), 2 * np.pi)
    assert p[12] < q1 < p[14] and p[13] < q2 < p[15]


@pytest.mark.parametrize("task", ["keep_high", "keep_still", "avoid_chute"])
def test_tasks_without_a_goal_say_so(task):
    obs = np.zeros(8, dtype=np.float32)
    field = ctypes.create_string_buffer(96)
    rc = LIB.arm_ctypes_task_goal(task.encode(), default_params().ctypes.data_as(DP),
                                  obs.ctypes.data_as(FP), field)
    assert rc == EINVAL and field.value == b"task"


def test_zero_torque_episode_matches_the_independent_model():
    """One second of the evaluation loop with zero torque: the trace and the return agree with
    armref's Lagrangian model integrated in NumPy and the rewards computed from tasks.h's
    formulas."""
    v = default_params()
    names = ["m1", "m2", "l1", "l2", "lc1", "lc2", "I1", "I2", "mp", "b1", "b2", "g", "qmin1",
             "qmin2", "qmax1", "qmax2", "k", "d", "depth", "tmax1", "tmax2"]
    p = params(**dict(zip(names, v)))
    start = (0.30, 1.20, 0.0, 0.0)
    decisions = 50
    rc, ret, trace, _ = episode("keep_high", start, decisions, 0)
    assert rc == 0
    x = np.array(start, float)
    want = []
    for _ in range(decisions):
        x = rk4(p, x, np.zeros(2), 20, 1e-3)
        want.append(obs_of(v, x[0], x[1], x[2], x[3]))
    want = np.array(want)
    assert np.allclose(trace, want, atol=2e-6)
    assert ret == pytest.approx(reward_reference("keep_high", want.astype(np.float32)).sum(),
                                abs=1e-4)


def test_policy_returning_nan_is_refused():
    rc, _, _, field = episode("keep_high", (0.0, 0.0, 0.0, 0.0), 10, 3)
    assert rc == ENONFINITE and field == "torque"


@pytest.mark.parametrize("decisions,query_ms,field", [(0, 20, "decisions"),
                                                      (10, 0, "query_ms"),
                                                      (10, 21, "query_ms")])
def test_bad_episode_settings_are_refused(decisions, query_ms, field):
    rc, _, _, got = episode("keep_high", (0.0, 0.0, 0.0, 0.0), decisions, 0, query_ms=query_ms)
    assert rc == EINVAL and got == field


@pytest.mark.parametrize("name,value", [("horizon", 0), ("population", 1), ("elites", 0),
                                        ("elites", 201), ("iterations", 0), ("knot_every", 31),
                                        ("plan_dt", 0.003), ("plan_dt", 0.01),
                                        ("plan_dt", float("nan")),
                                        ("initial_sd", 0.0), ("smoothing", 1.0)])
def test_bad_planner_settings_name_the_field(name, value):
    field = ctypes.create_string_buffer(96)
    assert LIB.arm_ctypes_cem_config(name.encode(), value, field) == EINVAL
    assert field.value.decode() == name


def test_normalised_score():
    assert LIB.arm_ctypes_normalised_score(150.0, 50.0, 250.0) == pytest.approx(0.5)
    assert LIB.arm_ctypes_normalised_score(50.0, 50.0, 250.0) == 0.0
    assert np.isnan(LIB.arm_ctypes_normalised_score(1.0, 5.0, 5.0))


def test_planner_holds_still_from_rest_at_the_known_optimum():
    """From a raised pose at rest, holding it scores exactly 1 per decision, the most any
    controller can get; the planner (gravity feed-forward plus residual) must reach at least
    99% of it. Random torques get almost nothing."""
    decisions = 60
    rc, ret, _, _ = episode("keep_still", (0.30, 1.20, 0.0, 0.0), decisions, 2)
    assert rc == 0
    assert ret >= 0.99 * decisions
    rc, ret_random, _, _ = episode("keep_still", (0.30, 1.20, 0.0, 0.0), decisions, 1)
    assert rc == 0 and ret_random < 0.2 * decisions


@pytest.mark.parametrize("task", ["reach_left", "reach_near", "reach_far"])
def test_planner_ends_at_the_bin(task):
    """From hanging at rest, 3 s of planning bring the gripper to the bin (distance computed here
    from the trace) and keep it there over the last half second: within 2 cm on median, never
    further than 5 cm (the sampled plans make it jitter a little)."""
    rc, _, trace, _ = episode(task, (-np.pi / 2, 0.0, 0.0, 0.0), 150, 2)
    assert rc == 0
    bx, by = BINS[task.split("_")[-1]]
    d = np.hypot(trace[-25:, 6] - bx, trace[-25:, 7] - by)
    assert np.median(d) < 0.02 and np.max(d) < 0.05, d


def test_tool_writes_the_figures(tmp_path):
    out = tmp_path / "b.json"
    r = subprocess.run([TOOL, "--tasks", "keep_high,avoid_chute", "--starts", "2",
                        "--decisions", "40", "--random-repeats", "2", "--json", str(out)],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    d = json.loads(out.read_text())
    assert [t["task"] for t in d["tasks"]] == ["keep_high", "avoid_chute"]
    for t in d["tasks"]:
        assert len(t["cem_per_start"]) == 2 and len(t["random_per_start"]) == 2
        assert t["cem_return"] == pytest.approx(np.mean(t["cem_per_start"]))
        assert t["random_return"] < t["cem_return"] <= 40.0  # rewards are at most 1
        assert t["cem_cpu_ms_per_decision"] > 0.0
        assert t["task"] in r.stdout


@pytest.mark.parametrize("args,needle", [
    (["--tasks", "reach_moon"], "unknown task 'reach_moon'"),
    (["--tasks", ""], "--tasks"),
    (["--starts", "6"], "--starts"),
    (["--decisions", "0"], "--decisions"),
    (["--query-ms", "21"], "--query-ms"),
    (["--plan-step-ms", "3"], "--plan-step-ms"),
    (["--plan-step-ms", "10"], "--plan-step-ms"),
    (["--elites", "300"], "--elites"),
    (["--knot-every", "40"], "--knot-every"),
    (["--horizon", "0"], "--horizon"),
    (["--parcel-mass", "heavy"], "--parcel-mass"),
    (["--initial-sd", "0"], "--initial-sd"),
    (["--json"], "--json"),
    (["--bogus"], "unknown option"),
])
def test_tool_bad_flags(args, needle):
    r = subprocess.run([TOOL, *args], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and needle in r.stderr, r.stderr
