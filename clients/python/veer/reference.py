"""The NumPy forward pass: F, B, the actor, Q and both policies, straight from the schema.

THIS MODULE IS THE REFERENCE. Every formula below is written from the definitions in
proto/veer_bundle.proto (the comments on LayerKind, InputKind and MergeKind) and from the
policy definitions in include/veer/runtime.h and DESIGN.md ("The maths"):

    continuous:  a = clip(map(actor(s, z)), low, high)   map = affine [-1, 1] -> [low, high]
                                                          when actor_normalized, else identity
    discrete:    a = argmax_a F(s, a, z) . z
    value:       Q(s, a, z) = F(s, a, z) . z

It shares no code with libveer and never calls it; the reference tests compare libveer's results
against this. It computes in float64 from the float32 weights stored in the bundle, so its own
rounding error is far below the float32 error it is used to measure.

The input objects are the plain `Net`/`BranchSpec`/`LayerSpec` values that veer.bundle's reader
builds from a Model (see veer.bundle.networks_from_model).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List, Optional

import numpy as np

# Layer kinds by the names the layout description uses (the schema's LayerKind values).
LINEAR, EMBEDDING, RELU, TANH, LAYER_NORM, RESCALE_NORM = (
    "linear", "embedding", "relu", "tanh", "layer_norm", "rescale_norm")


@dataclass
class LayerSpec:
    kind: str
    in_dim: int
    out_dim: int
    weight: Optional[np.ndarray] = None  # linear: (out, in); embedding: (prod(counts), out);
    bias: Optional[np.ndarray] = None    # layer norm: gain (out,)
    eps: float = 0.0
    norm: float = 0.0
    counts: List[int] = field(default_factory=list)


@dataclass
class InputSpec:
    kind: str                 # "state", "action" or "task"
    features: List[int] = field(default_factory=list)
    as_index: bool = False


@dataclass
class BranchSpec:
    name: str
    inputs: List[InputSpec]
    layers: List[LayerSpec]


@dataclass
class Net:
    branches: List[BranchSpec]
    merge: str = "concat"     # "concat" or "bilinear"
    bilinear_k: int = 0
    matrix_branch: int = 0
    bilinear_bias: bool = False
    head: List[LayerSpec] = field(default_factory=list)


@dataclass
class ActionInfo:
    kind: str                 # "continuous" or "discrete"
    dim: int
    count: int = 0
    low: Optional[np.ndarray] = None
    high: Optional[np.ndarray] = None


# ---- layers (proto/veer_bundle.proto, LayerKind) -------------------------------------------

def apply_layer(layer: LayerSpec, x: np.ndarray) -> np.ndarray:
    """One layer on a batch x of shape (n, in_dim), in float64."""
    if layer.kind == LINEAR:
        # y = W x + b; W is out_dim x in_dim.
        y = x @ layer.weight.astype(np.float64).T
        if layer.bias is not None and layer.bias.size:
            y = y + layer.bias.astype(np.float64)
        return y
    if layer.kind == EMBEDDING:
        # x holds in_dim indices; the joint index is mixed-radix over counts, row-major
        # (the first index is the most significant); y is that row of the table.
        idx = np.rint(x).astype(np.int64)
        joint = np.zeros(x.shape[0], dtype=np.int64)
        for j, c in enumerate(layer.counts):
            joint = joint * int(c) + idx[:, j]
        return layer.weight.astype(np.float64)[joint]
    if layer.kind == RELU:
        return np.maximum(x, 0.0)
    if layer.kind == TANH:
        return np.tanh(x)
    if layer.kind == LAYER_NORM:
        # y = gain * (x - mean) / sqrt(var + eps) + bias, mean and (biased) variance over the
        # features of each row (Ba, Kiros & Hinton 2016, "Layer Normalization"; from memory).
        mu = x.mean(axis=1, keepdims=True)
        var = ((x - mu) ** 2).mean(axis=1, keepdims=True)
        y = (x - mu) / np.sqrt(var + float(layer.eps))
        if layer.weight is not None and layer.weight.size:
            y = y * layer.weight.astype(np.float64)
        if layer.bias is not None and layer.bias.size:
            y = y + layer.bias.astype(np.float64)
        return y
    if layer.kind == RESCALE_NORM:
        # y = x * norm / ||x||, norm 0 meaning sqrt(out_dim).
        target = float(layer.norm) if layer.norm > 0 else np.sqrt(layer.out_dim)
        return x * (target / np.linalg.norm(x, axis=1, keepdims=True))
    raise ValueError(f"unknown layer kind {layer.kind!r}")


def apply_layers(layers: List[LayerSpec], x: np.ndarray) -> np.ndarray:
    for layer in layers:
        x = apply_layer(layer, x)
    return x


# ---- inputs and networks (InputKind, MergeKind) ----------------------------------------------

def _input(inp: InputSpec, action: ActionInfo, states, actions, zs) -> np.ndarray:
    if inp.kind == "state":
        return states[:, inp.features] if inp.features else states
    if inp.kind == "task":
        return zs
    if inp.kind == "action":
        if action.kind == "continuous":
            return actions
        # Discrete: the index itself (for an embedding layer) or its one-hot of length count.
        index = np.rint(actions[:, 0]).astype(np.int64)
        if inp.as_index:
            return index[:, None].astype(np.float64)
        onehot = np.zeros((actions.shape[0], action.count))
        onehot[np.arange(actions.shape[0]), index] = 1.0
        return onehot
    raise ValueError(f"unknown input kind {inp.kind!r}")


def run_network(net: Net, action: ActionInfo, states, actions=None, zs=None) -> np.ndarray:
    """Any network on a batch: each branch reads the concatenation of its inputs and applies
    its layers; the branch outputs merge; the head maps the merged vector to the output."""
    states = np.asarray(states, dtype=np.float64)
    n = states.shape[0]
    actions = None if actions is None else np.asarray(actions, np.float64).reshape(n, -1)
    zs = None if zs is None else np.asarray(zs, np.float64).reshape(n, -1)
    outs = []
    for br in net.branches:
        x = np.concatenate([_input(i, action, states, actions, zs) for i in br.inputs], axis=1)
        outs.append(apply_layers(br.layers, x))
    if net.merge == "concat":
        h = np.concatenate(outs, axis=1)
    elif net.merge == "bilinear":
        # The matrix branch's output is a (k + bias) x out matrix M, row-major; the other
        # branch's k-vector v (with a 1 appended when bilinear_bias) gives out = v^T M.
        k = net.bilinear_k
        rows = k + (1 if net.bilinear_bias else 0)
        m = outs[net.matrix_branch]
        v = outs[1 - net.matrix_branch]
        if net.bilinear_bias:
            v = np.concatenate([v, np.ones((n, 1))], axis=1)
        M = m.reshape(n, rows, m.shape[1] // rows)
        h = np.einsum("nk,nko->no", v, M)
    else:
        raise ValueError(f"unknown merge {net.merge!r}")
    return apply_layers(net.head, h)


# ---- F, B, actor, Q, policies (runtime.h, DESIGN.md "The maths") -----------------------------

def forward_f(nets, action: ActionInfo, states, actions, zs) -> np.ndarray:
    """F(s, a, z): n x z_dim."""
    return run_network(nets["forward"], action, states, actions, zs)


def backward_b(nets, action: ActionInfo, states) -> np.ndarray:
    """B(s): n x z_dim (B picks its own features from the full state)."""
    return run_network(nets["backward"], action, states)


def actor_raw(nets, action: ActionInfo, states, zs) -> np.ndarray:
    """The actor network's output, before the normalised-output mapping and clipping."""
    return run_network(nets["actor"], action, states, None, zs)


def q_value(nets, action: ActionInfo, states, actions, zs) -> np.ndarray:
    """Q(s, a, z) = F(s, a, z) . z, one value per row."""
    zs = np.asarray(zs, np.float64).reshape(np.asarray(states).shape[0], -1)
    return np.einsum("nd,nd->n", forward_f(nets, action, states, actions, zs), zs)


def policy_continuous(nets, action: ActionInfo, states, zs, normalized: bool):
    """a = clip(map(actor(s, z))), Q at the returned action. Returns (actions, values, clipped)
    where clipped marks the rows whose mapped action lay outside the bounds."""
    raw = actor_raw(nets, action, states, zs)
    low = action.low.astype(np.float64)
    high = action.high.astype(np.float64)
    mapped = low + (raw + 1.0) * 0.5 * (high - low) if normalized else raw
    a = np.clip(mapped, low, high)
    clipped = np.any(a != mapped, axis=1)
    return a, q_value(nets, action, states, a, zs), clipped


def q_all_actions(nets, action: ActionInfo, states, zs) -> np.ndarray:
    """Q(s, a, z) for every discrete action: n x count."""
    states = np.asarray(states, np.float64)
    zs = np.asarray(zs, np.float64).reshape(states.shape[0], -1)
    n, count = states.shape[0], action.count
    rep_s = np.repeat(states, count, axis=0)
    rep_z = np.repeat(zs, count, axis=0)
    rep_a = np.tile(np.arange(count, dtype=np.float64), n)[:, None]
    return q_value(nets, action, rep_s, rep_a, rep_z).reshape(n, count)


def policy_discrete(nets, action: ActionInfo, states, zs):
    """a = argmax_a F(s, a, z) . z; returns (indices, values, all Q values)."""
    q = q_all_actions(nets, action, states, zs)
    idx = np.argmax(q, axis=1)
    return idx, q[np.arange(q.shape[0]), idx], q
