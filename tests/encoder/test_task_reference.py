"""Reference checks of libveer's task encoder against NumPy, on bundles with random weights made
by the Python exporter (veer.synth, veer.bundle).

B(s) comes from the exporter's own NumPy forward pass (veer.reference.backward_b, float64 from
the stored float32 weights); it shares no code with libveer. Each check names its source:

  z from samples       z = (1/n) Σ r_i B(s_i)                DESIGN.md "The maths"; Touati &
                                                               Ollivier, NeurIPS 2021, §4
  z from goals         z = Σ w_k B(g_k)                      DESIGN.md "The maths"
  z from reference     z = (1/m) Σ r_j B_j, B_j in the bundle DESIGN.md "The maths"
  rescaling            z · ρ / ||z||, ρ = √d by default       DESIGN.md "The maths"
  covariance-corrected z = Cov_train(B) (Σ_s + λI)⁻¹ m       DESIGN.md; solved by numpy.linalg.solve
  expressiveness R²    1 - RSS / TSS of the least-squares fit of r on [B(s), 1]: the coefficient
                       of determination (from memory: any regression text, e.g. Draper & Smith,
                       "Applied Regression Analysis", ch. 1); RSS from numpy.linalg.lstsq

Vectors are compared by norm-wise relative error, ||z - z_ref|| / ||z_ref|| <= 1e-5 (the
issue's tolerance), except where the comparison goes through a linear solve: there the float32
rounding of B is amplified by the condition number of the system (the textbook perturbation
bound: Golub & Van Loan, "Matrix Computations", 4th ed., §2.6.2, from memory), so the bound used
is 1e-5 · κ(Σ_s + λI), and the test also checks that κ stays small enough for this to mean
something.
"""
import ctypes
import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))
import task_ctypes as tc  # noqa: E402

from veer import bundle as vb  # noqa: E402
from veer import reference as ref  # noqa: E402
from veer import synth  # noqa: E402

TOL = 1e-5


def _lib():
    lib = ctypes.CDLL(os.path.join(os.environ["VEER_BUILD_DIR"], "libveer.so"))
    lib.veer_bundle_open.argtypes = [ctypes.c_char_p, ctypes.POINTER(ctypes.c_void_p),
                                     ctypes.POINTER(tc.Error)]
    lib.veer_bundle_open.restype = ctypes.c_int
    lib.veer_bundle_close.argtypes = [ctypes.c_void_p]
    lib.veer_bundle_close.restype = None
    return tc.bind(lib)


LIB = _lib()


class Model:
    """One random-weight bundle: libveer's handle and the exporter's NumPy view of it."""

    def __init__(self, path, layout, rng_key, **kw):
        m, _, self.train_states = synth.build_random(layout, rng_key=rng_key, **kw)
        vb.write_file_atomic(path, vb.pack_bundle(m))
        self.view = vb.read_bundle(path)
        self.d = m.z_dim
        self.sdim = m.state_dim
        handle, err = ctypes.c_void_p(), tc.Error()
        rc = LIB.veer_bundle_open(path.encode(), ctypes.byref(handle), ctypes.byref(err))
        assert rc == 0, f"libveer rejected the exporter's bundle: {err.field} {err.message}"
        self.handle = handle

    def B(self, states):
        """The exporter's NumPy forward pass (veer.reference), float64."""
        return ref.backward_b(self.view.nets, self.view.action, states)

    def encode(self, source, values, states=None, **options):
        return tc.encode(LIB, self.handle, self.d, source, values, states, **options)

    def close(self):
        LIB.veer_bundle_close(self.handle)


LAYOUTS = {
    # A plain ReLU MLP for B, rescaled to sqrt(d) at its output (the exporter's default).
    "mlp": lambda: synth.make_layout(kind="discrete", state_dim=10, z_dim=16, hidden=[64, 64],
                                     action_count=4),
    # B reads a subset of the features and starts with layer norm + tanh; continuous actions.
    "subset_ln": lambda: synth.make_layout(kind="continuous", state_dim=9, z_dim=12,
                                           hidden=[48, 32], action_dim=2,
                                           b_features=[0, 2, 3, 7], layer_norm=True),
    # The benchmark's SMALL preset: 24 features, d = 32, hidden 256 x 2.
    "small_preset": lambda: synth.preset_layout("small"),
    # No rescale layer at the end of B, so B's norm varies from state to state.
    "raw_b": lambda: synth.make_layout(kind="discrete", state_dim=6, z_dim=8, hidden=[32, 32],
                                       action_count=3, rescale_b=False),
}


@pytest.fixture(scope="module", params=sorted(LAYOUTS))
def model(request, tmp_path_factory):
    path = str(tmp_path_factory.mktemp("enc") / f"{request.param}.veer")
    m = Model(path, LAYOUTS[request.param](), rng_key=11, n_states=3000, reference_count=400)
    yield m
    m.close()


def rel(a, b):
    return np.linalg.norm(np.asarray(a, np.float64) - b) / np.linalg.norm(b)


def draw(m, n, key):
    """States drawn like the training data, and a reward that mixes a function B can express
    with one it cannot, offset to be all negative (a distance-like cost)."""
    rng = np.random.default_rng(key)
    states = synth.random_states({"feature_names": [""] * m.sdim}, n, rng)
    b = m.B(states)
    w = rng.normal(size=m.d)
    r = b @ w + 0.5 * np.sin(3 * states[:, 0]) + 0.3 * rng.normal(size=n)
    r = (r - r.max() - 0.5).astype(np.float32)
    return states, r


def test_samples_match_numpy(model):
    states, r = draw(model, 1700, key=1)  # 1,700: several of the encoder's chunks
    b = model.B(states)
    raw = (r.astype(np.float64) @ b) / len(r)  # (1/n) Σ r_i B(s_i)
    z, rep = model.encode(tc.SAMPLES, r, states, rescale=0, center=0)
    assert rel(z, raw) <= TOL
    assert rep.norm_raw == pytest.approx(np.linalg.norm(raw), rel=TOL)
    assert rep.mean_reward == 0.0

    z, rep = model.encode(tc.SAMPLES, r, states, rescale=1, center=0)
    want = raw * np.sqrt(model.d) / np.linalg.norm(raw)  # rescaled to sqrt(d)
    assert rel(z, want) <= TOL
    assert np.linalg.norm(z) == pytest.approx(np.sqrt(model.d), rel=1e-6)

    # The bundle's defaults (rescale on, centring off, written by the exporter) apply when the
    # spec says VEER_OPT_DEFAULT.
    z_default, _ = model.encode(tc.SAMPLES, r, states)
    assert rel(z_default, want) <= TOL


def test_centring_matches_numpy(model):
    states, r = draw(model, 900, key=2)
    b = model.B(states)
    r64 = r.astype(np.float64)
    mean = r64.mean()
    raw = ((r64 - mean) @ b) / len(r)  # (1/n) Σ (r_i - r̄) B(s_i)
    z, rep = model.encode(tc.SAMPLES, r, states, rescale=0, center=1)
    assert rel(z, raw) <= TOL
    assert rep.mean_reward == pytest.approx(mean, rel=1e-12)
    assert rep.norm_raw == pytest.approx(np.linalg.norm(raw), rel=TOL)
    # All rewards are negative, so centring changes the direction of z, not only its length.
    uncentred = (r64 @ b) / len(r)
    cos = raw @ uncentred / np.linalg.norm(raw) / np.linalg.norm(uncentred)
    assert cos < 0.999


def test_goals_match_numpy(model):
    rng = np.random.default_rng(3)
    goals = model.train_states[rng.choice(len(model.train_states), 5, replace=False)]
    w = rng.uniform(-0.5, 1.5, 5).astype(np.float32)
    raw = w.astype(np.float64) @ model.B(goals)  # Σ w_k B(g_k)
    z, rep = model.encode(tc.GOALS, w, goals, rescale=0)
    assert rel(z, raw) <= TOL
    assert np.isnan(rep.r2)
    z, _ = model.encode(tc.GOALS, w, goals, rescale=1)
    assert rel(z, raw * np.sqrt(model.d) / np.linalg.norm(raw)) <= TOL


def test_reference_rewards_match_numpy(model):
    ref_states = model.view.arrays["reference.states"]
    ref_b = model.view.arrays["reference.b"].astype(np.float64)  # B_j as stored in the bundle
    m = len(ref_b)
    rng = np.random.default_rng(4)
    r = (-np.linalg.norm(ref_states[:, :2] - rng.normal(size=2), axis=1)).astype(np.float32)
    raw = (r.astype(np.float64) @ ref_b) / m  # (1/m) Σ r_j B_j
    z, rep = model.encode(tc.REFERENCE, r, None, rescale=0, center=0)
    assert rel(z, raw) <= TOL
    centred = ((r.astype(np.float64) - r.mean(dtype=np.float64)) @ ref_b) / m
    z, rep = model.encode(tc.REFERENCE, r, None, rescale=0, center=1)
    assert rel(z, centred) <= TOL
    # The stored B_j are the exporter's NumPy B of the stored reference states.
    assert np.allclose(ref_b, model.B(ref_states), rtol=0, atol=1e-5 * np.abs(ref_b).max())

    assert rep.r2 == pytest.approx(r2_lstsq(ref_b, r), abs=1e-6)


def r2_lstsq(b, r):
    """The coefficient of determination of the least-squares fit of r on [b, 1]."""
    r = np.asarray(r, np.float64)
    x = np.hstack([b, np.ones((len(r), 1))])
    coef, _, _, _ = np.linalg.lstsq(x, r, rcond=None)
    rss = np.sum((r - x @ coef) ** 2)
    tss = np.sum((r - r.mean()) ** 2)
    return 1.0 - rss / tss


def test_r2_matches_lstsq(model):
    states, r = draw(model, 2100, key=5)
    b = model.B(states)
    _, rep = model.encode(tc.SAMPLES, r, states)
    want = r2_lstsq(b, r)
    assert 0.05 < want < 0.999  # a fit that is neither trivial nor perfect
    assert rep.r2 == pytest.approx(want, abs=1e-5)
    # Centring, rescaling and the correction do not change the fit of r on [B, 1].
    _, rep_c = model.encode(tc.SAMPLES, r, states, center=1, rescale=0)
    assert rep_c.r2 == pytest.approx(want, abs=1e-5)

    # A reward B expresses exactly (affine in B): R² = 1 within float32 rounding of B.
    exact = (b @ np.linspace(-1, 1, model.d) + 2.0).astype(np.float32)
    _, rep = model.encode(tc.SAMPLES, exact, states)
    assert rep.r2 == pytest.approx(r2_lstsq(b, exact), abs=1e-5)
    assert rep.r2 > 0.9999

    # No degrees of freedom left: NaN (runtime.h), as lstsq would give RSS 0.
    few = model.d + 1
    _, rep = model.encode(tc.SAMPLES, r[:few], states[:few])
    assert np.isnan(rep.r2)
    _, rep = model.encode(tc.SAMPLES, r[:few + 1], states[:few + 1])
    assert rep.r2 == pytest.approx(r2_lstsq(b[:few + 1], r[:few + 1]), abs=1e-4)


@pytest.mark.parametrize("ridge", [None, 0.05, 1.0])
def test_cov_correction_matches_solve(model, ridge):
    # Samples from another distribution than training: a shifted, narrower cloud.
    rng = np.random.default_rng(6)
    train = model.train_states
    states = (train[rng.choice(len(train), 1300)] * 0.6 + 0.4).astype(np.float32)
    b = model.B(states)
    r = (b @ rng.normal(size=model.d) + rng.normal(size=len(states))).astype(np.float32)
    lam = float(np.float32(model.view.model.task_defaults.ridge)) if ridge is None else ridge
    n = len(r)
    sigma_s = b.T @ b / n                       # Σ_s = (1/n) Σ B Bᵀ
    m = (r.astype(np.float64) @ b) / n          # (1/n) Σ r_i B(s_i)
    cov_b = model.view.arrays["cov_b"].astype(np.float64)
    a = sigma_s + lam * np.eye(model.d)
    want = cov_b @ np.linalg.solve(a, m)
    kappa = np.linalg.cond(a)
    assert kappa < 1e4, "test problem too ill-conditioned to check at float32 precision"
    opts = dict(rescale=0, cov_correction=1)
    if ridge is not None:
        opts["ridge"] = ridge
    z, rep = model.encode(tc.SAMPLES, r, states, **opts)
    assert rel(z, want) <= TOL * max(1.0, kappa)
    assert rep.norm_raw == pytest.approx(np.linalg.norm(want), rel=TOL * max(1.0, kappa))
    # And it really is a correction: different from the plain estimate.
    assert rel(m, want) > 1e-2

    z_scaled, _ = model.encode(tc.SAMPLES, r, states, cov_correction=1,
                               **({"ridge": ridge} if ridge is not None else {}))
    assert rel(z_scaled, want * np.sqrt(model.d) / np.linalg.norm(want)) <= TOL * max(1.0, kappa)


def test_errors_on_an_exported_bundle(model):
    states, r = draw(model, 50, key=7)
    bad = r.copy()
    bad[7] = np.nan
    with pytest.raises(tc.EncodeError) as e:
        model.encode(tc.SAMPLES, bad, states)
    assert (e.value.code, e.value.field) == (-16, "values[7]")  # VEER_ENONFINITE
    with pytest.raises(tc.EncodeError) as e:
        model.encode(tc.REFERENCE, r, None)  # 50 rewards for a reference set of 400
    assert (e.value.code, e.value.field) == (-31, "count")  # VEER_EDIM
    with pytest.raises(tc.EncodeError) as e:
        model.encode(tc.SAMPLES, r, states, max_count=49)
    assert (e.value.code, e.value.field) == (-33, "count")  # VEER_ETOOMANY
