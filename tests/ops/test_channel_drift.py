"""Drift per channel as well as for the whole service: two channels act on states from different
distributions, one from the bundle's training states and one shifted; each channel's drift series
on /metrics and the service-wide series are checked against NumPy recomputations over the same
window of states, and the shifted channel's exceedance alarm arrives as a DriftAlarm event whose
scope is the channel's name.

References: PSI = sum_b (p_live,b - p_train,b) ln(p_live,b / p_train,b) over the training quantile
bins (Yurdakul, "Statistical properties of population stability index", 2018; psi_reference in
test_metrics.py, reused); standardised mean shift (mean_live - mean_train) / std_train; Mahalanobis
distance sqrt((x - mu)^T P (x - mu)) with the training precision matrix P, compared with the
bundle's training p99 distance (the exceedance rule of include/veer/drift.h). Exceedance alarm at
3 x 1 % (the monitor's default, common practice, no source)."""
import os
import subprocess

import numpy as np

import harness
import veerlib
from metrics_text import scrape, value
from test_metrics import psi_reference
from test_veerd_events import events as receive  # tests/service, on the path by conftest.py
from test_veerd_events import subscriber

WINDOW = 500  # --drift-window: small, so each channel fills its window quickly


def training_stats(lib, data):
    with veerlib.Runtime(lib, data) as rt:
        info = rt.info
        n = info.state_dim
        st = {
            "info": info,
            "n": n,
            "mu": np.ctypeslib.as_array(info.state_mean, (n,)).astype(np.float64),
            "cov": np.ctypeslib.as_array(info.state_cov, (n * n,)).reshape(n, n).astype(np.float64),
            "prec": np.ctypeslib.as_array(info.state_precision, (n * n,)).reshape(n, n).astype(np.float64),
            "p99": float(info.mahalanobis_p99),
            "names": [info.feature_names[i].decode() for i in range(n)],
        }
        # psi_reference reads the quantile edges while the runtime is open.
        st["psi"] = lambda window, info=info: psi_reference(info, window)
        yield st


def reference(st, window):
    """NumPy's figures for one window of states: PSI, mean shift, exceedance count and how many
    states sit so close to the p99 distance that float32 and float64 may disagree."""
    w = window.astype(np.float64)
    d = w - st["mu"]
    dist = np.sqrt(np.einsum("ij,jk,ik->i", d, st["prec"], d))
    return {
        "psi": st["psi"](window),
        "shift": (w.mean(axis=0) - st["mu"]) / np.sqrt(np.diag(st["cov"])),
        "exceed": int(np.count_nonzero(dist > st["p99"])),
        "borderline": int(np.count_nonzero(np.abs(dist - st["p99"]) <= 1e-4 * st["p99"])),
    }


def check_series(v, labels, st, sent):
    """The series of one scope equal NumPy over the window its last snapshot covers."""
    taken = int(v("veer_drift_states_total", **labels))
    assert taken > 0
    window = np.array(sent[:taken])[-WINDOW:]
    ref = reference(st, window)
    assert v("veer_drift_window_size", **labels) == WINDOW
    assert v("veer_drift_window_states", **labels) == len(window)
    for i, name in enumerate(st["names"]):
        got = v("veer_drift_psi", feature=name, **labels)
        assert abs(got - ref["psi"][i]) <= 1e-9 + 1e-6 * ref["psi"][i], (labels, name, got, ref["psi"][i])
        got = v("veer_drift_mean_shift", feature=name, **labels)
        assert abs(got - ref["shift"][i]) <= 1e-6, (labels, name, got, ref["shift"][i])
    count = round(v("veer_drift_exceed_rate", **labels) * len(window))
    assert abs(count - ref["exceed"]) <= ref["borderline"], (labels, count, ref)
    return ref, len(window)


def test_per_channel_drift_series_and_alarm(lib, continuous_bundle, start):
    svc = start(continuous_bundle, ("--drift-window", str(WINDOW)))
    c, s = svc.c, continuous_bundle.states
    sub = subscriber(svc.d.eps, b"veer.drift")
    assert c.put_samples("pick", s[:20], np.arange(20, dtype=np.float32)).WhichOneof("body") == "task"
    for ch in ("steady", "drifty"):
        assert c.switch(ch, "pick").WhichOneof("body") == "channel"

    stats = training_stats(lib, continuous_bundle.data)
    st = next(stats)
    sd = np.sqrt(np.diag(st["cov"])).astype(np.float32)
    # The shifted channel: training states moved by 3 training standard deviations on every
    # feature; the steady one replays training states as they are.
    sent = {"steady": [], "drifty": [], "service": []}
    for i in range(WINDOW):
        for ch, state in (("steady", s[i % len(s)]), ("drifty", s[(i + 97) % len(s)] + 3.0 * sd)):
            r = c.do_act(ch, state, seq=i)
            assert r.WhichOneof("body") == "act", r
            sent[ch].append(state)
            sent["service"].append(state)

    samples, _ = scrape(svc.url)
    v = lambda name, **kw: value(samples, name, **kw)  # noqa: E731
    assert v("veer_drift_states_dropped_total") == 0
    steady, n_steady = check_series(v, {"scope": "channel", "channel": "steady"}, st, sent["steady"])
    drifty, n_drifty = check_series(v, {"scope": "channel", "channel": "drifty"}, st, sent["drifty"])
    service, n_service = check_series(v, {"scope": "service"}, st, sent["service"])

    # The shifted channel alarms, the steady one does not; the service's window holds the last
    # WINDOW states of both, so its rate lies between theirs.
    assert drifty["exceed"] >= 0.03 * n_drifty
    assert v("veer_drift_exceed_level", scope="channel", channel="drifty") == 2
    assert v("veer_drift_level", scope="channel", channel="drifty") == 2
    assert steady["exceed"] < 0.02 * n_steady and max(steady["psi"]) < 0.08
    assert v("veer_drift_exceed_level", scope="channel", channel="steady") == 0
    assert v("veer_drift_level", scope="channel", channel="steady") == 0
    rates = [v("veer_drift_exceed_rate", **lab) for lab in
             ({"scope": "channel", "channel": "steady"}, {"scope": "service"},
              {"scope": "channel", "channel": "drifty"})]
    assert rates[0] < rates[1] < rates[2], rates
    assert v("veer_drift_exceed_level", scope="service") == 2
    # Only channels that acted have channel series; the service-wide series keep their labels.
    psi_scopes = {(dict(k)["scope"], dict(k).get("channel")) for k in samples["veer_drift_psi"]}
    assert psi_scopes == {("service", None), ("channel", "steady"), ("channel", "drifty")}

    # Events: the drifty channel's exceedance alarm, with its name as the scope; none for steady.
    got = receive(sub, 8, timeout=3.0)
    alarms = [(e.drift.scope, e.drift.statistic, e.drift.level) for _, e in got]
    assert ("drifty", "exceedance", 2) in alarms, alarms
    assert not any(scope == "steady" for scope, _, _ in alarms), alarms
    ev = next(e.drift for _, e in got if (e.drift.scope, e.drift.statistic) == ("drifty", "exceedance"))
    assert 0.03 <= ev.value <= 1.0 and ev.feature == ""
    sub.close()
    assert "drift: channel 'drifty': exceedance level alarm" in svc.d.log()
    stats.close()


def test_drift_window_flag_bad_values(continuous_bundle, tmp_path):
    """--drift-window outside 100 .. 1000000 (and not a number) stops veerd with exit 2 and a
    message naming the flag; so does the variable."""
    for args, env in ((["--drift-window", "99"], {}), (["--drift-window", "1000001"], {}),
                      (["--drift-window", "many"], {}), ([], {"VEER_DRIFT_WINDOW": "0"})):
        p = subprocess.run([harness.VEERD, "--bundle", str(continuous_bundle.path), "--state-dir",
                            str(tmp_path / "s"), *args], capture_output=True, text=True, timeout=30,
                           env={**os.environ, **env})
        assert p.returncode == 2, (args, env, p.stderr)
        assert "--drift-window" in p.stderr or "VEER_DRIFT_WINDOW" in p.stderr, p.stderr
