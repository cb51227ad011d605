"""The events socket and the coverage flag.

Events: subscribers get a topic frame and one veer.wire.Event for each stored task, dropped
task, switch, drift level change and model load, with seq growing by one.
Coverage: an act reply carries VEER_ACT_OUT_OF_COVERAGE exactly when the state's Mahalanobis
distance to the training mean, sqrt((s - mu)^T P (s - mu)) with the bundle's precision matrix P,
exceeds the bundle's training p99.9 distance (Mahalanobis 1936, computed here with NumPy)."""
import time

import numpy as np
import zmq

import harness
import veerlib
from harness import wire

ACT_OUT_OF_COVERAGE = 1 << 5


def subscriber(eps, topic=b"veer."):
    ctx = zmq.Context.instance()
    s = ctx.socket(zmq.SUB)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.SUBSCRIBE, topic)
    s.connect(eps["events"])
    time.sleep(0.3)  # PUB drops what is published before the subscription arrives
    return s


def events(sock, n, timeout=5.0):
    out = []
    end = time.monotonic() + timeout
    while len(out) < n and time.monotonic() < end:
        if sock.poll(100):
            topic, body = sock.recv_multipart()
            out.append((topic.decode(), wire.Event.FromString(body)))
    return out


def test_events_for_tasks_and_switches(continuous_bundle, start):
    d, c = start(continuous_bundle)
    sub = subscriber(d.eps)
    s = continuous_bundle.states
    t = c.put_samples("pick", s[:12], np.arange(12, dtype=np.float32)).task
    c.put_samples("place", s[:12], -np.arange(12, dtype=np.float32))
    c.switch("arm", "pick")
    c.switch("arm", "place")
    c.drop("pick")
    got = events(sub, 5)
    sub.close()
    assert [g[0] for g in got] == ["veer.task", "veer.task", "veer.switch", "veer.switch", "veer.task"]
    e = [g[1] for g in got]
    assert e[0].task_stored.name == "pick" and e[0].task_stored.digest == t.digest
    assert (e[3].switched.channel, e[3].switched.from_task, e[3].switched.to_task, e[3].switched.epoch) == \
        ("arm", "pick", "place", 2)
    assert e[2].switched.from_task == "" and e[2].switched.epoch == 1
    assert e[4].task_dropped.name == "pick"
    seqs = [x.seq for x in e]
    assert seqs == list(range(seqs[0], seqs[0] + 5))
    assert all(x.time_unix_ns > 1.6e18 for x in e)


def mahalanobis(info, states):
    n = info.state_dim
    mu = np.ctypeslib.as_array(info.state_mean, (n,)).astype(np.float64)
    p = np.ctypeslib.as_array(info.state_precision, (n * n,)).reshape(n, n).astype(np.float64)
    dev = states.astype(np.float64) - mu
    return np.sqrt(np.einsum("ij,jk,ik->i", dev, p, dev))


def test_out_of_coverage_flag_and_drift_alarm(lib, continuous_bundle, start):
    d, c = start(continuous_bundle)
    s = continuous_bundle.states
    c.put_samples("pick", s[:12], np.arange(12, dtype=np.float32))
    c.switch("arm", "pick")
    with veerlib.Runtime(lib, continuous_bundle.data) as rt:
        info = rt.info
        assert info.has_stats
        p999 = info.mahalanobis_p999
        rng = np.random.default_rng(4)
        mu = np.ctypeslib.as_array(info.state_mean, (info.state_dim,))
        # Training states, and states pushed away from the mean by factors around the threshold.
        probe = np.concatenate([s[:40], mu + (s[40:100] - mu) * rng.uniform(1, 6, size=(60, 1))]).astype(np.float32)
        dist = mahalanobis(info, probe)
        checked = 0
        for i, st in enumerate(probe):
            if abs(dist[i] - p999) < 1e-4 * p999:
                continue  # too close to call between float and double arithmetic
            r = c.do_act("arm", st, seq=i, deadline_us=100000).act
            assert r.flags & harness.ACT_FALLBACK == 0
            assert bool(r.flags & ACT_OUT_OF_COVERAGE) == (dist[i] > p999), (i, dist[i], p999, r.flags)
            checked += 1
        # A fallback action is not flagged: it owes nothing to the policy.
        far = c.do_act("no-task-here", probe[np.argmax(dist)]).act
        assert far.flags == harness.ACT_FALLBACK | harness.ACT_NO_TASK
        assert checked > 90 and (dist > p999).sum() > 10 and (dist <= p999).sum() > 10
    # A window (1000 states) of far-out states raises the exceedance alarm on the events socket.
    sub = subscriber(d.eps, b"veer.drift")
    far = (mu + (s[0] - mu) * 50).astype(np.float32)
    sock = c.act
    for i in range(1100):
        q = c.act_request("arm", far, seq=i, deadline_us=100000)
        q.protocol, q.id = 1, 10000 + i
        sock.send(q.SerializeToString())
        if i % 50 == 49:
            for _ in range(50):
                assert sock.poll(5000)
                sock.recv()
    # The channel's own monitor alarms too (scope "arm"); this checks the service-wide one.
    got = events(sub, 4, timeout=5.0)
    sub.close()
    stats = {e.drift.statistic: e.drift for _, e in got if e.drift.scope == "service"}
    assert "exceedance" in stats and stats["exceedance"].level == 2 and stats["exceedance"].value > 0.5
    assert {e.drift.scope for _, e in got} <= {"service", "arm"}
    assert "drift: exceedance level alarm" in d.log()
