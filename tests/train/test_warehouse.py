"""Exactness check of `veer train` against dynamic programming on our warehouse floor.

Trains with the CLI on a full-coverage log of the floor (warehouse.py), serves the bundle
through libveer (ctypes: goal tasks and reward-sample tasks encoded by veer_task_encode, actions
from veer_act_batch on every cell), and scores each served policy exactly: normalised return
(J - J_random) / (J* - J_random), J* by value iteration (Bellman 1957; Sutton & Barto,
Reinforcement Learning, 2nd ed., section 4.4), J of a policy by solving (I - gamma P_pi) V = P_pi r
(ibid. section 4.1).

Targets from issue 5: mean goal score >= 0.95 (deterministic floor) and >= 0.9 (slippery), d = 32;
dense rewards reported beside the rank-d bound, aiming for >= 0.6 at d = 64. The tests assert
those targets. The CI runs the tabular preset: batch 2,048, 3,000 steps, the bundle made of the
parameters' exponential moving average (rate 0.01; Polyak & Juditsky 1992), 3 to 10 minutes per
floor by host and d, the three floors trained side by side.

Measured on this machine (OpenBLAS SkylakeX kernel, one thread), training key 3 as below:
deterministic 0.966, slippery 0.928 (training key 2: 0.932); dense at d = 64: 0.648 beside a
bound of 0.978 (goals 0.997); dense at d = 32: about 0.5 beside 0.86. What got there: batch 512 ->
2,048 (0.79 -> 0.95 deterministic, 0.62 -> 0.87 slippery at 2,000 steps), then the average
(slippery 0.88 -> 0.91 at 2,000 steps, 0.93 at 3,000). Without the average the last parameters
wobbled between runs (slippery 0.82-0.89 over keys and lengths). The margin is thin: the
deterministic floor at 4,000 steps scored 0.949, one goal in a pocket of the lower-left room
failing (score 0.02): a goal is lost when F misranks the actions at a doorway, far from the
goal, where its successor measure is small; the optimal policy for B(s).z itself scores 1.0
on every goal. (Those runs: warehouse.py's main, by hand.)
"""
import os
import subprocess
import warnings

import numpy as np
import pytest

import warehouse as wh

BUILD = os.environ.get("VEER_BUILD_DIR", "build")
VEER = os.path.join(BUILD, "bin", "veer")
GAMMA = 0.95

# Issue 5's targets (measured 0.966, 0.928 and 0.648; see the docstring).
GOAL_TARGET_DETERMINISTIC = 0.95
GOAL_TARGET_SLIPPERY = 0.9
DENSE_AIM_D64 = 0.6


# The three floors the tests train: name -> (slip probability, extra flags).
FLOORS = {"det": (0.0, ()), "slip": (wh.SLIP, ()), "det64": (0.0, ("--z-dim", "64"))}
TRAIN_TIMEOUT_S = 1200


@pytest.fixture(scope="module")
def trainings(tmp_path_factory):
    """Starts the three trainings side by side and returns wait(name) -> bundle path. Each is
    single-threaded (--threads 1: the bundle does not depend on the thread count), so one after
    the other they left a core idle for most of the 20 minutes they took on a slow day; side by
    side they take about half the wall time. They run at nice 10, so the other tests that ctest
    runs beside this one keep their share of the CPU (the trainings' results do not depend on
    scheduling). Stopped by process id at the end if still running."""
    procs = {}
    for name, (slip, extra) in FLOORS.items():
        tmp = tmp_path_factory.mktemp(name)
        wh.make_log(str(tmp), slip, per_pair=40, rng_key=3)
        out = os.path.join(str(tmp), "floor.veer")
        cmd = [VEER, "train", "--preset", "tabular", "--states", f"{tmp}/states.npy",
               "--actions", f"{tmp}/actions.npy", "--next-states", f"{tmp}/next_states.npy",
               "--discrete", "5", "--state-counts", f"{wh.H},{wh.W}", "--features", "row,col",
               "--step", "1", "--discount", str(GAMMA), "--threads", "1", "--quiet",
               "--out", out, *extra]
        procs[name] = (subprocess.Popen(cmd, preexec_fn=lambda: os.nice(10)), out)

    def wait(name):
        proc, out = procs[name]
        rc = proc.wait(timeout=TRAIN_TIMEOUT_S)
        assert rc == 0, f"veer train for the {name} floor exited with {rc}"
        return out

    yield wait
    for proc, _ in procs.values():
        if proc.poll() is None:
            proc.kill()
            proc.wait()


@pytest.fixture(scope="module")
def deterministic(trainings):
    served = wh.Served(trainings("det"), 32, BUILD)
    yield trainings("det"), wh.evaluate(served, 0.0, GAMMA)
    served.close()


@pytest.fixture(scope="module")
def deterministic_d64(trainings):
    served = wh.Served(trainings("det64"), 64, BUILD)
    yield trainings("det64"), wh.evaluate(served, 0.0, GAMMA)
    served.close()


@pytest.fixture(scope="module")
def slippery(trainings):
    served = wh.Served(trainings("slip"), 32, BUILD)
    yield trainings("slip"), wh.evaluate(served, wh.SLIP, GAMMA)
    served.close()


def test_value_iteration_matches_shortest_paths():
    """The reference itself: on the deterministic floor, reward 1 on arrival at g, the optimal
    value of a cell k moves away is gamma^(k-1) / (1 - gamma), and 1 / (1 - gamma) at g
    (geometric series along a shortest path; distances here by breadth-first search)."""
    cells = wh.free_cells()
    index = {c: i for i, c in enumerate(cells)}
    P = wh.transition_matrix(0.0)
    g = index[(8, 10)]
    dist = {cells[g]: 0}
    frontier = [cells[g]]
    while frontier:
        nxt = []
        for r, c in frontier:
            for dr, dc in wh.MOVES[1:]:
                q = (r + dr, c + dc)
                if q in index and q not in dist:
                    dist[q] = dist[(r, c)] + 1
                    nxt.append(q)
        frontier = nxt
    r = np.zeros(len(cells))
    r[g] = 1.0
    V = wh.value_iteration(P, r, GAMMA).max(axis=1)
    want = np.array([GAMMA ** max(dist[c] - 1, 0) / (1 - GAMMA) for c in cells])
    np.testing.assert_allclose(V, want, rtol=1e-9)


def test_goals_deterministic(deterministic):
    _, (goals, dense, bound) = deterministic
    # Reported as a warning so the figures show in the CI log even when the test passes.
    warnings.warn(f"deterministic floor, d=32: goal score mean {goals.mean():.3f} "
                  f"(min {goals.min():.3f}); dense mean {dense.mean():.3f}, "
                  f"rank-d projection bound {bound.mean():.3f}")
    assert goals.mean() >= GOAL_TARGET_DETERMINISTIC


def test_goals_slippery(slippery):
    _, (goals, dense, bound) = slippery
    warnings.warn(f"slippery floor (moves fail {wh.SLIP:.0%}), d=32: goal score mean "
                  f"{goals.mean():.3f} (min {goals.min():.3f}); dense mean {dense.mean():.3f}, "
                  f"rank-d projection bound {bound.mean():.3f}")
    assert goals.mean() >= GOAL_TARGET_SLIPPERY


def test_dense_rewards_beat_random(deterministic):
    """Dense rewards are reported beside the rank-d bound; the served policies must at least
    beat the uniform random policy on average, and the bound must be a proper score."""
    _, (_, dense, bound) = deterministic
    assert dense.mean() > 0.1
    assert 0.0 < bound.mean() <= 1.0 + 1e-9


def test_dense_rewards_d64(deterministic_d64):
    """Issue 5's aim for dense rewards: a mean of at least 0.6 at d = 64, reported beside the
    best a rank-d B allows."""
    _, (goals, dense, bound) = deterministic_d64
    warnings.warn(f"deterministic floor, d=64: dense mean {dense.mean():.3f} "
                  f"(min {dense.min():.3f}), rank-d projection bound {bound.mean():.3f}; "
                  f"goal score mean {goals.mean():.3f}")
    assert dense.mean() >= DENSE_AIM_D64


def test_bellman_residual_goes_down(deterministic):
    out, _ = deterministic
    rows = np.genfromtxt(out + ".curve.csv", delimiter=",", names=True)
    bellman = rows["bellman_heldout"]
    assert rows["step"][0] == 0 and np.isfinite(bellman).all()
    assert bellman[-5:].mean() < bellman[0]


def test_cli_refuses_bad_logs(tmp_path):
    wh.make_log(str(tmp_path), 0.0, per_pair=1, rng_key=3)
    a = np.load(tmp_path / "actions.npy")
    a[7] = 5  # beyond the declared count
    np.save(tmp_path / "actions.npy", a)
    base = [VEER, "train", "--states", f"{tmp_path}/states.npy", "--actions",
            f"{tmp_path}/actions.npy", "--next-states", f"{tmp_path}/next_states.npy",
            "--step", "1", "--out", f"{tmp_path}/x.veer", "--quiet"]
    p = subprocess.run(base + ["--discrete", "5"], capture_output=True, text=True)
    assert p.returncode == 3
    assert "actions.npy" in p.stderr and "row 7 holds action 5" in p.stderr
    assert "VEER_ELOG" in p.stderr
    assert not os.path.exists(f"{tmp_path}/x.veer")
    p = subprocess.run(base, capture_output=True, text=True)
    assert p.returncode == 2 and "--discrete or --continuous" in p.stderr
    p = subprocess.run(base + ["--discrete", "5", "--batch", "1"], capture_output=True, text=True)
    assert p.returncode == 2 and "--batch" in p.stderr
    wh.make_log(str(tmp_path), 0.0, per_pair=1, rng_key=3)  # a good log again
    p = subprocess.run(base + ["--discrete", "5", "--arch", "table"], capture_output=True,
                       text=True)
    assert p.returncode == 2 and "--state-counts" in p.stderr
    p = subprocess.run(base + ["--discrete", "5", "--arch", "wide"], capture_output=True,
                       text=True)
    assert p.returncode == 2 and "--arch 'wide'" in p.stderr and "mlp, split or table" in p.stderr
    for bad in ("2", "-0.1", "nan"):  # the average's rate is a fraction
        p = subprocess.run(base + ["--discrete", "5", "--average", bad], capture_output=True,
                           text=True)
        assert p.returncode == 2 and "--average" in p.stderr, (bad, p.stderr)
    assert not os.path.exists(f"{tmp_path}/x.veer")
