"""Reference checks of libveer's latency histograms and drift monitors against NumPy and SciPy.

Sources beside each check:
  - exact percentiles: the nearest-rank definition on sorted data (numpy.percentile with
    method="inverted_cdf") and NumPy's default linear interpolation;
  - PSI: sum_b (p_live - p_train) ln(p_live / p_train) over the training quantile bins, with
    live shares floored at 1e-4 (the floor is common practice, no source), recomputed here
    with NumPy from the window's states;
  - the exceedance rate without drift: Binomial(window, 0.01), bounds from scipy.stats.binom;
  - Mahalanobis distance sqrt((x - mu)^T P (x - mu)) recomputed with NumPy.
All data are drawn from generators with fixed start values, so every run checks the same numbers.
"""
import ctypes as C

import numpy as np
import pytest
from scipy import stats

import monitor_lib as M


@pytest.fixture(scope="module")
def lib():
    return M.load()


# ---- Histograms ----------------------------------------------------------------------------

def samples(kind, n, rng):
    if kind == "uniform":
        x = rng.uniform(1e3, 10e6, n)                      # 1 µs .. 10 ms
    elif kind == "lognormal":
        x = rng.lognormal(np.log(50e3), 1.0, n)            # median 50 µs
    elif kind == "bimodal":
        # 70 % fast path near 200 µs, 30 % slow path near 5 ms; unequal weights keep every
        # checked percentile inside a mode (an even split puts the median in the empty gap,
        # where rank and interpolation definitions legitimately disagree).
        a = rng.normal(200e3, 20e3, n * 7 // 10)
        b = rng.normal(5e6, 500e3, n - n * 7 // 10)
        x = np.concatenate([a, b])
        rng.shuffle(x)
    return np.clip(np.round(x), 1000, None).astype(np.uint64)


@pytest.mark.parametrize("kind", ["uniform", "lognormal", "bimodal"])
def test_percentiles_within_one_percent(lib, kind):
    rng = np.random.default_rng({"uniform": 1, "lognormal": 2, "bimodal": 3}[kind])
    x = samples(kind, 100_000, rng)
    h = M.Hist(lib)
    h.record_all(x)
    s = M.HistSummary()
    assert lib.veer_hist_summarize(h.h, C.byref(s)) == 0
    assert s.count == x.size
    assert s.min == x.min() and s.max == x.max()
    assert s.mean == pytest.approx(x.astype(np.float64).mean(), rel=1e-12)
    got = {50: s.p50, 90: s.p90, 99: s.p99, 99.9: s.p999, 100: s.max}
    xs = np.sort(x)
    for p, v in got.items():
        # Nearest rank on sorted data: x_(ceil(p n / 100)).
        exact = xs[int(np.ceil(p / 100 * x.size - 1e-9)) - 1]
        assert abs(v - float(exact)) <= 0.01 * float(exact), (p, v, exact)
        # NumPy's own nearest-rank method (its rank can differ by one where p n / 100 rounds).
        inv = float(np.percentile(x, p, method="inverted_cdf"))
        assert abs(v - inv) <= 0.01 * inv, (p, v, inv)
        # NumPy's default (linear interpolation between order statistics).
        lin = np.percentile(x.astype(np.float64), p)
        assert abs(v - lin) <= 0.01 * lin, (p, v, lin)
        rc, single = h.percentile(p)
        assert rc == 0 and single == v


def test_merge_equals_recording_into_one(lib):
    rng = np.random.default_rng(4)
    x = samples("lognormal", 40_000, rng)
    y = samples("bimodal", 40_000, rng)
    a, b, both = M.Hist(lib), M.Hist(lib), M.Hist(lib)
    a.record_all(x)
    b.record_all(y)
    both.record_all(np.concatenate([x, y]))
    assert lib.veer_hist_merge(a.h, b.h) == 0
    assert a.buckets() == both.buckets()
    for p in (50, 90, 99, 99.9, 100):
        assert a.percentile(p) == both.percentile(p)
    assert lib.veer_hist_mean(a.h) == pytest.approx(lib.veer_hist_mean(both.h), rel=1e-12)


def test_cumulative_counts_match_numpy(lib):
    rng = np.random.default_rng(5)
    x = samples("lognormal", 50_000, rng)
    h = M.Hist(lib)
    h.record_all(x)
    # Prometheus-style bounds snapped to bucket ceilings are exact...
    for le in (1e4, 5e4, 1e5, 2.5e5, 1e6, 1e7, 1e9):
        b = lib.veer_hist_bucket_ceiling(int(le))
        assert lib.veer_hist_count_le(h.h, b) == np.count_nonzero(x <= b)
        # ...and the snapped bound is within 1/128 of the one asked for.
        assert 0 <= b - le <= le / 128
    # Buckets: every value lies in [lowest, highest] of the bucket it was counted in.
    total = 0
    for lo, hi, count, cum in h.buckets():
        assert count == np.count_nonzero((x >= lo) & (x <= hi))
        assert (hi - lo + 1) <= max(lo, 1024) / 128 + 1e-9
        total += count
        assert cum == total
    assert total == x.size


def test_histogram_errors(lib):
    h = M.Hist(lib)
    assert h.percentile(50) == (M.VEER_EEMPTY, 0)
    h.record_all([5000])
    for bad in (float("nan"), -1.0, 100.5, float("inf")):
        assert h.percentile(bad)[0] == M.VEER_EINVAL
    assert lib.veer_hist_merge(h.h, h.h) == M.VEER_EINVAL


# ---- Drift ---------------------------------------------------------------------------------

BINS = 10


def training_stats(n=4, count=200_000, rng_key=10):
    """A Gaussian 'training set' with a known covariance; its statistics computed with NumPy the
    way a bundle would carry them."""
    rng = np.random.default_rng(rng_key)
    a = rng.normal(size=(n, n))
    cov_true = a @ a.T + 0.5 * np.eye(n)
    mu_true = rng.normal(size=n) * 3.0
    train = rng.multivariate_normal(mu_true, cov_true, size=count)
    mean = train.mean(axis=0)
    cov = np.cov(train, rowvar=False)
    precision = np.linalg.inv(cov)
    edges = np.quantile(train, np.arange(1, BINS) / BINS, axis=0).T.copy()  # n x (bins - 1)
    d = np.sqrt(np.einsum("ij,jk,ik->i", train - mean, precision, train - mean))
    p99, p999 = np.quantile(d, [0.99, 0.999])
    return dict(mu=mu_true, cov_true=cov_true, mean=mean, cov=cov, precision=precision,
                edges=edges, p99=float(p99), p999=float(p999), rng=rng)


@pytest.fixture(scope="module")
def train():
    return training_stats()


def make(lib, t, window=1000, publish_every=100, **over):
    cfg = M.Config()
    lib.veer_drift_config_init(C.byref(cfg))
    cfg.window = window
    cfg.publish_every = publish_every
    for k, v in over.items():
        setattr(cfg, k, v)
    d = M.Drift(lib, t["mean"], t["cov"], t["precision"], t["edges"], t["p99"], t["p999"], cfg)
    assert d.rc == 0, (d.err.field, d.err.message)
    return d


class Reference:
    """Independent NumPy computation of the window statistics from the states fed so far."""

    def __init__(self, t, d):
        self.mean32 = d.arrays[0].astype(np.float64)
        self.std = np.sqrt(np.diag(d.arrays[1]).astype(np.float64))
        p = d.arrays[2].astype(np.float64)
        self.prec = 0.5 * (p + p.T)
        self.edges = d.arrays[3]
        self.p99 = np.float32(t["p99"]).astype(np.float64)

    def psi(self, win, floor=1e-4):
        out = np.empty(win.shape[1])
        for f in range(win.shape[1]):
            b = np.searchsorted(self.edges[f], win[:, f], side="right")
            p = np.bincount(b, minlength=BINS) / len(win)
            p = np.maximum(p, floor)
            q = 1.0 / BINS
            out[f] = np.sum((p - q) * np.log(p / q))
        return out

    def shift(self, win):
        return (win.astype(np.float64).mean(axis=0) - self.mean32) / self.std

    def dist(self, x):
        dx = x.astype(np.float64) - self.mean32
        return np.sqrt(np.einsum("ij,jk,ik->i", dx, self.prec, dx))


def test_psi_shift_distance_match_numpy(lib, train):
    t = train
    w = 300
    d = make(lib, t, window=w)
    ref = Reference(t, d)
    rng = np.random.default_rng(11)
    # In-distribution, then a partial shift with a changed scale, so bins empty and fill.
    x = np.concatenate([
        rng.multivariate_normal(t["mu"], t["cov_true"], size=700),
        rng.multivariate_normal(t["mu"] + np.array([1.5, 0, -0.7, 0]), 0.3 * t["cov_true"],
                                size=700),
    ]).astype(np.float32)
    dists = ref.dist(x)
    checkpoints = {1, 7, 150, w - 1, w, w + 1, 2 * w + 13, 700, 900, 1100, 1399}
    for i, s in enumerate(x):
        rc, res, _ = d.add(s)
        assert rc == 0
        assert res.mahalanobis == pytest.approx(dists[i], rel=1e-9)
        assert res.out_of_coverage == (dists[i] > np.float32(t["p999"]))
        k = i + 1
        if k in checkpoints:
            win = x[max(0, k - w):k]
            r = d.read()
            assert r.fill == len(win) and r.states_total == k
            np.testing.assert_allclose(d.psi, ref.psi(win), rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(d.shift, ref.shift(win), rtol=1e-9, atol=1e-12)
            assert r.exceed_count == np.count_nonzero(dists[max(0, k - w):k] > ref.p99)
            assert r.out_of_coverage_total == np.count_nonzero(dists[:k] > np.float32(t["p999"]))
            assert r.psi_max == pytest.approx(d.psi.max(), rel=1e-12)
            assert r.psi_max_feature == int(np.argmax(d.psi))
    # The stand-alone coverage check agrees with the window's per-state flag.
    for s, dist in zip(x[-20:], dists[-20:]):
        out = C.c_double()
        flag = lib.veer_drift_check(d.d, M.f32p(np.ascontiguousarray(s)), C.byref(out))
        assert flag == int(dist > np.float32(t["p999"]))
        assert out.value == pytest.approx(dist, rel=1e-9)


def test_exceedance_rate_within_binomial_bounds(lib, train):
    """States drawn from the training distribution: the number of window states beyond the
    training p99 distance is Binomial(W, 0.01) (scipy.stats.binom gives the bounds)."""
    t = train
    w = 1000
    d = make(lib, t, window=w)
    rng = np.random.default_rng(12)
    total_states = 20 * w
    x = rng.multivariate_normal(t["mu"], t["cov_true"], size=total_states).astype(np.float32)
    alpha = 1e-4  # per window; 20 windows give a family-wise false failure rate under 0.2 %
    lo, hi = stats.binom.ppf(alpha / 2, w, 0.01), stats.binom.isf(alpha / 2, w, 0.01)
    exceed_total = 0
    for i, s in enumerate(x):
        rc, res, _ = d.add(s)
        assert rc == 0
        exceed_total += res.mahalanobis > np.float32(t["p99"])
        if (i + 1) % w == 0:
            r = d.read()
            assert lo <= r.exceed_count <= hi, (i, r.exceed_count, lo, hi)
            assert r.exceed_level == M.OK
            assert r.psi_overall == M.OK
            assert np.all(d.psi < 0.08)  # no drift: PSI ~ (bins-1)/W = 0.009
    lo_t = stats.binom.ppf(1e-6, total_states, 0.01)
    hi_t = stats.binom.isf(1e-6, total_states, 0.01)
    assert lo_t <= exceed_total <= hi_t
    assert d.read().level_changes == 0


def next_psi(level, p, c):
    if level == M.OK:
        return M.ALARM if p >= c.psi_alarm_raise else M.WATCH if p >= c.psi_watch_raise else M.OK
    if level == M.WATCH:
        return M.ALARM if p >= c.psi_alarm_raise else M.OK if p < c.psi_watch_clear else M.WATCH
    return M.ALARM if p >= c.psi_alarm_clear else M.WATCH if p >= c.psi_watch_clear else M.OK


def test_alarm_fires_and_clears_with_hysteresis(lib, train):
    t = train
    w = 500
    d = make(lib, t, window=w, publish_every=50)
    cfg = M.Config()
    lib.veer_drift_config_init(C.byref(cfg))
    ref = Reference(t, d)
    rng = np.random.default_rng(13)
    sd0 = np.sqrt(t["cov_true"][0, 0])
    normal = lambda k: rng.multivariate_normal(t["mu"], t["cov_true"], size=k)
    shift = np.array([2.0 * sd0, 0, 0, 0])
    x = np.concatenate([normal(1500), normal(1500) + shift, normal(1500)]).astype(np.float32)
    dists = ref.dist(x)

    n = x.shape[1]
    sim_psi = np.zeros(n, dtype=int)
    sim_ex = M.OK
    changes = 0
    seen = {"psi_alarm": False, "ex_alarm": False, "psi_held": 0, "ex_held": 0}
    for i, s in enumerate(x):
        prev_levels = d.levels.copy()
        rc, res, _ = d.add(s)
        assert rc == 0
        k = i + 1
        r = d.read()
        if k < w:
            assert r.level == M.OK and res.changed == 0
            continue
        win = x[k - w:k]
        psi = ref.psi(win)
        rate = np.count_nonzero(dists[k - w:k] > ref.p99) / w
        # Independent hysteresis on NumPy's statistics gives the same levels.
        new_psi = np.array([next_psi(sim_psi[f], psi[f], cfg) for f in range(n)])
        if sim_ex == M.OK and rate >= 0.03:
            new_ex = M.ALARM
        elif sim_ex == M.ALARM and rate < 0.02:
            new_ex = M.OK
        else:
            new_ex = sim_ex
        changed = 0
        if np.any(new_psi != sim_psi):
            changed |= M.CHANGED_FEATURE
        if new_psi.max() != sim_psi.max():
            changed |= M.CHANGED_PSI
        if new_ex != sim_ex:
            changed |= M.CHANGED_EXCEED
        changes += int(np.count_nonzero(new_psi != sim_psi)) + (new_psi.max() != sim_psi.max()) \
            + (new_ex != sim_ex)
        # Hysteresis at work: an alarm held while the statistic sits between clear and raise.
        if sim_psi[0] == M.ALARM and new_psi[0] == M.ALARM and 0.20 <= psi[0] < 0.25:
            seen["psi_held"] += 1
        if sim_ex == M.ALARM and new_ex == M.ALARM and 0.02 <= rate < 0.03:
            seen["ex_held"] += 1
        sim_psi, sim_ex = new_psi, new_ex
        assert list(d.levels) == list(sim_psi), (k, psi, d.psi)
        assert r.exceed_level == sim_ex, (k, rate)
        assert r.psi_overall == sim_psi.max()
        assert r.level == max(sim_psi.max(), sim_ex)
        assert res.changed == changed, k
        assert r.level_changes == changes
        seen["psi_alarm"] |= d.levels[0] == M.ALARM
        seen["ex_alarm"] |= r.exceed_level == M.ALARM
        if k <= 1500:
            assert r.level == M.OK, k           # no drift yet
        if 1500 < k <= 3000:
            assert np.all(d.levels[1:] != M.ALARM)  # only feature 0 moved
        if k == 3000:
            assert d.levels[0] == M.ALARM and r.exceed_level == M.ALARM
        if res.changed:
            snap = M.Report()
            snap.state_dim = n
            assert lib.veer_drift_snapshot(d.d, C.byref(snap)) == 0
            assert snap.level_changes == r.level_changes  # a change is published at once
    assert seen["psi_alarm"] and seen["ex_alarm"]
    assert seen["psi_held"] > 0 and seen["ex_held"] > 0
    r = d.read()
    assert r.level == M.OK and np.all(d.levels == M.OK)   # cleared after the shift ended


def test_snapshot_and_reset(lib, train):
    t = train
    d = make(lib, t, window=100, publish_every=10)
    rng = np.random.default_rng(14)
    x = rng.multivariate_normal(t["mu"], t["cov_true"], size=35).astype(np.float32)
    for s in x:
        d.add(s)
    snap = M.Report()
    snap.state_dim = d.n  # arrays NULL: the scalars only
    assert lib.veer_drift_snapshot(d.d, C.byref(snap)) == 0
    assert snap.states_total == 30  # published at 10, 20, 30
    lib.veer_drift_publish(d.d)
    assert lib.veer_drift_snapshot(d.d, C.byref(snap)) == 0
    assert snap.states_total == 35
    r = d.read()
    assert r.fill == 35
    lib.veer_drift_reset(d.d)
    r = d.read()
    assert r.fill == 0 and r.states_total == 0 and np.all(d.psi == 0) and r.level == M.OK
    bad = M.Report()
    bad.state_dim = d.n + 1
    assert lib.veer_drift_read(d.d, C.byref(bad)) == M.VEER_EDIM


def test_drift_bad_inputs(lib, train):
    t = train
    d = make(lib, t, window=10)
    s = np.array([0.0, 1.0, np.nan, 2.0], dtype=np.float32)
    rc, _, err = d.add(s)
    assert rc == M.VEER_ENONFINITE and err.field == b"state[2]"
    assert d.read().states_total == 0  # nothing was added
    s[2] = np.inf
    assert lib.veer_drift_check(d.d, M.f32p(s), None) == M.VEER_ENONFINITE

    def create(field_expect, code, cfg_over=None, **stat_over):
        st = dict(mean=t["mean"], cov=t["cov"], precision=t["precision"], edges=t["edges"],
                  p99=t["p99"], p999=t["p999"])
        st.update(stat_over)
        cfg = M.Config()
        lib.veer_drift_config_init(C.byref(cfg))
        for k, v in (cfg_over or {}).items():
            setattr(cfg, k, v)
        dd = M.Drift(lib, st["mean"], st["cov"], st["precision"], st["edges"], st["p99"],
                     st["p999"], cfg)
        assert dd.rc == code, (field_expect, dd.rc, dd.err.message)
        assert dd.err.field == field_expect.encode(), dd.err.field
        assert dd.err.message  # a sentence, not empty
        assert not dd.d

    create("window", M.VEER_EFIELD, {"window": 0})
    create("window", M.VEER_EFIELD, {"window": 2_000_000})
    create("psi_watch_clear", M.VEER_EFIELD, {"psi_watch_clear": 0.1})
    create("psi_alarm_raise", M.VEER_EFIELD, {"psi_alarm_raise": 0.05})
    create("psi_alarm_clear", M.VEER_EFIELD, {"psi_alarm_clear": 0.3})
    create("exceed_clear", M.VEER_EFIELD, {"exceed_clear": 3.0})
    create("exceed_raise", M.VEER_EFIELD, {"exceed_raise": 150.0})
    create("psi_floor", M.VEER_EFIELD, {"psi_floor": 0.5})
    create("psi_floor", M.VEER_EFIELD, {"psi_floor": 0.0})
    create("psi_watch_raise", M.VEER_EFIELD, {"psi_watch_raise": float("nan")})
    m = t["mean"].copy()
    m[1] = np.nan
    create("mean[1]", M.VEER_ENONFINITE, mean=m)
    e = t["edges"].copy()
    e[2, 4], e[2, 5] = e[2, 5], e[2, 4]
    create("quantile_edges", M.VEER_EFIELD, edges=e)
    c = t["cov"].copy()
    c[3, 3] = -1
    create("cov", M.VEER_EFIELD, cov=c)
    p = t["precision"].copy()
    p[0, 1] += 1.0
    create("precision", M.VEER_EFIELD, precision=p)
    create("mahalanobis_p999", M.VEER_EFIELD, p999=t["p99"] * 0.5)
    create("mahalanobis_p99", M.VEER_EFIELD, p99=-1.0)
    create("bins", M.VEER_EFIELD, edges=np.zeros((4, 0)))
