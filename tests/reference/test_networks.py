"""libveer's networks and policies against the independent NumPy forward pass.

Reference: veer.reference (clients/python/veer/reference.py), written from the formulas in
proto/veer_bundle.proto and include/veer/runtime.h, computing in float64 from the float32
weights in the bundle. libveer computes in float32 on OpenBLAS. Agreement is required within
1e-5 normwise relative error per output row, max|c - r| / max|r| (the normwise relative error
of Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., section 1.2); float32's
unit roundoff is 6e-8, so a few hundred roundings in a dot product stay well below 1e-5.

Bundles have random weights (veer.synth) and cover: discrete and continuous actions, concat and
bilinear merges, embedding inputs (discrete action as an index; two integer state features
looked up jointly), B reading a feature subset, layer norm, rescale-to-norm, the SMALL and
STANDARD benchmark sizes.
"""
import zlib

import numpy as np
import pytest

import veerlib
from veer import bundle as vb
from veer import synth

REL = 1e-5

CASES = {
    "discrete_concat": dict(layout=dict(kind="discrete", state_dim=8, z_dim=16, action_count=5)),
    "discrete_bilinear": dict(layout=dict(kind="discrete", state_dim=8, z_dim=16, action_count=4,
                                          merge="bilinear", bilinear_k=8, bilinear_bias=True)),
    "discrete_bilinear_nobias_embed_action": dict(layout=dict(
        kind="discrete", state_dim=6, z_dim=12, action_count=7, merge="bilinear", bilinear_k=6,
        bilinear_bias=False, embed_action=True)),
    "discrete_embed_action_concat": dict(layout=dict(kind="discrete", state_dim=8, z_dim=16,
                                                     action_count=6, embed_action=True)),
    "discrete_embed_state_subset": dict(
        layout=dict(kind="discrete", state_dim=9, z_dim=16, action_count=4,
                    b_features=[0, 2, 5, 7, 8], embed_state=[7, 8], state_counts=[4, 5]),
        build=dict(embed_state=[7, 8], state_counts=[4, 5])),
    "discrete_layer_norm_no_rescale": dict(layout=dict(kind="discrete", state_dim=10, z_dim=20,
                                                       action_count=3, layer_norm=True,
                                                       rescale_b=False)),
    "continuous_normalized": dict(layout=dict(kind="continuous", state_dim=8, z_dim=16,
                                              action_dim=3, actor_normalized=True)),
    "continuous_raw_layer_norm_subset": dict(layout=dict(
        kind="continuous", state_dim=10, z_dim=16, action_dim=2, actor_normalized=False,
        layer_norm=True, b_features=[1, 3, 4])),
    "continuous_bilinear": dict(layout=dict(kind="continuous", state_dim=7, z_dim=10,
                                            action_dim=4, merge="bilinear", bilinear_k=5)),
    "small": dict(preset="small"),
    "standard": dict(preset="standard"),
}


def make_case(name):
    case = CASES[name]
    if "preset" in case:
        layout = synth.preset_layout(case["preset"])
    else:
        layout = synth.make_layout(model_version=name, **case["layout"])
    m, _, states = synth.build_random(layout, rng_key=zlib.crc32(name.encode()) % 1000, n_states=600,
                                      **case.get("build", {}))
    data = vb.pack_bundle(m)
    return vb.read_bundle(data), data, states


@pytest.fixture(scope="module", params=sorted(CASES))
def case(request, lib):
    bundle, data, states = make_case(request.param)
    rt = veerlib.Runtime(lib, data, max_batch=16)
    yield request.param, bundle, rt, states
    rt.close()


def rel_err(c, r):
    """Normwise relative error per row (Higham 1.2), the worst row."""
    c = np.asarray(c, np.float64).reshape(len(r), -1)
    r = np.asarray(r, np.float64).reshape(len(r), -1)
    scale = np.maximum(np.abs(r).max(axis=1), 1e-30)
    return float((np.abs(c - r).max(axis=1) / scale).max())


def q_scale(f_ref, zs):
    """The scale a Q = F . z error is measured against: max|F| ||z||_1 per row, the bound that
    F's own normwise tolerance carries into the dot product (Higham, 2nd ed., section 3.1:
    |fl(x^T y) - x^T y| <= gamma_n |x|^T |y|)."""
    zs = np.asarray(zs, np.float64).reshape(len(f_ref), -1)
    return np.abs(f_ref).max(axis=1) * np.abs(zs).sum(axis=1)


def sample_states(bundle, states, rng, n=40):
    """Training states plus a few stretched ones (to reach saturation and clipping)."""
    pick = states[rng.choice(len(states), n, replace=False)].astype(np.float64)
    far = pick[: n // 4] * 4.0
    out = np.concatenate([pick, far])
    # Features read through an embedding must stay valid indices.
    for br in bundle.model.backward.branches:
        for L in br.layers:
            if L.kind == vb.pb.LAYER_EMBEDDING:
                for f in br.inputs[0].features:
                    out[:, f] = states[rng.choice(len(states), len(out)), f]
    return out.astype(np.float32).astype(np.float64)


def task_vectors(bundle, rt, states, rng, n):
    """Task vectors of the kind the service uses: B of a state rescaled to sqrt(d), and random
    directions of the same norm."""
    d = bundle.model.z_dim
    z = rng.normal(size=(n, d))
    z[: n // 2] = bundle.B(states[: n // 2])
    z *= np.sqrt(d) / np.linalg.norm(z, axis=1, keepdims=True)
    return z.astype(np.float32).astype(np.float64)


def random_actions(bundle, rng, n):
    a = bundle.action
    if a.kind == "discrete":
        return rng.integers(0, a.count, (n, 1)).astype(np.float64)
    return rng.uniform(a.low, a.high, (n, a.dim)).astype(np.float32).astype(np.float64)


def test_backward(case):
    name, bundle, rt, states = case
    rng = np.random.default_rng(1)
    s = sample_states(bundle, states, rng)
    assert rel_err(rt.B(s), bundle.B(s)) < REL


def test_forward_and_q(case):
    name, bundle, rt, states = case
    rng = np.random.default_rng(2)
    s = sample_states(bundle, states, rng)
    z = task_vectors(bundle, rt, s, rng, len(s))
    a = random_actions(bundle, rng, len(s))
    f_c = rt.F(s, a, z)
    f_r = bundle.F(s, a, z)
    assert rel_err(f_c, f_r) < REL
    # Q = F . z, from libveer's F against the reference's Q.
    q_c = np.einsum("nd,nd->n", f_c.astype(np.float64), z)
    q_r = bundle.Q(s, a, z)
    assert np.max(np.abs(q_c - q_r) / q_scale(f_r, z)) < REL


def test_actor(case):
    name, bundle, rt, states = case
    rng = np.random.default_rng(3)
    s = sample_states(bundle, states, rng)
    z = task_vectors(bundle, rt, s, rng, len(s))
    if bundle.action.kind != "continuous":
        # runtime.h: the actor is for continuous bundles only, VEER_EINVAL otherwise.
        with pytest.raises(RuntimeError, match="VEER_EINVAL"):
            rt.actor(s, z)
        return
    assert rel_err(rt.actor(s, z), bundle.actor(s, z)) < REL


def check_policy(bundle, s, zs, a_c, v_c, fl):
    """libveer's actions, values and flags for states s under tasks zs (one row each) against
    the reference policy: continuous = clip(map(actor)), discrete = argmax_a F(s, a, z) . z,
    value = Q at the action. Returns how many actions were clipped."""
    assert not np.any(fl & (veerlib.ACT_FALLBACK | veerlib.ACT_NONFINITE))
    if bundle.action.kind == "continuous":
        a_r, v_r, clipped = bundle.policy(s, zs)
        span = bundle.action.high - bundle.action.low
        assert np.max(np.abs(a_c - a_r) / span) < REL
        # Every action within the bounds, exactly, in float32.
        assert np.all(a_c >= bundle.action.low) and np.all(a_c <= bundle.action.high)
        assert np.array_equal((fl & veerlib.ACT_CLIPPED) != 0, clipped)
        scale = q_scale(bundle.F(s, a_r, zs), zs)
        assert np.max(np.abs(v_c - v_r) / scale) < REL
        return int(clipped.sum())
    idx_r, v_r, q_all = bundle.policy(s, zs)
    idx_c = np.rint(a_c[:, 0]).astype(int)
    rows = np.arange(len(s))
    scale = q_scale(bundle.F(s, idx_c[:, None].astype(np.float64), zs), zs)
    # The argmax must agree, except between actions whose Q differ by less than the
    # tolerance (then either is a correct argmax in float32).
    gap = q_all[rows, idx_r] - q_all[rows, idx_c]
    assert np.all(gap <= REL * scale), f"argmax differs: {np.nonzero(idx_c != idx_r)}"
    assert np.mean(idx_c == idx_r) > 0.9
    assert np.max(np.abs(v_c - q_all[rows, idx_c]) / scale) < REL
    return 0


def test_policy(case):
    """veer_act_batch (one z for all rows) and veer_act against the reference policy."""
    name, bundle, rt, states = case
    rng = np.random.default_rng(4)
    s = sample_states(bundle, states, rng)
    checked_clip = 0
    for z in task_vectors(bundle, rt, s, rng, 4):
        zs = np.repeat(z[None], len(s), axis=0)
        a_c, v_c, fl = rt.act_batch(s, z)
        checked_clip += check_policy(bundle, s, zs, a_c, v_c, fl)
        # The single-state call gives the batch's answer. The two sum in different orders
        # (one row against a batched product), so the values are compared on the scale of the
        # dot product's terms, as check_policy does: a Q near zero by cancellation differs by
        # more than 1e-5 of itself (seen on one host: -0.0273258 against -0.0273198, where
        # max|F| ||z||_1 is 84, so the difference is 7e-8 of the terms).
        for i in (0, len(s) - 1):
            rc, a1, v1, fl1 = rt.act(s[i], z)
            assert rc == 0 and np.allclose(a1, a_c[i], rtol=REL, atol=0) and fl1 == fl[i]
            a_i = a_c[i : i + 1].astype(np.float64)
            if bundle.action.kind != "continuous":
                a_i = np.rint(a_i)
            scale = q_scale(bundle.F(s[i : i + 1], a_i, z[None]), z[None])[0]
            assert abs(v1 - v_c[i]) <= REL * scale
    if bundle.action.kind == "continuous":
        assert checked_clip > 0, "the test states never reached the bounds: clipping unchecked"


def test_policy_each(case):
    """veer_act_each (a task vector per state, as veerd's batched act thread uses it) against
    the reference policy, with the tasks interleaved so that neighbouring states, and the rows
    of one slice of the workspace's max_batch (16), read different z."""
    name, bundle, rt, states = case
    rng = np.random.default_rng(5)
    s = sample_states(bundle, states, rng)
    tasks = np.stack(task_vectors(bundle, rt, s, rng, 4))
    zs = tasks[rng.integers(0, len(tasks), len(s))]
    assert len(s) > 16 and len({tuple(z) for z in zs[:16]}) > 1
    a_c, v_c, fl = rt.act_each(s, zs)
    clipped = check_policy(bundle, s, zs, a_c, v_c, fl)
    if bundle.action.kind == "continuous":
        assert clipped > 0, "the test states never reached the bounds: clipping unchecked"
    # A NaN in any task row refuses the whole call and writes nothing (runtime.h).
    bad = zs.copy()
    bad[len(s) - 1, 0] = np.nan
    with pytest.raises(RuntimeError, match="VEER_ENONFINITE"):
        rt.act_each(s, bad)


def test_info_matches_file(case):
    """What libveer reports about the bundle is what the file holds."""
    name, bundle, rt, states = case
    info, m = rt.info, bundle.model
    assert (info.state_dim, info.z_dim) == (m.state_dim, m.z_dim)
    assert [info.feature_names[i].decode() for i in range(m.state_dim)] == list(m.feature_names)
    assert [info.b_features[i] for i in range(info.b_feature_count)] == bundle.b_features()
    assert bytes(info.digest[:32]) == bundle.digest
    assert info.reference_count == m.reference.count
    ref_b = np.ctypeslib.as_array(info.reference_b, (m.reference.count * m.z_dim,))
    assert np.array_equal(ref_b, np.asarray(m.reference.b, np.float32))
    assert info.has_stats == 1
    mean = np.ctypeslib.as_array(info.state_mean, (m.state_dim,))
    assert np.array_equal(mean, np.asarray(m.stats.mean, np.float32))
    # The precision matrix libveer computes at load is the inverse of cov + ridge I
    # (checked against numpy.linalg.inv).
    cov = bundle.arrays["stats.cov"].astype(np.float64) + m.stats.cov_ridge * np.eye(m.state_dim)
    prec = np.ctypeslib.as_array(info.state_precision, (m.state_dim, m.state_dim))
    p_ref = np.linalg.inv(cov)
    assert np.max(np.abs(prec - p_ref)) / np.abs(p_ref).max() < 1e-4
    if m.task_defaults.rescale_norm == 0:
        assert info.rescale_norm == pytest.approx(np.sqrt(m.z_dim), rel=1e-6)


def test_bad_inputs_refused(lib):
    """Inputs the reference cannot give a meaning to are refused, not computed: an embedding
    index outside [0, count) or not an integer (runtime.h: VEER_EINVAL from the eval calls),
    and a non-finite state or z in veer_act (VEER_ENONFINITE, nothing written)."""
    lay = synth.make_layout(kind="discrete", state_dim=9, z_dim=16, action_count=4,
                            b_features=[0, 2, 5, 7, 8], embed_state=[7, 8],
                            state_counts=[4, 5], embed_action=True)
    m, _, states = synth.build_random(lay, rng_key=21, n_states=300, embed_state=[7, 8],
                                      state_counts=[4, 5])
    bundle = vb.read_bundle(vb.pack_bundle(m))
    with veerlib.Runtime(lib, vb.pack_bundle(m)) as rt:
        s = states[:2].astype(np.float64)
        np.testing.assert_allclose(rt.B(s), bundle.B(s), rtol=0, atol=REL * np.abs(bundle.B(s)).max())
        for bad in (4.0, 5.0, -1.0, 1.5, np.nan):
            t = s.copy()
            t[0, 7 if bad != 5.0 else 8] = bad
            with pytest.raises(RuntimeError, match="VEER_EINVAL|VEER_ENONFINITE"):
                rt.B(t)
        z = np.ones((1, 16))
        for bad in (4.0, -1.0, 0.5):
            with pytest.raises(RuntimeError, match="VEER_EINVAL|VEER_ENONFINITE"):
                rt.F(s[:1], np.array([[bad]]), z)
        for where in ("state", "z"):
            st, zz = s[0].copy(), z[0].copy()
            (st if where == "state" else zz)[1] = np.nan
            rc, a, v, fl = rt.act(st, zz)
            assert rc == veerlib.CODES["ENONFINITE"] and a[0] == veerlib.UNWRITTEN


def test_one_bundle_shared_by_threads(lib):
    """runtime.h: a bundle is immutable and may be shared; each thread acts through its own
    workspace. Two threads (ctypes releases the GIL during each call) act 300 times each on
    one bundle and must give exactly the answers a single thread gives."""
    import ctypes as C
    import threading
    m, _, states = synth.build_random(synth.preset_layout("continuous"), rng_key=22,
                                      n_states=300)
    data = vb.pack_bundle(m)
    with veerlib.Runtime(lib, data, max_batch=8) as rt:
        s = states[:24]
        zs = [rt.B(states[i:i + 1])[0] for i in range(4)]
        want = [rt.act_batch(s, z) for z in zs]
        errors, done = [], []

        def worker(k):
            ws = C.c_void_p()
            err = veerlib.VeerError()
            if lib.veer_workspace_create(rt.bundle, 8, C.byref(ws), C.byref(err)) != 0:
                errors.append((k, "workspace", err.message))
                return
            other = veerlib.Runtime.__new__(veerlib.Runtime)
            other.lib, other.ws, other.adim, other.z_dim = lib, ws, rt.adim, rt.z_dim
            try:
                for i in range(300):
                    j = (i + k) % 4
                    a, v, fl = other.act_batch(s, zs[j])
                    if not (np.array_equal(a, want[j][0]) and np.array_equal(v, want[j][1])):
                        errors.append((k, i))
                    done.append(1)
            finally:
                lib.veer_workspace_destroy(ws)

        threads = [threading.Thread(target=worker, args=(k,)) for k in range(2)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
        assert not errors, errors[:5]
        assert len(done) == 600
