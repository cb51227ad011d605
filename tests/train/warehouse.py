"""A small warehouse floor of our own, its exact dynamic programming, and a ctypes bridge to
libveer, for the trainer's exactness check (test_warehouse.py) and for longer runs by hand
(python3 warehouse.py --help).

The floor: 9 x 11 cells, four rooms split by walls with one doorway between neighbouring rooms,
and shelves that block moves. Actions: 0 stay, 1 north, 2 south, 3 east, 4 west; a move into a
wall, a shelf or the edge leaves the agent where it is. The slippery variant makes every move
fail (the agent stays) with probability SLIP.

Rewards are received on arrival: Q(s, a) = sum_s' P(s'|s, a) (r(s') + gamma V(s')), the
convention under which Q(s, a) = sum_s' M(s, a, s') r(s') for the successor measure M that FB
learns. Exact values come from value iteration (Bellman 1957; Sutton & Barto, Reinforcement
Learning, 2nd ed., section 4.4) and exact policy evaluation from the linear system
(I - gamma P_pi) V = P_pi r (ibid. section 4.1), solved with NumPy.
"""
import ctypes
import os

import numpy as np

FLOOR = [
    "..S..#.....",
    "..S..#..SS.",
    ".....D.....",
    ".SS..#.....",
    "##D#####D##",
    ".....#.....",
    "..S..D..S..",
    "..S..#..S..",
    ".....#.....",
]
H, W = len(FLOOR), len(FLOOR[0])
N_ACTIONS = 5
MOVES = [(0, 0), (-1, 0), (1, 0), (0, 1), (0, -1)]  # stay, north, south, east, west
SLIP = 0.25


def free_cells():
    """The cells an agent can stand on, as (row, col), in row-major order."""
    return [(r, c) for r in range(H) for c in range(W) if FLOOR[r][c] in ".D"]


def transition_matrix(slip=0.0):
    """P[s, a, s'] over the free cells."""
    cells = free_cells()
    index = {cell: i for i, cell in enumerate(cells)}
    n = len(cells)
    P = np.zeros((n, N_ACTIONS, n))
    for i, (r, c) in enumerate(cells):
        for a, (dr, dc) in enumerate(MOVES):
            target = (r + dr, c + dc)
            j = index.get(target, i)  # walls, shelves and the edge block the move
            if a == 0 or j == i:
                P[i, a, i] = 1.0
            else:
                P[i, a, j] += 1.0 - slip
                P[i, a, i] += slip
    return P


def value_iteration(P, r, gamma, tol=1e-12):
    """Optimal Q for reward r(s') on arrival (Sutton & Barto section 4.4)."""
    V = np.zeros(P.shape[0])
    while True:
        Q = P @ (r + gamma * V)
        V_new = Q.max(axis=1)
        if np.max(np.abs(V_new - V)) < tol:
            return P @ (r + gamma * V_new)
        V = V_new


def policy_return(P, r, gamma, pi):
    """J = mean over start cells of V_pi, pi[s, a] a stochastic or one-hot policy."""
    P_pi = np.einsum("sa,sat->st", pi, P)
    V = np.linalg.solve(np.eye(P.shape[0]) - gamma * P_pi, P_pi @ r)
    return V.mean()


def normalised(P, r, gamma, pi):
    n = P.shape[0]
    Q = value_iteration(P, r, gamma)
    star = np.zeros((n, N_ACTIONS))
    star[np.arange(n), Q.argmax(axis=1)] = 1.0
    j_star = policy_return(P, r, gamma, star)
    j_rand = policy_return(P, r, gamma, np.full((n, N_ACTIONS), 1.0 / N_ACTIONS))
    return (policy_return(P, r, gamma, pi) - j_rand) / (j_star - j_rand)


def make_log(path, slip, per_pair, rng_key):
    """A full-coverage log: every (cell, action) pair per_pair times, next cells sampled from
    the exact dynamics. Writes states/actions/next_states .npy (float32) into path."""
    rng = np.random.default_rng(rng_key)
    cells = np.array(free_cells(), dtype=np.float32)
    P = transition_matrix(slip)
    s_idx = np.repeat(np.arange(len(cells)), N_ACTIONS * per_pair)
    a = np.tile(np.repeat(np.arange(N_ACTIONS), per_pair), len(cells))
    nxt = np.array([rng.choice(len(cells), p=P[i, k]) for i, k in zip(s_idx, a)])
    os.makedirs(path, exist_ok=True)
    np.save(os.path.join(path, "states.npy"), cells[s_idx])
    np.save(os.path.join(path, "actions.npy"), a.astype(np.float32))
    np.save(os.path.join(path, "next_states.npy"), cells[nxt])
    return len(s_idx)


def dense_rewards(count, rng_key):
    """Half: a few +1 and -1 cells; half: Gaussian noise smoothed over neighbouring cells."""
    rng = np.random.default_rng(rng_key)
    cells = free_cells()
    n = len(cells)
    out = []
    for k in range(count):
        if k % 2 == 0:
            r = np.zeros(n)
            picks = rng.choice(n, size=6, replace=False)
            r[picks[:3]] = 1.0
            r[picks[3:]] = -1.0
        else:
            grid = np.zeros((H, W))
            grid[[c[0] for c in cells], [c[1] for c in cells]] = rng.normal(size=n)
            smooth = grid.copy()
            for _ in range(2):
                padded = np.pad(smooth, 1)
                smooth = (padded[1:-1, 1:-1] + padded[:-2, 1:-1] + padded[2:, 1:-1]
                          + padded[1:-1, :-2] + padded[1:-1, 2:]) / 5.0
            r = np.array([smooth[c] for c in cells])
            r /= np.abs(r).max()
        out.append(r)
    return out


class VeerError(ctypes.Structure):
    _fields_ = [("code", ctypes.c_int), ("field", ctypes.c_char * 96),
                ("message", ctypes.c_char * 256)]


class TaskSpec(ctypes.Structure):
    _fields_ = [("source", ctypes.c_int), ("count", ctypes.c_uint32),
                ("states", ctypes.c_void_p), ("values", ctypes.c_void_p),
                ("rescale", ctypes.c_int), ("center", ctypes.c_int),
                ("cov_correction", ctypes.c_int), ("ridge", ctypes.c_float),
                ("max_count", ctypes.c_uint32)]


class TaskReport(ctypes.Structure):
    _fields_ = [("r2", ctypes.c_double), ("norm_raw", ctypes.c_double),
                ("mean_reward", ctypes.c_double)]


TASK_SAMPLES, TASK_GOALS = 1, 2


def _f32p(a):
    return a.ctypes.data_as(ctypes.c_void_p)


class Served:
    """A bundle loaded by libveer (VEER_BUILD_DIR/libveer.so), serving tasks and actions."""

    def __init__(self, bundle_path, z_dim, build_dir=None):
        build_dir = build_dir or os.environ["VEER_BUILD_DIR"]
        self.lib = ctypes.CDLL(os.path.join(build_dir, "libveer.so"))
        self.z_dim = z_dim
        self.bundle = ctypes.c_void_p()
        self.ws = ctypes.c_void_p()
        err = VeerError()
        rc = self.lib.veer_bundle_open(bundle_path.encode(), ctypes.byref(self.bundle),
                                       ctypes.byref(err))
        if rc != 0:
            raise RuntimeError(f"veer_bundle_open: {rc} {err.field} {err.message}")
        rc = self.lib.veer_workspace_create(self.bundle, ctypes.c_uint32(256),
                                            ctypes.byref(self.ws), ctypes.byref(err))
        if rc != 0:
            raise RuntimeError(f"veer_workspace_create: {rc} {err.message}")

    def close(self):
        self.lib.veer_workspace_destroy(self.ws)
        self.lib.veer_bundle_close(self.bundle)

    def encode(self, source, states, values):
        states = np.ascontiguousarray(states, dtype=np.float32)
        values = np.ascontiguousarray(values, dtype=np.float32)
        spec = TaskSpec()
        self.lib.veer_task_spec_init(ctypes.byref(spec), source)
        spec.count = len(values)
        spec.states = _f32p(states)
        spec.values = _f32p(values)
        z = np.zeros(self.z_dim, dtype=np.float32)
        err = VeerError()
        rc = self.lib.veer_task_encode(self.bundle, ctypes.byref(spec), _f32p(z), None,
                                       ctypes.byref(err))
        if rc != 0:
            raise RuntimeError(f"veer_task_encode: {rc} {err.field} {err.message}")
        return z

    def act(self, states, z):
        states = np.ascontiguousarray(states, dtype=np.float32)
        out = np.zeros(len(states), dtype=np.float32)
        rc = self.lib.veer_act_batch(self.ws, ctypes.c_size_t(len(states)), _f32p(states),
                                     _f32p(z), _f32p(out), None, None)
        if rc != 0:
            raise RuntimeError(f"veer_act_batch: {rc}")
        return out.astype(int)

    def backward(self, states):
        states = np.ascontiguousarray(states, dtype=np.float32)
        out = np.zeros((len(states), self.z_dim), dtype=np.float32)
        rc = self.lib.veer_eval_backward(self.ws, ctypes.c_size_t(len(states)), _f32p(states),
                                         _f32p(out))
        if rc != 0:
            raise RuntimeError(f"veer_eval_backward: {rc}")
        return out


def one_hot(actions):
    pi = np.zeros((len(actions), N_ACTIONS))
    pi[np.arange(len(actions)), actions] = 1.0
    return pi


def evaluate(served, slip, gamma, n_dense=20, rng_key=7):
    """Scores of the served policies: every goal cell, and n_dense dense rewards with the
    rank-d projection bound beside each."""
    cells = np.array(free_cells(), dtype=np.float32)
    n = len(cells)
    P = transition_matrix(slip)
    goal_scores = []
    for g in range(n):
        r = np.zeros(n)
        r[g] = 1.0
        z = served.encode(TASK_GOALS, cells[g:g + 1], np.ones(1))
        goal_scores.append(normalised(P, r, gamma, one_hot(served.act(cells, z))))
    Bm = served.backward(cells).astype(np.float64)
    dense, bound = [], []
    for r in dense_rewards(n_dense, rng_key):
        z = served.encode(TASK_SAMPLES, cells, r)
        dense.append(normalised(P, r, gamma, one_hot(served.act(cells, z))))
        # The best a rank-d B allows: r projected on span(B) (least squares, uniform weights),
        # then the exactly optimal policy for the projection, scored on the true reward.
        coef, *_ = np.linalg.lstsq(Bm, r, rcond=None)
        Qp = value_iteration(P, Bm @ coef, gamma)
        bound.append(normalised(P, r, gamma, one_hot(Qp.argmax(axis=1))))
    return np.array(goal_scores), np.array(dense), np.array(bound)


if __name__ == "__main__":
    import argparse
    import subprocess
    import tempfile

    ap = argparse.ArgumentParser(description="train and score the warehouse floor by hand")
    ap.add_argument("--slip", type=float, default=0.0)
    ap.add_argument("--per-pair", type=int, default=40)
    ap.add_argument("--gamma", type=float, default=0.95)
    ap.add_argument("--build", default=os.environ.get("VEER_BUILD_DIR", "build"))
    ap.add_argument("train_flags", nargs="*", help="extra flags for veer train (after --)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        make_log(tmp, args.slip, args.per_pair, rng_key=3)
        out = os.path.join(tmp, "floor.veer")
        cmd = [os.path.join(args.build, "bin", "veer"), "train", "--preset", "tabular",
               "--states", f"{tmp}/states.npy", "--actions", f"{tmp}/actions.npy",
               "--next-states", f"{tmp}/next_states.npy", "--discrete", "5",
               "--state-counts", f"{H},{W}", "--features", "row,col", "--step", "1",
               "--discount", str(args.gamma), "--out", out] + args.train_flags
        subprocess.run(cmd, check=True)
        z_dim = 32
        for i, f in enumerate(args.train_flags):
            if f == "--z-dim":
                z_dim = int(args.train_flags[i + 1])
        served = Served(out, z_dim, args.build)
        goals, dense, bound = evaluate(served, args.slip, args.gamma)
        print(f"goals: mean {goals.mean():.3f} min {goals.min():.3f}")
        print(f"dense: mean {dense.mean():.3f}; rank-d projection bound mean {bound.mean():.3f}")
        with open(out + ".curve.csv") as f:
            print(f.read())
        served.close()
