"""The exporter and reader (clients/python/veer/bundle.py) and the NumPy reference itself.

No libveer here: these check the Python side against outside references, so that the
libveer comparisons in test_networks.py stand on checked ground.
  * statistics: scipy.spatial.distance.mahalanobis, scipy.stats.mstats.mquantiles
    (alphap = betap = 1, Hyndman & Fan 1996 type 7), the textbook unbiased covariance;
  * Cov(B) = E[B B^T] as an explicit mean of outer products (runtime.h's definition);
  * the file frame: hashlib.blake2b(payload, digest_size=32), magic "VEERMDL1";
  * the reference forward pass: small networks worked by hand (values in the comments).
"""
import json
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy.spatial.distance import mahalanobis
from scipy.stats.mstats import mquantiles

from veer import bundle as vb
from veer import reference as ref
from veer import synth


@pytest.fixture(scope="module")
def continuous():
    layout = synth.make_layout(kind="continuous", state_dim=6, z_dim=8, action_dim=2,
                               b_features=[0, 3, 4], hidden=[16, 16])
    m, weights, states = synth.build_random(layout, rng_key=7, n_states=500, reference_count=64)
    return layout, weights, states, vb.read_bundle(vb.pack_bundle(m))


def test_drift_statistics_against_scipy(continuous):
    layout, weights, states, b = continuous
    m = b.model
    x = states.astype(np.float64)
    n, d = x.shape
    mu = x.sum(axis=0) / n
    cov = (x - mu).T @ (x - mu) / (n - 1)  # unbiased sample covariance, textbook
    assert m.stats.count == n
    np.testing.assert_allclose(b.arrays["stats.mean"], mu, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(b.arrays["stats.cov"], cov, rtol=1e-5, atol=1e-6)
    vi = np.linalg.inv(cov + m.stats.cov_ridge * np.eye(d))
    dist = np.array([mahalanobis(row, mu, vi) for row in x])
    p99, p999 = mquantiles(dist, [0.99, 0.999], alphap=1, betap=1)
    assert m.stats.mahalanobis_p99 == pytest.approx(p99, rel=1e-5)
    assert m.stats.mahalanobis_p999 == pytest.approx(p999, rel=1e-5)
    bins = m.stats.bins
    edges = b.arrays["stats.quantile_edges"]
    assert edges.shape == (d, bins - 1)
    for f in range(d):
        want = mquantiles(x[:, f], np.arange(1, bins) / bins, alphap=1, betap=1)
        np.testing.assert_allclose(edges[f], want, rtol=1e-5, atol=1e-6)
        # Each bin holds about 1/bins of the training states (the definition of the edges).
        counts = np.bincount(np.searchsorted(edges[f], x[:, f]), minlength=bins)
        assert np.all(np.abs(counts - n / bins) <= 2)


def test_reference_set_and_cov_b(continuous):
    layout, weights, states, b = continuous
    m = b.model
    rs = b.arrays["reference.states"]
    assert rs.shape == (64, 6) and m.reference.count == 64
    # Every reference state is a training state, and no state is taken twice.
    rows = {tuple(r) for r in states.astype(np.float32)}
    assert all(tuple(r) in rows for r in rs) and len({tuple(r) for r in rs}) == 64
    np.testing.assert_allclose(b.arrays["reference.b"], b.B(rs), rtol=1e-5, atol=1e-6)
    B = b.B(states)
    second = sum(np.outer(v, v) for v in B) / len(B)  # E[B B^T], runtime.h
    np.testing.assert_allclose(b.arrays["cov_b"], second, rtol=1e-5, atol=1e-6)
    # B reads only its subset: changing another feature leaves B unchanged.
    s2 = states[:5].copy()
    s2[:, [1, 2, 5]] += 10.0
    np.testing.assert_array_equal(b.B(s2), b.B(states[:5]))
    assert b.b_features() == [0, 3, 4]


def test_file_frame(continuous, tmp_path):
    layout, weights, states, b = continuous
    path = tmp_path / "m.veer"
    vb.export_bundle(str(path), layout, weights, states, reference_count=16)
    data = path.read_bytes()
    assert data[:8] == b"VEERMDL1"
    frame = vb.pb.BundleFile.FromString(data[8:])
    assert frame.format_version == 1
    assert frame.checksum == __import__("hashlib").blake2b(frame.payload, digest_size=32).digest()
    assert vb.pb.Model.FromString(frame.payload).reference.count == 16


@pytest.mark.parametrize("damage,code,field", [
    (lambda d: b"XEERMDL1" + d[8:], "VEER_ENOTBUNDLE", "magic"),
    (lambda d: b"", "VEER_ENOTBUNDLE", "magic"),
    (lambda d: d[:-1] + bytes([d[-1] ^ 1]), "VEER_ECHECKSUM", "checksum"),
])
def test_reader_refuses(continuous, damage, code, field):
    data = vb.pack_bundle(continuous[3].model)
    with pytest.raises(vb.BundleFormatError) as e:
        vb.read_bundle(damage(data))
    assert (e.value.code, e.value.field) == (code, field)
    with pytest.raises(vb.BundleFormatError) as e:
        vb.read_bundle(vb.pack_bundle(continuous[3].model, format_version=2))
    assert e.value.code == "VEER_EVERSION"


def _edit(layout, path, value):
    lay = json.loads(json.dumps(layout))
    node = lay
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value
    return lay


def test_exporter_refuses_bad_input(continuous):
    layout, weights, states, _ = continuous
    cases = [
        (layout, {**weights, "forward.head.0.weight": np.zeros((16, 3))}, "forward.head.0.weight"),
        (layout, {**weights, "backward.branches.0.layers.0.bias":
                  np.full(16, np.nan)}, "backward.branches.0.layers.0.bias"),
        (_edit(layout, ["action", "low"], [2.0, -1.0]), weights, "action.low[0]"),
        (_edit(layout, ["fallback_action"], [5.0, 0.0]), weights, "fallback_action"),
        (_edit(layout, ["networks", "backward", "branches", 0, "inputs", 0, "features"], [0, 9]),
         weights, "backward.branches.0.inputs.0.features"),
        (_edit(layout, ["z_dim"], 9), weights, "forward"),
    ]
    lay_no_actor = json.loads(json.dumps(layout))
    del lay_no_actor["networks"]["actor"]
    cases.append((lay_no_actor, weights, "networks.actor"))
    for lay, w, field in cases:
        with pytest.raises(ValueError) as e:
            vb.build_model(lay, w, states)
        assert field in str(e.value)
    with pytest.raises(ValueError, match="states"):
        vb.build_model(layout, weights, states[:, :4])


def test_command_line_export_and_show(continuous, tmp_path):
    layout, weights, states, _ = continuous
    (tmp_path / "layout.json").write_text(json.dumps(layout))
    np.savez(tmp_path / "w.npz", **weights)
    np.save(tmp_path / "s.npy", states)
    env = dict(os.environ)
    run = [sys.executable, "-m", "veer.bundle"]
    subprocess.run(run + ["export", "--layout", str(tmp_path / "layout.json"), "--weights",
                          str(tmp_path / "w.npz"), "--states", str(tmp_path / "s.npy"), "-o",
                          str(tmp_path / "m.veer"), "--reference-count", "32", "--bins", "8"],
                   check=True, env=env, capture_output=True)
    out = subprocess.run(run + ["show", "--json", str(tmp_path / "m.veer")], check=True, env=env,
                         capture_output=True, text=True).stdout
    s = json.loads(out)
    assert s["reference_count"] == 32 and s["stats"]["bins"] == 8
    assert s["b_features"] == [0, 3, 4] and s["action"]["kind"] == "continuous"
    assert s["provenance"]["source_digest"].startswith("blake2b-256:")
    text = subprocess.run(run + ["show", str(tmp_path / "m.veer")], check=True, env=env,
                          capture_output=True, text=True).stdout
    assert "network actor" in text and "reference set: 32 states" in text
    (tmp_path / "bad.veer").write_bytes(b"not a bundle")
    bad = subprocess.run(run + ["show", str(tmp_path / "bad.veer")], env=env,
                         capture_output=True, text=True)
    assert bad.returncode == 3 and "VEER_ENOTBUNDLE" in bad.stderr and "magic" in bad.stderr


# ---- the reference forward pass on networks worked by hand -----------------------------------

def L(kind, w=None, b=None, **kw):
    w = None if w is None else np.asarray(w, np.float32)
    b = None if b is None else np.asarray(b, np.float32)
    return ref.LayerSpec(kind=kind, in_dim=0, out_dim=kw.pop("out", 0), weight=w, bias=b, **kw)


def test_reference_layers_by_hand():
    x = np.array([[1.0, 1.0]])
    # Linear: [[1, 2], [3, 4]] [1, 1] + [0, 1] = [3, 8].
    y = ref.apply_layer(L("linear", [[1, 2], [3, 4]], [0, 1]), x)
    np.testing.assert_allclose(y, [[3, 8]])
    # Rescale to norm sqrt(2): [3, 8] * sqrt(2) / sqrt(73).
    np.testing.assert_allclose(ref.apply_layer(L("rescale_norm", out=2), y),
                               [[3 * np.sqrt(2 / 73), 8 * np.sqrt(2 / 73)]])
    # Layer norm of [1, 2, 3]: mean 2, biased variance 2/3; gain [1, 2, 1], bias [0, 0, 1].
    y = ref.apply_layer(L("layer_norm", [1, 2, 1], [0, 0, 1], eps=0.0), np.array([[1.0, 2, 3]]))
    s = np.sqrt(2 / 3)
    np.testing.assert_allclose(y, [[-1 / s, 0, 1 / s + 1]])
    # Embedding over counts [3, 4]: indices (2, 1) -> row 2 * 4 + 1 = 9.
    table = np.arange(24, dtype=np.float32).reshape(12, 2)
    np.testing.assert_allclose(ref.apply_layer(L("embedding", table, counts=[3, 4]),
                                               np.array([[2.0, 1.0]])), [[18, 19]])
    np.testing.assert_allclose(ref.apply_layer(L("relu"), np.array([[-1.0, 2]])), [[0, 2]])


def test_reference_bilinear_by_hand():
    # Branch 0 (the vector, k = 2) passes the state through; branch 1 (the matrix) outputs the
    # z input as a (2 + 1) x 2 matrix. v = [1, 2] with the bias 1 appended: [1, 2, 1];
    # M = [[1, 0], [0, 1], [5, 7]] -> v^T M = [1 + 5, 2 + 7] = [6, 9].
    net = ref.Net(branches=[ref.BranchSpec("v", [ref.InputSpec("state")], []),
                            ref.BranchSpec("m", [ref.InputSpec("task")], [])],
                  merge="bilinear", bilinear_k=2, matrix_branch=1, bilinear_bias=True)
    act = ref.ActionInfo("discrete", 1, 3)
    out = ref.run_network(net, act, np.array([[1.0, 2.0]]), None,
                          np.array([[1.0, 0, 0, 1, 5, 7]]))
    np.testing.assert_allclose(out, [[6, 9]])
    # Discrete action input: one-hot of length count.
    onehot = ref.run_network(ref.Net([ref.BranchSpec("a", [ref.InputSpec("action")], [])]), act,
                             np.zeros((2, 1)), np.array([[2.0], [0.0]]))
    np.testing.assert_allclose(onehot, [[0, 0, 1], [1, 0, 0]])


def test_reference_policies_by_hand():
    # F(s, a, z) = one-hot(a) * [1, 3, 2] elementwise, z = [1, 1, 1]: Q = [1, 3, 2], argmax 1.
    act = ref.ActionInfo("discrete", 1, 3)
    f = ref.Net([ref.BranchSpec("a", [ref.InputSpec("action")],
                                [L("linear", np.diag([1.0, 3.0, 2.0]), [0, 0, 0])])])
    idx, val, q = ref.policy_discrete({"forward": f}, act, np.zeros((1, 1)), np.ones((1, 3)))
    assert idx[0] == 1 and val[0] == 3 and list(q[0]) == [1, 3, 2]
    # Continuous, normalised actor output [-1, 0, 3] over bounds [0, 10] x [-2, 2] x [0, 1]:
    # mapped [0, 0, 2] (low + (y + 1) / 2 (high - low)), clipped to [0, 0, 1].
    cact = ref.ActionInfo("continuous", 3, 0, np.array([0.0, -2, 0]), np.array([10.0, 2, 1]))
    actor = ref.Net([ref.BranchSpec("s", [ref.InputSpec("state")], [])])
    fwd = ref.Net([ref.BranchSpec("a", [ref.InputSpec("action")], [])])
    a, v, clipped = ref.policy_continuous({"actor": actor, "forward": fwd}, cact,
                                          np.array([[-1.0, 0, 3]]), np.ones((1, 3)), True)
    np.testing.assert_allclose(a, [[0, 0, 1]])
    assert clipped[0] and v[0] == 1.0


def test_benchmark_presets_have_the_issue_sizes(tmp_path):
    """SMALL and STANDARD as issue 2 defines them, written through the command line."""
    def linear_outs(layers):
        return [L.out_dim for L in layers if L.kind == vb.pb.LAYER_LINEAR]

    for preset in ("small", "standard"):
        path = tmp_path / f"{preset}.veer"
        subprocess.run([sys.executable, "-m", "veer.bundle", "random", "--preset", preset, "-o",
                        str(path)], check=True, capture_output=True)
        m = vb.read_bundle(str(path)).model
        assert m.state_dim == 24 and m.action.kind == vb.pb.ACTION_DISCRETE
        assert m.action.count == 6
        f, b = m.forward, m.backward
        if preset == "small":
            assert m.z_dim == 32
            assert linear_outs(f.branches[0].layers) + linear_outs(f.head) == [256, 256, 32]
            assert linear_outs(b.branches[0].layers) == [256, 256, 32]
        else:
            assert m.z_dim == 100 and len(f.branches) == 2
            assert [linear_outs(br.layers) for br in f.branches] == [[1024], [1024]]
            assert linear_outs(f.head) == [1024, 1024, 100]
            assert linear_outs(b.branches[0].layers) == [1024, 1024, 100]


def test_readme_example_runs(tmp_path):
    """The export example in clients/python/README.md runs as written."""
    import re
    here = os.path.dirname(os.path.abspath(__file__))
    with open(os.path.join(here, "..", "..", "clients", "python", "README.md")) as f:
        code = re.search(r"```python\n(.*?)```", f.read(), re.S).group(1)
    (tmp_path / "example.py").write_text(code)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        os.path.abspath(p) for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p))
    subprocess.run([sys.executable, "example.py"], cwd=tmp_path, check=True, capture_output=True,
                   env=env)
    b = vb.read_bundle(str(tmp_path / "sorter.veer"))
    assert b.b_features() == [0, 1] and b.model.reference.count == 256
