"""Exactness check of `veer train` against dynamic programming on our warehouse floor.

Trains with the CLI on a full-coverage log of the floor (warehouse.py), serves the bundle
through libveer (ctypes: goal tasks and reward-sample tasks encoded by veer_task_encode, actions
from veer_act_batch on every cell), and scores each served policy exactly: normalised return
(J - J_random) / (J* - J_random), J* by value iteration (Bellman 1957; Sutton & Barto,
Reinforcement Learning, 2nd ed., section 4.4), J of a policy by solving (I - gamma P_pi) V = P_pi r
(ibid. section 4.1).

Targets from issue 5: mean goal score >= 0.95 (deterministic floor) and >= 0.9 (slippery), d = 32.
The CI runs the tabular preset (batch 2,048, 2,000 steps; 2-4 minutes per floor on 2 cores).
On this machine (OpenBLAS SkylakeX kernel, one thread) it scores 0.951 on the deterministic
floor (target met, by a hair) and 0.873 on the slippery one (NOT MET). The batch was the lever:
at batch 512 the same run scored 0.787 / 0.619; at 4,096, 0.963 on the deterministic floor.
Slippery runs by hand: batch 2,048 with --rng-key 2 and 3 scored 0.859 and 0.854; 3,000 steps
0.891, 4,000 steps 0.819, target rate 0.05 0.874; batch 4,096 0.884: spread between runs, not
steady progress, and a few goals in pockets stay near 0 in every run. Dense rewards: 0.41 at d = 32
beside a rank-d projection bound of 0.86. (Those runs: warehouse.py's main, by hand.) The
thresholds below are the measured figures less a margin for other CPUs' rounding, so the test
catches a regression without claiming the slippery target.
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

# What the CI-length run must reach: measured 0.951 and 0.873 (see the docstring), less margin.
GOAL_FLOOR_DETERMINISTIC = 0.93
GOAL_FLOOR_SLIPPERY = 0.84


def train(tmp, slip, extra=()):
    wh.make_log(str(tmp), slip, per_pair=40, rng_key=3)
    out = os.path.join(str(tmp), "floor.veer")
    cmd = [VEER, "train", "--preset", "tabular", "--states", f"{tmp}/states.npy",
           "--actions", f"{tmp}/actions.npy", "--next-states", f"{tmp}/next_states.npy",
           "--discrete", "5", "--state-counts", f"{wh.H},{wh.W}", "--features", "row,col",
           "--step", "1", "--discount", str(GAMMA), "--threads", "1", "--quiet",
           "--out", out, *extra]
    subprocess.run(cmd, check=True, timeout=600)
    return out


@pytest.fixture(scope="module")
def deterministic(tmp_path_factory):
    out = train(tmp_path_factory.mktemp("det"), 0.0)
    served = wh.Served(out, 32, BUILD)
    yield out, wh.evaluate(served, 0.0, GAMMA)
    served.close()


@pytest.fixture(scope="module")
def slippery(tmp_path_factory):
    out = train(tmp_path_factory.mktemp("slip"), wh.SLIP)
    served = wh.Served(out, 32, BUILD)
    yield out, wh.evaluate(served, wh.SLIP, GAMMA)
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
    assert goals.mean() >= GOAL_FLOOR_DETERMINISTIC


def test_goals_slippery(slippery):
    _, (goals, dense, bound) = slippery
    warnings.warn(f"slippery floor (moves fail {wh.SLIP:.0%}), d=32: goal score mean "
                  f"{goals.mean():.3f} (min {goals.min():.3f}); dense mean {dense.mean():.3f}, "
                  f"rank-d projection bound {bound.mean():.3f}")
    assert goals.mean() >= GOAL_FLOOR_SLIPPERY


def test_dense_rewards_beat_random(deterministic):
    """Dense rewards are reported beside the rank-d bound; the served policies must at least
    beat the uniform random policy on average, and the bound must be a proper score."""
    _, (_, dense, bound) = deterministic
    assert dense.mean() > 0.1
    assert 0.0 < bound.mean() <= 1.0 + 1e-9


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
