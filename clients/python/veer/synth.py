"""Bundles with random weights, for tests and benchmarks. NOT trained models: their actions mean
nothing and no machine should ever be driven by one.

make_layout() builds a layout description (see veer.bundle) from a few switches: action kind,
concat or bilinear merge in F, B reading a feature subset, layer norm, rescale-to-norm,
embedding inputs (the discrete action as an index, or two integer state features such as grid
cells). random_weights() draws weights for any layout with a variance-preserving scale
(He et al. 2015 for linear layers: std sqrt(2 / in)), so activations stay of order one through
deep stacks and float32 rounding in libveer stays measurable against the float64 reference.

Presets for benchmarks (issue 2):
    small     24 state features, d = 32, F and B with hidden 256 x 2, 6 discrete actions
    standard  24 state features, d = 100, F with two 1024-wide branches (state+action,
              state+task) and a 1024 x 2 head, B with hidden 1024 x 2, 6 discrete actions
    continuous  a small continuous-action bundle (3 action dims) with an actor
"""
from __future__ import annotations

from typing import Dict, List, Optional

import numpy as np

from . import bundle as vb


def _mlp(hidden: List[int], out: int, act: str = "relu", layer_norm_first: bool = False):
    layers = []
    for i, h in enumerate(hidden):
        layers.append({"kind": "linear", "out": h})
        if layer_norm_first and i == 0:
            layers += [{"kind": "layer_norm", "eps": 1e-5}, {"kind": "tanh"}]
        else:
            layers.append({"kind": act})
    if out:
        layers.append({"kind": "linear", "out": out})
    return layers


def make_layout(*, kind: str = "discrete", state_dim: int = 8, z_dim: int = 16,
                hidden: List[int] = (64, 64), action_count: int = 5, action_dim: int = 2,
                merge: str = "concat", bilinear_k: int = 8, bilinear_bias: bool = True,
                b_features: Optional[List[int]] = None, layer_norm: bool = False,
                rescale_b: bool = True, embed_action: bool = False,
                embed_state: Optional[List[int]] = None, state_counts: Optional[List[int]] = None,
                actor_normalized: bool = True, feature_names: Optional[List[str]] = None,
                model_version: str = "random") -> dict:
    hidden = list(hidden)
    names = feature_names or [f"s{i}" for i in range(state_dim)]
    if kind == "continuous":
        action = {"kind": "continuous", "low": [-1.0 - 0.5 * i for i in range(action_dim)],
                  "high": [1.0 + 0.25 * i for i in range(action_dim)],
                  "names": [f"a{i}" for i in range(action_dim)]}
        fallback = [0.0] * action_dim
    else:
        action = {"kind": "discrete", "count": action_count,
                  "names": [f"act{i}" for i in range(action_count)]}
        fallback = [0]

    # Inputs that read the discrete action / integer state features through an embedding.
    act_input = {"kind": "action", "as_index": bool(embed_action and kind == "discrete")}
    pre_action: list = []
    if act_input["as_index"]:
        pre_action = [{"kind": "embedding", "counts": [action_count], "out": 8}]

    if merge == "bilinear":
        # F = v(s, a)^T M(s, z): v a k-vector, M a (k + bias) x d matrix.
        rows = bilinear_k + (1 if bilinear_bias else 0)
        sa = {"name": "state_action", "inputs": [{"kind": "state"}, act_input],
              "layers": _mlp(hidden, bilinear_k, layer_norm_first=layer_norm)}
        if act_input["as_index"]:
            sa = {"name": "action", "inputs": [act_input],
                  "layers": pre_action + [{"kind": "tanh"}] + _mlp(hidden[:1], bilinear_k)}
        sz = {"name": "state_task", "inputs": [{"kind": "state"}, {"kind": "task"}],
              "layers": _mlp(hidden, rows * z_dim, layer_norm_first=layer_norm)}
        forward = {"branches": [sa, sz], "merge": {"kind": "bilinear", "k": bilinear_k,
                                                  "matrix_branch": 1, "bias": bilinear_bias},
                   "head": []}
    else:
        inputs = [{"kind": "state"}, {"kind": "task"}]
        if act_input["as_index"]:
            br_a = {"name": "action", "inputs": [act_input], "layers": pre_action}
            br_sz = {"name": "state_task", "inputs": inputs,
                     "layers": _mlp(hidden[:1], 0, layer_norm_first=layer_norm)}
            forward = {"branches": [br_a, br_sz], "merge": "concat",
                       "head": _mlp(hidden[1:], z_dim)}
        else:
            br = {"name": "state_action_task", "inputs": [{"kind": "state"}, act_input,
                                                          {"kind": "task"}],
                  "layers": _mlp(hidden[:1], 0, layer_norm_first=layer_norm)}
            forward = {"branches": [br], "merge": "concat", "head": _mlp(hidden[1:], z_dim)}

    b_inputs: list = []
    b_layers: list = []
    if embed_state:
        # Two (or more) integer features looked up jointly, beside the continuous ones.
        b_inputs = [{"kind": "state", "features": list(embed_state)}]
        emb = {"name": "cell", "inputs": b_inputs,
               "layers": [{"kind": "embedding", "counts": list(state_counts), "out": 16}]}
        rest = [i for i in (b_features or range(state_dim)) if i not in embed_state]
        cont = {"name": "features", "inputs": [{"kind": "state", "features": rest}],
                "layers": _mlp(hidden[:1], 0, layer_norm_first=layer_norm)}
        backward = {"branches": [emb, cont], "merge": "concat",
                    "head": _mlp(hidden[1:], z_dim)}
    else:
        b_layers = _mlp(hidden, z_dim, layer_norm_first=layer_norm)
        backward = {"branches": [{"name": "state", "inputs": [
            {"kind": "state", "features": list(b_features or [])}], "layers": b_layers}],
            "merge": "concat", "head": []}
    if rescale_b:
        (backward["head"] if backward["head"] else backward["branches"][0]["layers"]).append(
            {"kind": "rescale_norm", "norm": 0.0})

    nets = {"forward": forward, "backward": backward}
    if kind == "continuous":
        nets["actor"] = {"branches": [{"name": "state_task",
                                       "inputs": [{"kind": "state"}, {"kind": "task"}],
                                       "layers": _mlp(hidden, action_dim,
                                                      layer_norm_first=layer_norm)}],
                         "merge": "concat", "head": []}
    return {"model_version": model_version, "feature_names": names, "z_dim": z_dim,
            "discount": 0.98, "decision_step_s": 0.01, "action": action,
            "fallback_action": fallback,
            "actor_normalized": actor_normalized and kind == "continuous",
            "task_defaults": {"rescale": True, "rescale_norm": 0.0, "center_rewards": False,
                              "ridge": 1e-3},
            "networks": nets,
            "provenance": {"notes": "random weights for tests and benchmarks; not trained"}}


def _layers_weights(specs, cur: int, prefix: str, rng, w: Dict[str, np.ndarray]) -> int:
    for j, spec in enumerate(specs):
        key = f"{prefix}.{j}"
        k = spec["kind"]
        if k == "linear":
            out = int(spec["out"])
            w[key + ".weight"] = rng.normal(0, np.sqrt(2.0 / cur), (out, cur)).astype(np.float32)
            w[key + ".bias"] = rng.normal(0, 0.1, out).astype(np.float32)
            cur = out
        elif k == "embedding":
            out = int(spec["out"])
            w[key + ".weight"] = rng.normal(0, 1.0, (int(np.prod(spec["counts"])), out)).astype(
                np.float32)
            cur = out
        elif k == "layer_norm":
            w[key + ".weight"] = rng.uniform(0.5, 1.5, cur).astype(np.float32)
            w[key + ".bias"] = rng.normal(0, 0.1, cur).astype(np.float32)
    return cur


def random_weights(layout: dict, rng) -> Dict[str, np.ndarray]:
    """Weights for every parameterised layer of `layout`, named by the exporter's rule.
    Linear layers in the layout must say their width as "out"."""
    w: Dict[str, np.ndarray] = {}
    state_dim = len(layout["feature_names"])
    for net, spec in layout["networks"].items():
        outs = []
        for i, br in enumerate(spec["branches"]):
            cur = sum(vb._input_dim(inp, state_dim, layout["z_dim"], layout["action"], net)
                      for inp in br["inputs"])
            outs.append(_layers_weights(br["layers"], cur, f"{net}.branches.{i}.layers", rng, w))
        merge = spec.get("merge", "concat")
        if isinstance(merge, dict) and merge["kind"] == "bilinear":
            rows = merge["k"] + (1 if merge.get("bias") else 0)
            cur = outs[merge.get("matrix_branch", 1)] // rows
        else:
            cur = sum(outs)
        _layers_weights(spec.get("head", []), cur, f"{net}.head", rng, w)
    return w


def random_states(layout: dict, n: int, rng, embed_state=None, state_counts=None) -> np.ndarray:
    """Training states: correlated Gaussian features (so the covariance is not diagonal), with
    the embedding-read features drawn as integers in [0, count)."""
    d = len(layout["feature_names"])
    mix = rng.normal(0, 1, (d, d)) / np.sqrt(d) + np.eye(d)
    x = rng.normal(0, 1, (n, d)) @ mix.T + rng.normal(0, 0.5, d)
    if embed_state:
        for f, c in zip(embed_state, state_counts):
            x[:, f] = rng.integers(0, c, n)
    return x.astype(np.float32)


PRESETS = {
    "small": dict(kind="discrete", state_dim=24, z_dim=32, hidden=[256, 256], action_count=6),
    "continuous": dict(kind="continuous", state_dim=12, z_dim=16, hidden=[64, 64], action_dim=3),
}


def standard_layout() -> dict:
    """STANDARD: two 1024-wide F branches (state+action, state+task), each linear + layer norm
    + tanh, concatenated into a 1024 x 2 ReLU head; B with hidden 1024 x 2; d = 100."""
    lay = make_layout(kind="discrete", state_dim=24, z_dim=100, hidden=[1024, 1024],
                      action_count=6, model_version="standard-random")
    ln = [{"kind": "linear", "out": 1024}, {"kind": "layer_norm", "eps": 1e-5}, {"kind": "tanh"}]
    lay["networks"]["forward"] = {
        "branches": [{"name": "state_action", "inputs": [{"kind": "state"}, {"kind": "action"}],
                      "layers": [dict(x) for x in ln]},
                     {"name": "state_task", "inputs": [{"kind": "state"}, {"kind": "task"}],
                      "layers": [dict(x) for x in ln]}],
        "merge": "concat", "head": _mlp([1024, 1024], 100)}
    return lay


def preset_layout(name: str) -> dict:
    if name == "standard":
        return standard_layout()
    if name not in PRESETS:
        raise ValueError(f"preset: {name!r} is not one of small, standard, continuous")
    return make_layout(model_version=f"{name}-random", **PRESETS[name])


def build_random(layout: dict, *, rng_key: int = 0, n_states: int = 2000, reference_count: int = 256,
                 embed_state=None, state_counts=None, **kw):
    """(Model, weights, training states) for a layout with random weights."""
    rng = np.random.default_rng(rng_key)
    weights = random_weights(layout, rng)
    states = random_states(layout, n_states, rng, embed_state, state_counts)
    m = vb.build_model(layout, weights, states, reference_count=reference_count, rng_key=rng_key,
                       created="2026-01-01T00:00:00Z", **kw)
    return m, weights, states


def write_preset(path: str, name: str, rng_key: int = 0):
    m, _, _ = build_random(preset_layout(name), rng_key=rng_key)
    vb.write_file_atomic(path, vb.pack_bundle(m))
    return m
