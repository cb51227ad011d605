"""Model bundles from Python: the exporter (NumPy weights -> bundle file) and the reader.

A bundle is the 8-byte magic "VEERMDL1" followed by one serialized BundleFile
{format_version = 1, checksum = BLAKE2b-256(payload), payload = serialized Model}
(proto/veer_bundle.proto). The exporter takes
  * a layout: a dict (or JSON file) describing dimensions, the action space, and each network as
    branches over named inputs merged into a head (see LAYOUT below),
  * the weights: a mapping (or .npz) from names to arrays, one per layer that has parameters,
  * a sample of training states,
and computes what the runtime needs beside the weights: the drift statistics (mean, covariance,
per-feature quantile edges, Mahalanobis-distance percentiles), a reference subset of states with
their B embeddings, and the second moment Cov(B) = E[B B^T] over the sample. B is evaluated by
the independent NumPy forward pass in veer.reference, never by libveer, so a bundle written
here can be used to check libveer.

The key choice: the layout names layers by kind only; every dimension is read off the weight
arrays and chained, so a layout cannot disagree with its weights without an error naming the
array. Weights are looked up by a fixed naming rule ("forward.branches.0.layers.2.weight",
"backward.head.0.bias") unless a layer names its own keys.

LAYOUT (all keys but feature_names, z_dim, action and networks are optional):

    {"model_version": "arm-7", "feature_names": ["x", "y", ...], "z_dim": 32,
     "discount": 0.98, "decision_step_s": 0.01,
     "action": {"kind": "continuous", "low": [...], "high": [...], "names": [...]}
            or {"kind": "discrete", "count": 6, "names": [...]},
     "fallback_action": [...]            (discrete: [index]; default: mid-bounds or [0]),
     "actor_normalized": false,
     "task_defaults": {"rescale": true, "rescale_norm": 0, "center_rewards": false, "ridge": 1e-3},
     "networks": {
        "forward": {"branches": [{"name": "sa",
                                  "inputs": [{"kind": "state", "features": [0, 1]},
                                             {"kind": "action", "as_index": false},
                                             {"kind": "task"}],
                                  "layers": [{"kind": "linear"}, {"kind": "relu"},
                                             {"kind": "layer_norm", "eps": 1e-5},
                                             {"kind": "embedding", "counts": [6]},
                                             {"kind": "rescale_norm", "norm": 0}]}],
                    "merge": "concat"  or  {"kind": "bilinear", "k": 16,
                                            "matrix_branch": 1, "bias": true},
                    "head": [{"kind": "linear"}, ...]},
        "backward": {...}, "actor": {...}},
     "provenance": {"notes": "...", "settings": "...", "source_digest": "..."}}

Command line (run with Debian's /usr/bin/python3; PYTHONPATH must hold build/python, or set
VEER_BUILD_DIR):

    python3 -m veer.bundle export --layout L.json --weights W.npz --states S.npy -o M.veer
    python3 -m veer.bundle show M.veer [--json]
    python3 -m veer.bundle random --preset small|standard|continuous -o M.veer
"""
from __future__ import annotations

import argparse
import datetime as _dt
import hashlib
import json
import os
import sys
import warnings
from typing import Dict, Mapping, Optional, Tuple

import numpy as np

from . import reference as ref


def _import_pb2():
    """The generated schema module lives in the build tree (build-*/python)."""
    try:
        import veer_bundle_pb2  # noqa: F401
        return veer_bundle_pb2
    except ImportError:
        here = os.path.dirname(os.path.abspath(__file__))
        candidates = [os.path.join(os.environ.get("VEER_BUILD_DIR", ""), "python"),
                      os.path.join(here, "..", "..", "..", "build", "python")]
        for c in candidates:
            if os.path.isfile(os.path.join(c, "veer_bundle_pb2.py")):
                sys.path.insert(0, os.path.abspath(c))
                import veer_bundle_pb2
                return veer_bundle_pb2
        raise ImportError("veer_bundle_pb2 not found: build veer first (cmake --build build) and "
                          "put build/python on PYTHONPATH or set VEER_BUILD_DIR")


pb = _import_pb2()

MAGIC = b"VEERMDL1"
FORMAT_VERSION = 1
PRODUCER = "veer-export 0.1"

LAYER_KINDS = {"linear": pb.LAYER_LINEAR, "embedding": pb.LAYER_EMBEDDING, "relu": pb.LAYER_RELU,
               "tanh": pb.LAYER_TANH, "layer_norm": pb.LAYER_LAYER_NORM,
               "rescale_norm": pb.LAYER_RESCALE_NORM}
LAYER_NAMES = {v: k for k, v in LAYER_KINDS.items()}
INPUT_KINDS = {"state": pb.INPUT_STATE, "action": pb.INPUT_ACTION, "task": pb.INPUT_TASK}
INPUT_NAMES = {v: k for k, v in INPUT_KINDS.items()}
NETWORKS = ("forward", "backward", "actor")


class BundleFormatError(Exception):
    """A file that is not a readable bundle. `code` mirrors the names in include/veer/error.h."""

    def __init__(self, code: str, field: str, message: str):
        super().__init__(f"{code}: {field}: {message}")
        self.code, self.field, self.message = code, field, message


# ---- file framing --------------------------------------------------------------------------

def pack_bundle(model_or_payload, format_version: int = FORMAT_VERSION,
                checksum: Optional[bytes] = None) -> bytes:
    """Magic + BundleFile around a Model (or an already serialized payload). `checksum`
    overrides the computed one (for making damaged files on purpose)."""
    payload = (model_or_payload if isinstance(model_or_payload, (bytes, bytearray))
               else model_or_payload.SerializeToString())
    frame = pb.BundleFile(format_version=format_version, payload=bytes(payload),
                          checksum=checksum if checksum is not None
                          else hashlib.blake2b(payload, digest_size=32).digest())
    return MAGIC + frame.SerializeToString()


def write_file_atomic(path: str, data: bytes) -> None:
    """Write to a temporary name in the same folder, then rename: a reader never sees half."""
    tmp = f"{path}.tmp{os.getpid()}"
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


# ---- the exporter ----------------------------------------------------------------------------

def _f32(a, name: str) -> np.ndarray:
    arr = np.asarray(a, dtype=np.float32)
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: holds NaN or infinity")
    return arr


def _input_dim(inp: dict, state_dim: int, z_dim: int, action: dict, where: str) -> int:
    kind = inp.get("kind")
    if kind == "state":
        feats = inp.get("features") or []
        for f in feats:
            if not 0 <= int(f) < state_dim:
                raise ValueError(f"{where}.features: index {f} outside [0, {state_dim})")
        return len(feats) if feats else state_dim
    if kind == "action":
        if action["kind"] == "continuous":
            return len(action["low"])
        return 1 if inp.get("as_index") else int(action["count"])
    if kind == "task":
        return z_dim
    raise ValueError(f"{where}.kind: {kind!r} is not state, action or task")


def _build_layers(specs, in_dim: int, weights: Mapping, prefix: str, msg_layers) -> int:
    """Appends the layers to `msg_layers`, reading shapes from the weights; returns out_dim."""
    cur = in_dim
    for j, spec in enumerate(specs):
        where = f"{prefix}.{j}"
        kind = spec.get("kind")
        if kind not in LAYER_KINDS:
            raise ValueError(f"{where}.kind: {kind!r} is not one of {sorted(LAYER_KINDS)}")
        layer = msg_layers.add(kind=LAYER_KINDS[kind], in_dim=cur)
        wkey = spec.get("weight", f"{where}.weight")
        bkey = spec.get("bias", f"{where}.bias")
        if kind == "linear":
            if wkey not in weights:
                raise ValueError(f"{wkey}: missing from the weights")
            w = _f32(weights[wkey], wkey)
            if w.ndim != 2 or w.shape[1] != cur:
                raise ValueError(f"{wkey}: shape {w.shape}, expected (out, {cur})")
            out = w.shape[0]
            b = _f32(weights[bkey], bkey) if bkey in weights else np.zeros(out, np.float32)
            if b.shape != (out,):
                raise ValueError(f"{bkey}: shape {b.shape}, expected ({out},)")
            layer.weight.extend(w.ravel().tolist())
            layer.bias.extend(b.tolist())
        elif kind == "embedding":
            counts = [int(c) for c in spec.get("counts", [])]
            if len(counts) != cur or any(c < 1 for c in counts):
                raise ValueError(f"{where}.counts: {counts} must hold {cur} positive counts, "
                                 f"one per index input")
            if wkey not in weights:
                raise ValueError(f"{wkey}: missing from the weights")
            w = _f32(weights[wkey], wkey)
            if w.ndim != 2 or w.shape[0] != int(np.prod(counts)):
                raise ValueError(f"{wkey}: shape {w.shape}, expected ({int(np.prod(counts))}, out)")
            out = w.shape[1]
            layer.counts.extend(counts)
            layer.weight.extend(w.ravel().tolist())
        elif kind == "layer_norm":
            out = cur
            g = _f32(weights.get(wkey, np.ones(cur)), wkey)
            b = _f32(weights.get(bkey, np.zeros(cur)), bkey)
            if g.shape != (cur,) or b.shape != (cur,):
                raise ValueError(f"{wkey}: gain and bias must have shape ({cur},)")
            layer.weight.extend(g.tolist())
            layer.bias.extend(b.tolist())
            layer.eps = float(spec.get("eps", 1e-5))
            if not layer.eps > 0:
                raise ValueError(f"{where}.eps: must be > 0")
        elif kind == "rescale_norm":
            out = cur
            layer.norm = float(spec.get("norm", 0.0))
        else:  # relu, tanh
            out = cur
        layer.out_dim = out
        cur = out
    return cur


def _build_network(name: str, spec: dict, msg, state_dim: int, z_dim: int, action: dict,
                   weights: Mapping, want_out: int) -> None:
    branches = spec.get("branches") or []
    if not branches:
        raise ValueError(f"{name}.branches: at least one branch is needed")
    outs = []
    for i, bspec in enumerate(branches):
        br = msg.branches.add(name=str(bspec.get("name", f"b{i}")))
        in_dim = 0
        for k, ispec in enumerate(bspec.get("inputs") or []):
            in_dim += _input_dim(ispec, state_dim, z_dim, action, f"{name}.branches.{i}.inputs.{k}")
            br.inputs.add(kind=INPUT_KINDS[ispec["kind"]],
                          features=[int(f) for f in ispec.get("features") or []],
                          as_index=bool(ispec.get("as_index", False)))
        if in_dim == 0:
            raise ValueError(f"{name}.branches.{i}.inputs: a branch needs at least one input")
        outs.append(_build_layers(bspec.get("layers") or [], in_dim, weights,
                                  f"{name}.branches.{i}.layers", br.layers))
    merge = spec.get("merge", "concat")
    if isinstance(merge, str):
        merge = {"kind": merge}
    if merge["kind"] == "concat":
        msg.merge = pb.MERGE_CONCAT
        merged = sum(outs)
    elif merge["kind"] == "bilinear":
        if len(outs) != 2:
            raise ValueError(f"{name}.merge: bilinear needs exactly two branches")
        msg.merge = pb.MERGE_BILINEAR
        k = int(merge["k"])
        mb = int(merge.get("matrix_branch", 1))
        bias = bool(merge.get("bias", False))
        msg.bilinear_k, msg.matrix_branch, msg.bilinear_bias = k, mb, bias
        rows = k + (1 if bias else 0)
        if outs[1 - mb] != k:
            raise ValueError(f"{name}.branches.{1 - mb}: output {outs[1 - mb]} must equal k={k}")
        if outs[mb] % rows:
            raise ValueError(f"{name}.branches.{mb}: output {outs[mb]} is not a multiple of {rows}")
        merged = outs[mb] // rows
    else:
        raise ValueError(f"{name}.merge: {merge['kind']!r} is not concat or bilinear")
    out = _build_layers(spec.get("head") or [], merged, weights, f"{name}.head", msg.head)
    if out != want_out:
        raise ValueError(f"{name}: output dimension {out}, expected {want_out}")


def drift_statistics(states: np.ndarray, bins: int, cov_ridge: Optional[float] = None) -> dict:
    """The training-state statistics for drift monitoring, in float64.

    mean and covariance: the sample mean and the unbiased (n - 1) sample covariance.
    quantile_edges: per feature, the (bins - 1) interior edges at probabilities k / bins
      (numpy.quantile's default linear interpolation, Hyndman & Fan 1996 type 7).
    Mahalanobis distance d(x) = sqrt((x - mean)^T (cov + ridge I)^-1 (x - mean)); its 99th
      and 99.9th percentiles over the training states themselves.
    cov_ridge: a scalar added to the diagonal so that constant or collinear features do not
      make the covariance singular. By default 1e-6 times the mean feature variance (common
      practice, no source), raised by factors of 10 until the covariance as stored (float32)
      plus the ridge has a Cholesky factor in float64, which is what libveer computes at load.
      A scalar ridge shrinks the distance along low-variance features most: when it exceeds
      0.1% of some feature's variance a warning names the feature; standardise features of
      very different scales before export, or pass cov_ridge.
    The distances use the float32-rounded covariance, so the percentiles describe the same
    matrix the runtime inverts.
    """
    x = np.asarray(states, dtype=np.float64)
    n, dim = x.shape
    if n < 2:
        raise ValueError("states: at least 2 training states are needed for statistics")
    if bins < 2:
        raise ValueError("bins: at least 2 quantile bins are needed")
    mean = x.mean(axis=0)
    cov = np.cov(x, rowvar=False, ddof=1).reshape(dim, dim)
    cov = (cov + cov.T) / 2  # exactly symmetric after rounding, as the loader requires
    cov32 = cov.astype(np.float32).astype(np.float64)
    ridge = 1e-6 * max(float(np.trace(cov)) / dim, 1e-12) if cov_ridge is None else cov_ridge
    if not (np.isfinite(ridge) and ridge >= 0):
        raise ValueError(f"cov_ridge: {ridge} must be finite and >= 0")
    for _ in range(12):
        try:
            chol = np.linalg.cholesky(cov32 + ridge * np.eye(dim))
            break
        except np.linalg.LinAlgError:
            if cov_ridge is not None:
                raise ValueError(f"cov_ridge: {cov_ridge:g} leaves the covariance singular; "
                                 f"raise it") from None
            ridge *= 10.0
    else:
        raise ValueError("states: the covariance stays singular whatever the ridge")
    variances = np.diag(cov)
    small = np.nonzero((variances > 0) & (ridge > 1e-3 * variances))[0]
    if small.size:
        listed = ", ".join(f"{i} (variance {variances[i]:.3g})" for i in small[:8])
        warnings.warn(f"stats.cov_ridge {ridge:g} exceeds 0.1% of the variance of features "
                      f"{listed}: drift along them is under-reported; standardise features of "
                      f"very different scales or pass cov_ridge")
    cov_ridge = ridge
    probs = np.arange(1, bins) / bins
    edges = np.quantile(x, probs, axis=0).T  # dim x (bins - 1)
    y = np.linalg.solve(chol, (x - mean).T)
    dist = np.sqrt(np.sum(y * y, axis=0))
    return {"count": n, "mean": mean, "cov": cov, "cov_ridge": float(cov_ridge), "bins": bins,
            "quantile_edges": edges, "mahalanobis_p99": float(np.quantile(dist, 0.99)),
            "mahalanobis_p999": float(np.quantile(dist, 0.999)), "distances": dist}


def weights_digest(weights: Mapping) -> str:
    """BLAKE2b-256 over the weights' names, shapes and float32 bytes, in name order."""
    h = hashlib.blake2b(digest_size=32)
    for k in sorted(weights):
        a = np.ascontiguousarray(np.asarray(weights[k], dtype=np.float32))
        h.update(k.encode() + b"\0" + str(a.shape).encode() + b"\0" + a.tobytes())
    return "blake2b-256:" + h.hexdigest()


def build_model(layout: dict, weights: Mapping, training_states, *, reference_count: int = 512,
                bins: int = 16, cov_ridge: Optional[float] = None, rng_key: int = 0,
                created: Optional[str] = None, with_stats: bool = True):
    """The Model message for `layout` and `weights`, with statistics, reference set and
    Cov(B) computed from `training_states` (n x state_dim). Raises ValueError naming the
    layout field or weight array at fault."""
    names = [str(s) for s in layout["feature_names"]]
    state_dim = len(names)
    z_dim = int(layout["z_dim"])
    if state_dim < 1 or z_dim < 1:
        raise ValueError("feature_names, z_dim: need at least one feature and z_dim >= 1")
    action = dict(layout["action"])
    m = pb.Model(model_version=str(layout.get("model_version", "unnamed")),
                 state_dim=state_dim, z_dim=z_dim,
                 discount=float(layout.get("discount", 0.98)),
                 decision_step_s=float(layout.get("decision_step_s", 0.01)))
    m.feature_names.extend(names)

    if action["kind"] == "continuous":
        low = _f32(action["low"], "action.low")
        high = _f32(action["high"], "action.high")
        if low.shape != high.shape or low.ndim != 1 or low.size == 0:
            raise ValueError("action.low, action.high: need equal, non-empty lengths")
        bad = np.nonzero(low > high)[0]
        if bad.size:
            raise ValueError(f"action.low[{bad[0]}]: {low[bad[0]]} > high {high[bad[0]]}")
        m.action.kind = pb.ACTION_CONTINUOUS
        m.action.dim = low.size
        m.action.low.extend(low.tolist())
        m.action.high.extend(high.tolist())
        fallback = _f32(layout.get("fallback_action", (low + high) / 2), "fallback_action")
        if fallback.shape != low.shape or np.any(fallback < low) or np.any(fallback > high):
            raise ValueError("fallback_action: must have one value per action dimension, "
                             "within the bounds")
        action_dim = low.size
    elif action["kind"] == "discrete":
        count = int(action["count"])
        if count < 1:
            raise ValueError("action.count: must be >= 1")
        m.action.kind = pb.ACTION_DISCRETE
        m.action.dim = 1
        m.action.count = count
        fallback = np.asarray(layout.get("fallback_action", [0]), dtype=np.float32)
        if fallback.shape != (1,) or not 0 <= fallback[0] < count or fallback[0] != int(fallback[0]):
            raise ValueError(f"fallback_action: must be one action index in [0, {count})")
        action_dim = 1
    else:
        raise ValueError(f"action.kind: {action.get('kind')!r} is not continuous or discrete")
    m.action.names.extend(str(s) for s in action.get("names", []))
    m.fallback_action.extend(fallback.tolist())

    td = layout.get("task_defaults", {})
    m.task_defaults.rescale = bool(td.get("rescale", True))
    m.task_defaults.rescale_norm = float(td.get("rescale_norm", 0.0))
    m.task_defaults.center_rewards = bool(td.get("center_rewards", False))
    m.task_defaults.ridge = float(td.get("ridge", 1e-3))

    nets = layout["networks"]
    for net in NETWORKS:
        if net not in nets:
            continue
        if net == "actor" and action["kind"] != "continuous":
            raise ValueError("networks.actor: only continuous bundles carry an actor")
        want = z_dim if net != "actor" else action_dim
        _build_network(net, nets[net], getattr(m, net), state_dim, z_dim, action, weights, want)
    for net in ("forward", "backward") + (("actor",) if action["kind"] == "continuous" else ()):
        if net not in nets:
            raise ValueError(f"networks.{net}: missing")
    m.actor_normalized = bool(layout.get("actor_normalized", False))
    if m.actor_normalized and action["kind"] != "continuous":
        raise ValueError("actor_normalized: only continuous bundles carry an actor")

    states = np.asarray(training_states, dtype=np.float64)
    if states.ndim != 2 or states.shape[1] != state_dim:
        raise ValueError(f"states: shape {states.shape}, expected (n, {state_dim})")
    if not np.all(np.isfinite(states)):
        raise ValueError("states: hold NaN or infinity")

    # B over the whole sample, evaluated by the reference forward pass from the float32 weights
    # as stored (so the reference set's B agrees with the bundle's own B network).
    view = networks_from_model(m)
    b_all = ref.backward_b(view, action_info(m), states)
    if not np.all(np.isfinite(b_all)):
        raise ValueError("networks.backward: B is not finite on the training states")

    if with_stats:
        st = drift_statistics(states, bins, cov_ridge)
        m.stats.count = st["count"]
        m.stats.mean.extend(st["mean"].astype(np.float32).tolist())
        m.stats.cov.extend(st["cov"].astype(np.float32).ravel().tolist())
        m.stats.cov_ridge = st["cov_ridge"]
        m.stats.bins = bins
        m.stats.quantile_edges.extend(st["quantile_edges"].astype(np.float32).ravel().tolist())
        m.stats.mahalanobis_p99 = st["mahalanobis_p99"]
        m.stats.mahalanobis_p999 = st["mahalanobis_p999"]

    if reference_count > 0:
        rng = np.random.default_rng(rng_key)
        count = min(reference_count, states.shape[0])
        pick = np.sort(rng.choice(states.shape[0], size=count, replace=False))
        m.reference.count = count
        m.reference.states.extend(states[pick].astype(np.float32).ravel().tolist())
        m.reference.b.extend(b_all[pick].astype(np.float32).ravel().tolist())

    # Cov(B) as runtime.h defines it: the second moment E[B B^T] over the training sample.
    second = b_all.T @ b_all / b_all.shape[0]
    m.cov_b.extend(((second + second.T) / 2).astype(np.float32).ravel().tolist())

    prov = layout.get("provenance", {})
    m.provenance.producer = str(prov.get("producer", PRODUCER))
    m.provenance.created = created or _dt.datetime.now(_dt.timezone.utc).strftime(
        "%Y-%m-%dT%H:%M:%SZ")
    m.provenance.source_digest = str(prov.get("source_digest") or weights_digest(weights))
    m.provenance.settings = str(prov.get("settings") or json.dumps(
        {"reference_count": reference_count, "bins": bins, "rng_key": rng_key,
         "cov_ridge": float(m.stats.cov_ridge) if with_stats else None,
         "training_states": int(states.shape[0])}, sort_keys=True))
    m.provenance.notes = str(prov.get("notes", ""))
    return m


def export_bundle(path: str, layout: dict, weights: Mapping, training_states, **kw):
    """build_model, then write the framed file atomically. Returns the Model."""
    m = build_model(layout, weights, training_states, **kw)
    write_file_atomic(path, pack_bundle(m))
    return m


# ---- the reader ------------------------------------------------------------------------------

def _arr(values, shape=None) -> np.ndarray:
    """A float32 array, shaped when its size fits `shape`, else left flat: the reader shows
    damaged content as it is, and leaves judging it to libveer's validator."""
    a = np.array(values, dtype=np.float32)
    if shape is None:
        return a
    known = int(np.prod([d for d in shape if d != -1]))
    if known == 0:
        return a
    fits = a.size % known == 0 if -1 in shape else a.size == known
    return a.reshape(shape) if fits else a


def _layer_view(layer) -> ref.LayerSpec:
    kind = LAYER_NAMES.get(layer.kind, f"unset({layer.kind})")
    w = b = None
    if layer.kind == pb.LAYER_LINEAR:
        w = _arr(layer.weight, (layer.out_dim, layer.in_dim))
        b = _arr(layer.bias)
    elif layer.kind == pb.LAYER_EMBEDDING:
        w = _arr(layer.weight, (-1, layer.out_dim))
    elif layer.kind == pb.LAYER_LAYER_NORM:
        w, b = _arr(layer.weight), _arr(layer.bias)
    return ref.LayerSpec(kind=kind, in_dim=layer.in_dim, out_dim=layer.out_dim, weight=w, bias=b,
                         eps=layer.eps, norm=layer.norm, counts=list(layer.counts))


def networks_from_model(m) -> Dict[str, ref.Net]:
    """Plain NumPy views of the networks present in a Model, for veer.reference."""
    out = {}
    for name in NETWORKS:
        if not m.HasField(name):
            continue
        net = getattr(m, name)
        out[name] = ref.Net(
            branches=[ref.BranchSpec(
                name=br.name,
                inputs=[ref.InputSpec(INPUT_NAMES.get(i.kind, "unset"), list(i.features),
                                      i.as_index) for i in br.inputs],
                layers=[_layer_view(L) for L in br.layers]) for br in net.branches],
            merge="bilinear" if net.merge == pb.MERGE_BILINEAR else "concat",
            bilinear_k=net.bilinear_k, matrix_branch=net.matrix_branch,
            bilinear_bias=net.bilinear_bias, head=[_layer_view(L) for L in net.head])
    return out


def action_info(m) -> ref.ActionInfo:
    if m.action.kind == pb.ACTION_CONTINUOUS:
        return ref.ActionInfo("continuous", m.action.dim, 0, _arr(m.action.low),
                              _arr(m.action.high))
    return ref.ActionInfo("discrete", 1, m.action.count)


class Bundle:
    """A bundle read from disk: the Model, the payload digest, and NumPy views."""

    def __init__(self, model, digest: bytes, format_version: int):
        self.model = model
        self.digest = digest
        self.format_version = format_version
        self.nets = networks_from_model(model)
        self.action = action_info(model)
        s, d = model.state_dim, model.z_dim
        st = model.stats
        self.arrays = {
            "fallback_action": _arr(model.fallback_action),
            "stats.mean": _arr(st.mean),
            "stats.cov": _arr(st.cov, (s, s)),
            "stats.quantile_edges": _arr(st.quantile_edges, (s, -1)),
            "reference.states": _arr(model.reference.states, (-1, s)),
            "reference.b": _arr(model.reference.b, (-1, d)),
            "cov_b": _arr(model.cov_b, (d, d)),
        }

    # The reference forward pass on this bundle (veer.reference).
    def F(self, states, actions, zs):
        return ref.forward_f(self.nets, self.action, states, actions, zs)

    def B(self, states):
        return ref.backward_b(self.nets, self.action, states)

    def actor(self, states, zs):
        return ref.actor_raw(self.nets, self.action, states, zs)

    def Q(self, states, actions, zs):
        return ref.q_value(self.nets, self.action, states, actions, zs)

    def policy(self, states, zs):
        if self.action.kind == "continuous":
            return ref.policy_continuous(self.nets, self.action, states, zs,
                                         self.model.actor_normalized)
        return ref.policy_discrete(self.nets, self.action, states, zs)

    def b_features(self):
        """The state features B reads, in the order it reads them."""
        feats = []
        for br in self.model.backward.branches:
            for i in br.inputs:
                if i.kind == pb.INPUT_STATE:
                    feats.extend(i.features if len(i.features) else range(self.model.state_dim))
        return [int(f) for f in feats]


def read_bundle(src) -> Bundle:
    """Reads a bundle from a path or bytes; checks magic, version and checksum (not the
    Model's consistency: that is the runtime's validator's job)."""
    if isinstance(src, (bytes, bytearray)):
        data = bytes(src)
    else:
        with open(src, "rb") as f:
            data = f.read()
    if len(data) < len(MAGIC) or data[:len(MAGIC)] != MAGIC:
        raise BundleFormatError("VEER_ENOTBUNDLE", "magic",
                                "the file does not start with VEERMDL1: not a model bundle")
    frame = pb.BundleFile()
    try:
        frame.ParseFromString(data[len(MAGIC):])
    except Exception as e:  # the protobuf runtime's DecodeError
        raise BundleFormatError("VEER_ENOTBUNDLE", "bundle_file", f"does not decode: {e}")
    if frame.format_version != FORMAT_VERSION:
        raise BundleFormatError("VEER_EVERSION", "format_version",
                                f"version {frame.format_version}; this reader reads 1")
    digest = hashlib.blake2b(frame.payload, digest_size=32).digest()
    if frame.checksum != digest:
        raise BundleFormatError("VEER_ECHECKSUM", "checksum",
                                "the payload's BLAKE2b-256 does not match the stored checksum")
    m = pb.Model()
    try:
        m.ParseFromString(frame.payload)
    except Exception as e:
        raise BundleFormatError("VEER_EDECODE", "payload", f"the Model does not decode: {e}")
    return Bundle(m, digest, frame.format_version)


# ---- summary (the `show` command; also the shape `veer inspect --json` follows) -------------

def _layers_summary(layers):
    return [{"kind": LAYER_NAMES.get(L.kind, "unset"), "in": L.in_dim, "out": L.out_dim}
            for L in layers]


def _count_params(net) -> int:
    return sum(len(L.weight) + len(L.bias)
               for L in list(net.head) + [L for br in net.branches for L in br.layers])


def summary(b: Bundle) -> dict:
    m = b.model
    bf = b.b_features()
    td = m.task_defaults
    out = {
        "format_version": b.format_version,
        "digest": b.digest.hex(),
        "model_version": m.model_version,
        "state_dim": m.state_dim,
        "z_dim": m.z_dim,
        "discount": m.discount,
        "decision_step_s": m.decision_step_s,
        "features": [{"index": i, "name": n, "read_by_b": i in bf}
                     for i, n in enumerate(m.feature_names)],
        "b_features": bf,
        "action": {"kind": b.action.kind, "dim": m.action.dim, "count": m.action.count,
                   "low": list(m.action.low), "high": list(m.action.high),
                   "names": list(m.action.names)},
        "fallback_action": list(m.fallback_action),
        "actor_normalized": m.actor_normalized,
        "task_defaults": {"rescale": td.rescale,
                          "rescale_norm": td.rescale_norm if td.rescale_norm > 0
                          else float(np.sqrt(m.z_dim)),
                          "center_rewards": td.center_rewards, "ridge": td.ridge},
        "networks": {},
        "stats": {"present": m.HasField("stats") and len(m.stats.mean) > 0},
        "reference_count": m.reference.count,
        "cov_b": len(m.cov_b) > 0,
        "provenance": {k: getattr(m.provenance, k)
                       for k in ("producer", "created", "source_digest", "settings", "notes")},
    }
    mean, cov = b.arrays["stats.mean"], b.arrays["stats.cov"]
    if out["stats"]["present"] and mean.size == m.state_dim and cov.ndim == 2:
        for i, f in enumerate(out["features"]):
            f["mean"] = float(mean[i])
            f["std"] = float(np.sqrt(max(float(cov[i, i]), 0.0)))
    if out["stats"]["present"]:
        out["stats"].update({"count": m.stats.count, "bins": m.stats.bins,
                             "cov_ridge": m.stats.cov_ridge,
                             "mahalanobis_p99": m.stats.mahalanobis_p99,
                             "mahalanobis_p999": m.stats.mahalanobis_p999})
    total = 0
    for name in NETWORKS:
        if not m.HasField(name):
            continue
        net = getattr(m, name)
        params = _count_params(net)
        total += params
        n = {"merge": "bilinear" if net.merge == pb.MERGE_BILINEAR else "concat",
             "parameters": params,
             "branches": [{"name": br.name,
                           "inputs": [{"kind": INPUT_NAMES.get(i.kind, "unset"),
                                       "features": list(i.features), "as_index": i.as_index}
                                      for i in br.inputs],
                           "layers": _layers_summary(br.layers)} for br in net.branches],
             "head": _layers_summary(net.head)}
        if net.merge == pb.MERGE_BILINEAR:
            n["bilinear"] = {"k": net.bilinear_k, "matrix_branch": net.matrix_branch,
                             "bias": net.bilinear_bias}
        out["networks"][name] = n
    out["parameters"] = total
    return out


def _print_summary(s: dict, path: str) -> None:
    print(f"bundle {path}: format {s['format_version']}, model '{s['model_version']}'")
    print(f"  digest {s['digest']}")
    print(f"  state_dim {s['state_dim']}  z_dim {s['z_dim']}  discount {s['discount']:.4g}  "
          f"decision step {s['decision_step_s']:.4g} s")
    a = s["action"]
    if a["kind"] == "continuous":
        print(f"  action: continuous, {a['dim']} dims")
        names = [a["names"][i] if i < len(a["names"]) else f"a{i}" for i in range(a["dim"])]
        width = max(len(n) for n in names)
        for i, nm in enumerate(names):
            print(f"    {nm:<{width}}  [{a['low'][i]:.4g}, {a['high'][i]:.4g}]  "
                  f"fallback {s['fallback_action'][i]:.4g}")
    else:
        print(f"  action: discrete, {a['count']} actions, fallback {int(s['fallback_action'][0])}")
    print("  features (* read by B):")
    for f in s["features"]:
        print(f"    {'*' if f['read_by_b'] else ' '} {f['index']:3d} {f['name']}")
    for name, n in s["networks"].items():
        print(f"  network {name}: {n['merge']} of {len(n['branches'])} branches, "
              f"{n['parameters']} parameters")
        for br in n["branches"]:
            ins = ", ".join(i["kind"] + (f"{i['features']}" if i["features"] else "")
                            for i in br["inputs"])
            lay = " -> ".join(f"{L['kind']}({L['in']}->{L['out']})" for L in br["layers"])
            print(f"    branch {br['name']} [{ins}]: {lay}")
        if n["head"]:
            print("    head: " + " -> ".join(f"{L['kind']}({L['in']}->{L['out']})"
                                          for L in n["head"]))
    st = s["stats"]
    if st["present"]:
        print(f"  drift statistics: {st['count']} states, {st['bins']} bins, Mahalanobis p99 "
              f"{st['mahalanobis_p99']:.4g}, p99.9 {st['mahalanobis_p999']:.4g}")
    else:
        print("  drift statistics: absent")
    print(f"  reference set: {s['reference_count']} states; Cov(B): "
          f"{'present' if s['cov_b'] else 'absent'}")
    p = s["provenance"]
    print(f"  provenance: {p['producer']}, created {p['created']}, source {p['source_digest']}")
    if p["notes"]:
        print(f"  notes: {p['notes']}")


# ---- command line ----------------------------------------------------------------------------

def _load_states(path: str) -> np.ndarray:
    if path.endswith(".npz"):
        with np.load(path) as z:
            if "states" not in z:
                raise ValueError(f"{path}: an .npz of states must hold an array named 'states'")
            return z["states"]
    return np.load(path)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python3 -m veer.bundle",
                                description="Write, read and describe veer model bundles.")
    sub = p.add_subparsers(dest="cmd", required=True)
    e = sub.add_parser("export", help="write a bundle from a layout, weights and training states")
    e.add_argument("--layout", required=True, help="layout description (JSON)")
    e.add_argument("--weights", required=True, help=".npz of weight arrays")
    e.add_argument("--states", required=True, help=".npy (n x state_dim) or .npz with 'states'")
    e.add_argument("-o", "--output", required=True)
    e.add_argument("--reference-count", type=int, default=512)
    e.add_argument("--bins", type=int, default=16)
    e.add_argument("--cov-ridge", type=float, default=None)
    e.add_argument("--rng-key", type=int, default=0)
    s = sub.add_parser("show", help="describe a bundle")
    s.add_argument("bundle")
    s.add_argument("--json", action="store_true")
    r = sub.add_parser("random", help="write a bundle with random weights (for tests, benchmarks)")
    r.add_argument("--preset", required=True, help="small, standard, continuous")
    r.add_argument("--rng-key", type=int, default=0)
    r.add_argument("-o", "--output", required=True)
    args = p.parse_args(argv)

    try:
        if args.cmd == "export":
            with open(args.layout) as f:
                layout = json.load(f)
            with np.load(args.weights) as z:
                weights = {k: z[k] for k in z.files}
            with open(args.weights, "rb") as f:
                layout.setdefault("provenance", {}).setdefault(
                    "source_digest", "blake2b-256:" + hashlib.blake2b(f.read(),
                                                                      digest_size=32).hexdigest())
            m = export_bundle(args.output, layout, weights, _load_states(args.states),
                              reference_count=args.reference_count, bins=args.bins,
                              cov_ridge=args.cov_ridge, rng_key=args.rng_key)
            print(f"wrote {args.output}: state_dim {m.state_dim}, z_dim {m.z_dim}, "
                  f"{m.reference.count} reference states")
        elif args.cmd == "show":
            b = read_bundle(args.bundle)
            s = summary(b)
            if args.json:
                print(json.dumps(s, indent=2))
            else:
                _print_summary(s, args.bundle)
        else:
            from . import synth
            m = synth.write_preset(args.output, args.preset, rng_key=args.rng_key)
            print(f"wrote {args.output}: preset {args.preset}, z_dim {m.z_dim}")
    except BundleFormatError as err:
        print(f"veer.bundle: {err.code} in {err.field}: {err.message}", file=sys.stderr)
        return 3
    except (ValueError, KeyError, OSError) as err:
        print(f"veer.bundle: {err}", file=sys.stderr)
        return 3 if args.cmd != "random" else 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
