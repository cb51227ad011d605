"""/metrics after a known sequence of acts, errors and switches, read by an independent parser
(prometheus_client's), against counts the test keeps itself from the replies it received and
against NumPy recomputations of the drift statistics.

References: the Prometheus text exposition format 0.0.4 (histogram `_bucket` samples are
cumulative and the `le="+Inf"` bucket equals `_count`); the Population Stability Index
PSI = sum_b (p_live,b - p_train,b) ln(p_live,b / p_train,b) (Yurdakul, "Statistical properties of
population stability index", 2018), with live shares floored at 1e-4 as include/veer/drift.h
documents (common practice, no source); standardised mean shift (mean_live - mean_train) / std_train.
"""
import urllib.error

import numpy as np

import harness
import veerlib
from metrics_text import get, scrape, value

STAGES = ("decode", "policy", "reply", "total")


def psi_reference(info, window):
    """PSI per feature with NumPy, from the bundle's training quantile edges (equal-share bins)."""
    n, bins = info.state_dim, info.bins
    edges = np.ctypeslib.as_array(info.quantile_edges, (n * (bins - 1),)).reshape(n, bins - 1)
    out = np.zeros(n)
    for i in range(n):
        idx = np.searchsorted(edges[i].astype(np.float64), window[:, i].astype(np.float64), side="right")
        p = np.bincount(idx, minlength=bins) / len(window)
        p = np.maximum(p, 1e-4)
        q = 1.0 / bins
        out[i] = np.sum((p - q) * np.log(p / q))
    return out


def test_metrics_after_a_known_sequence(lib, continuous_bundle, start):
    svc = start(continuous_bundle)
    c = svc.c
    s = continuous_bundle.states
    assert c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32)).WhichOneof("body") == "task"
    assert c.put_samples("place", s[:20], -np.arange(20, dtype=np.float32)).WhichOneof("body") == "task"
    for ch, task in (("arm", "pick"), ("arm", "place"), ("lift", "pick")):
        assert c.switch(ch, task).WhichOneof("body") == "channel"

    sent = []  # the valid states, in the order veerd's drift monitor took them
    flags = []
    plan = [("arm", 100000)] * 900 + [("nowhere", 100000)] * 60 + [("lift", 1)] * 40
    for i, (ch, deadline) in enumerate(plan):
        st = s[i % len(s)]
        r = c.do_act(ch, st, seq=i, deadline_us=deadline)
        assert r.WhichOneof("body") == "act", r
        sent.append(st)
        flags.append(r.act.flags)
    flags = np.array(flags)
    # Errors: 7 wrong dimensions, 5 NaN states, 3 empty channel names, 3 undecodable requests.
    for i in range(7):
        harness.expect_error(c.do_act("arm", s[0][:-1]), "EDIM", "act.state")
    for i in range(5):
        bad = s[0].copy()
        bad[i] = np.nan
        harness.expect_error(c.do_act("arm", bad), "ENONFINITE", f"act.state[{i}]")
    for i in range(3):
        harness.expect_error(c.do_act("", s[0]), "EFIELD", "act.channel")
    for i in range(3):
        r = c.send_raw(c.act, b"\xff\xfe not a request")
        assert r.error.code == harness.E["EBADMSG"]

    samples, families = scrape(svc.url)
    v = lambda name, **kw: value(samples, name, **kw)  # noqa: E731
    assert v("veer_acts_total") == 1000
    assert v("veer_act_fallbacks_total") == np.count_nonzero(flags & harness.ACT_FALLBACK)
    assert v("veer_act_deadline_misses_total") == np.count_nonzero(flags & harness.ACT_DEADLINE)
    assert v("veer_act_no_task_total") == 60 == np.count_nonzero(flags & harness.ACT_NO_TASK)
    assert np.count_nonzero(flags & harness.ACT_DEADLINE) > 0, "a 1 us deadline should be missed"
    errs = {dict(k)["code"]: val for k, val in samples["veer_act_errors_total"].items()}
    assert errs == {"VEER_EDIM": 7, "VEER_ENONFINITE": 5, "VEER_EFIELD": 3, "VEER_EBADMSG": 3}

    assert v("veer_switches_total") == 3
    assert v("veer_channel_switches_total", channel="arm") == 2
    assert v("veer_channel_switches_total", channel="lift") == 1
    assert v("veer_channel_task", channel="arm", task="place") == 1
    assert v("veer_channel_task", channel="lift", task="pick") == 1
    assert v("veer_channel_acts_total", channel="arm") == 900
    assert v("veer_channel_acts_total", channel="lift") == 40
    assert v("veer_tasks", state="encoded") == 2 and v("veer_tasks", state="pending") == 0
    assert v("veer_ready") == 1
    assert families["veer_act_stage_seconds"].type == "histogram"

    # Histograms: cumulative buckets, +Inf equals _count, counts per stage from the sequence.
    requests = 1000 + 18
    counts = {}
    for stage in STAGES:
        buckets = sorted(((float(dict(k)["le"]), val) for k, val in samples["veer_act_stage_seconds_bucket"].items()
                          if dict(k)["stage"] == stage))
        les = [b[0] for b in buckets]
        cum = [b[1] for b in buckets]
        assert les[-1] == float("inf") and all(np.diff(cum) >= 0), (stage, buckets)
        counts[stage] = v("veer_act_stage_seconds_count", stage=stage)
        assert cum[-1] == counts[stage]
        assert v("veer_act_stage_seconds_sum", stage=stage) > 0
    assert counts["total"] == requests and counts["decode"] == requests
    assert counts["reply"] == 1000  # every act that reached its reply; error replies are not act replies
    # Per channel: the acts on each existing channel (an unknown channel has no histogram).
    assert v("veer_channel_act_seconds_count", channel="arm") == 900
    assert v("veer_channel_act_seconds_count", channel="lift") == 40
    assert {dict(k)["channel"] for k in samples["veer_channel_act_seconds_count"]} == {"arm", "lift"}
    assert v("veer_channel_act_seconds_bucket", channel="arm", le="+Inf") == 900
    assert v("veer_channel_act_seconds_sum", channel="arm") + v("veer_channel_act_seconds_sum", channel="lift") \
        <= v("veer_act_stage_seconds_sum", stage="total")
    misses = np.count_nonzero(flags & harness.ACT_DEADLINE)
    assert 900 + (40 - misses) <= counts["policy"] <= 940
    # Stage sums add up: decode + policy + reply <= total (the rest is checks, drift, lookups).
    sums = {st: v("veer_act_stage_seconds_sum", stage=st) for st in STAGES}
    assert sums["decode"] + sums["policy"] + sums["reply"] <= sums["total"] * 1.001
    # Recent percentiles are ordered and the maximum bounds the bucket counts.
    q = {float(dict(k)["quantile"]): val for k, val in samples["veer_act_stage_recent_seconds"].items()
         if dict(k)["stage"] == "total"}
    assert sorted(q) == [0.5, 0.9, 0.99, 0.999, 1.0]
    assert q[0.5] <= q[0.9] <= q[0.99] <= q[0.999] <= q[1.0]
    assert v("veer_act_stage_recent_count", stage="total") == requests

    # Drift: the monitor's last published snapshot covers the first `taken` valid states; PSI
    # and mean shift over that window equal NumPy's.
    assert v("veer_drift_states_dropped_total") == 0
    taken = int(v("veer_drift_states_total", scope="service"))
    assert 900 <= taken <= 1000, taken  # published every 100 states and on level changes
    window = np.array(sent[:taken])[-1000:]
    with veerlib.Runtime(lib, continuous_bundle.data) as rt:
        info = rt.info
        n = info.state_dim
        psi = psi_reference(info, window)
        mu = np.ctypeslib.as_array(info.state_mean, (n,)).astype(np.float64)
        sd = np.sqrt(np.diag(np.ctypeslib.as_array(info.state_cov, (n * n,)).reshape(n, n).astype(np.float64)))
        names = [info.feature_names[i].decode() for i in range(n)]
    shift = (window.astype(np.float64).mean(axis=0) - mu) / sd
    for i, name in enumerate(names):
        assert abs(v("veer_drift_psi", scope="service", feature=name) - psi[i]) <= 1e-9 + 1e-6 * psi[i], name
        assert abs(v("veer_drift_mean_shift", scope="service", feature=name) - shift[i]) <= 1e-6, name
    assert v("veer_drift_window_states", scope="service") == len(window)
    assert v("veer_drift_psi_max", scope="service") == max(
        v("veer_drift_psi", scope="service", feature=nm) for nm in names)


def test_readyz_healthz_and_monitors_off(continuous_bundle, start):
    svc = start(continuous_bundle, extra=("--monitors", "0"))
    assert get(svc.url + "/healthz")[0] == 200
    status, _, body = get(svc.url + "/readyz")
    assert status == 200 and body.startswith("ready:")
    s = continuous_bundle.states
    c = svc.c
    c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32))
    c.switch("arm", "pick")
    for i in range(20):
        assert c.do_act("arm", s[i], deadline_us=100000).act.flags & harness.ACT_FALLBACK == 0
    samples, families = scrape(svc.url)
    # With monitors off the counters stay, the latency and drift samples go.
    assert value(samples, "veer_acts_total") == 20
    (info_labels, one), = samples["veer_info"].items()
    assert dict(info_labels)["monitors"] == "off" and one == 1
    assert "veer_act_stage_seconds_count" not in samples
    assert "veer_drift_psi" not in samples
    assert families["veer_drift_psi"].type == "gauge"  # the family is still announced


def test_readyz_503_when_a_task_cannot_be_encoded(continuous_bundle, tmp_path):
    """A journal holding a task the newly loaded model cannot encode (another state size) leaves
    veerd alive but not ready, and /readyz names the task."""
    from veer import bundle as vb
    from veer import synth
    m, _, other_states = synth.build_random(synth.preset_layout("small"), rng_key=5, n_states=300)
    other = tmp_path / "other.veer"
    vb.write_file_atomic(str(other), vb.pack_bundle(m))
    assert np.asarray(other_states).shape[1] != continuous_bundle.states.shape[1]

    state_dir = tmp_path / "state"
    eps = harness.endpoints("tcp", tmp_path)
    port = harness.free_port()
    d = harness.Veerd(continuous_bundle.path, state_dir, eps, ("--http", f"127.0.0.1:{port}"))
    c = harness.Client(eps)
    try:
        s = continuous_bundle.states
        assert c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32)).WhichOneof("body") == "task"
    finally:
        c.close()
        assert d.stop() == 0
    d = harness.Veerd(other, state_dir, eps, ("--http", f"127.0.0.1:{port}"))
    try:
        url = f"http://127.0.0.1:{port}"
        assert get(url + "/healthz")[0] == 200
        try:
            get(url + "/readyz")
            raise AssertionError("expected 503")
        except urllib.error.HTTPError as e:
            assert e.code == 503
            body = e.read().decode()
            assert body.startswith("not ready:") and "'pick'" in body, body
        samples, _ = scrape(url)
        assert value(samples, "veer_ready") == 0 and value(samples, "veer_tasks", state="failed") == 1
    finally:
        assert d.stop() == 0
