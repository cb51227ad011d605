"""veerd over real sockets: the actions and task vectors it serves equal what libveer computes
in-process (through ctypes) for the same bundle, task and state; tasks from reward samples and
from goal states; identical specifications stored once; a controller at 1 kHz sees every switch
whole while a supervisor switches its channel 100 times."""
import os
import threading
import types
import time

import numpy as np
import pytest

import harness
import veerlib
from harness import ACT_DEADLINE, ACT_FALLBACK, ACT_NO_TASK, expect_error


def runtime(lib, b):
    return veerlib.Runtime(lib, b.data)


@pytest.mark.parametrize("kind,extra", [("tcp", ()), ("ipc", ()), ("tcp", ("--act-spin-us", "200"))])
def test_actions_equal_in_process_runtime(lib, bundle, start, kind, extra):
    """The wire's actions are the in-process runtime's, also with the act thread spinning."""
    d, c = start(bundle, kind, extra)
    rng = np.random.default_rng(3)
    s = bundle.states[:64]
    r = rng.normal(size=64).astype(np.float32)
    reply = c.put_samples("sort-left", s, r)
    assert reply.WhichOneof("body") == "task", reply
    with runtime(lib, bundle) as rt:
        rc, z, rep, err = rt.encode(veerlib.TASK_SAMPLES, s, r)
        assert rc == 0
        np.testing.assert_allclose(np.array(reply.task.z, np.float32), z, rtol=1e-5, atol=1e-6)
        assert reply.task.count == 64 and reply.task.source == 1 and reply.task.encoded
        assert reply.task.r2 == pytest.approx(rep.r2, rel=1e-6, abs=1e-9)
        assert c.switch("arm", "sort-left").channel.epoch == 1
        zw = np.array(reply.task.z, np.float32)
        for i, state in enumerate(bundle.states[100:150]):
            a = c.do_act("arm", state, seq=i, deadline_us=200000)
            assert a.WhichOneof("body") == "act", a
            rc, action, value, flags = rt.act(state, zw)
            assert rc == 0
            assert a.act.seq == i and a.act.task == "sort-left" and a.act.epoch == 1
            np.testing.assert_array_equal(np.array(a.act.action, np.float32), action)
            assert np.float32(a.act.value) == np.float32(value)
            assert a.act.flags == flags
            assert a.act.model_version == rt.info.model_version.decode()


def test_describe_matches_bundle(lib, bundle, start):
    d, c = start(bundle)
    with runtime(lib, bundle) as rt:
        for sock in (c.act, c.admin):
            r = c.describe(sock).describe
            info = rt.info
            assert r.state_dim == info.state_dim and r.z_dim == info.z_dim
            assert r.action_kind == info.action_kind and r.action_dim == info.action_dim
            assert bytes(r.model_digest) == bytes(info.digest[:32])
            fb = np.ctypeslib.as_array(info.fallback_action, (info.action_dim,))
            np.testing.assert_array_equal(np.array(r.fallback_action, np.float32), fb)
            assert list(r.feature_names) == [info.feature_names[i].decode() for i in range(info.state_dim)]
            assert r.default_deadline_us == 1000


def test_tasks_from_goals(lib, bundle, start):
    d, c = start(bundle)
    goals = bundle.states[200:203]
    w = np.array([1.0, 0.5, 2.0], np.float32)
    reply = c.put_goals("reach-bins", goals, w)
    assert reply.WhichOneof("body") == "task", reply
    with runtime(lib, bundle) as rt:
        rc, z, rep, err = rt.encode(veerlib.TASK_GOALS, goals, w)
        assert rc == 0
        np.testing.assert_allclose(np.array(reply.task.z, np.float32), z, rtol=1e-5, atol=1e-6)
        # No weights means weight 1 for every goal, and is the same specification as all ones.
        one = c.put_goals("reach-one", goals)
        ones = c.put_goals("reach-ones", goals, np.ones(3, np.float32))
        rc, z1, _, _ = rt.encode(veerlib.TASK_GOALS, goals, np.ones(3, np.float32))
        np.testing.assert_allclose(np.array(one.task.z, np.float32), z1, rtol=1e-5, atol=1e-6)
        assert one.task.digest == ones.task.digest
        assert one.task.digest != reply.task.digest


def test_identical_specs_stored_once(bundle, start):
    d, c = start(bundle)
    s = bundle.states[:32]
    r = np.linspace(-1, 1, 32, dtype=np.float32)
    a = c.put_samples("left", s, r)
    # The digest is BLAKE2b-256 (hashlib, RFC 7693) of the specification's deterministic
    # protobuf encoding (Python's own serializer), so clients can compute it themselves.
    spec = harness.wire.TaskSpec()
    spec.samples.states.extend(np.asarray(s, np.float32).ravel())
    spec.samples.rewards.extend(r)
    import hashlib
    assert a.task.digest == hashlib.blake2b(spec.SerializeToString(deterministic=True), digest_size=32).digest()
    b = c.put_samples("left-again", s, r)
    assert a.task.digest == b.task.digest and list(a.task.z) == list(b.task.z)
    # The same name and content: an idempotent success.
    again = c.put_samples("left", s, r)
    assert again.WhichOneof("body") == "task" and again.task.digest == a.task.digest
    # -0.0 and 0.0 are the same content.
    r0 = r.copy()
    r0[r0 == 0] = 0.0
    assert c.put_samples("left", s, np.where(r0 == 0, np.float32(-0.0), r0)).WhichOneof("body") == "task"
    # The same name with other content: refused, and the stored task is unchanged.
    expect_error(c.put_samples("left", s, r * 2), "ENAMECONFLICT", "put_task.name")
    assert c.get("left").task.digest == a.task.digest
    names = sorted(t.name for t in c.list_tasks().tasks.tasks)
    assert names == ["left", "left-again"]
    # Dropping one name leaves the other, with its vector.
    assert c.drop("left").WhichOneof("body") == "done"
    assert list(c.get("left-again").task.z) == list(a.task.z)
    expect_error(c.get("left"), "ENOTASK", "get_task.name")


def test_no_task_and_unknown_channel_get_fallback(lib, bundle, start):
    d, c = start(bundle)
    with runtime(lib, bundle) as rt:
        fb = np.ctypeslib.as_array(rt.info.fallback_action, (rt.info.action_dim,)).copy()
    a = c.do_act("never-switched", bundle.states[0], seq=5)
    assert a.WhichOneof("body") == "act"
    assert a.act.flags == ACT_FALLBACK | ACT_NO_TASK and a.act.task == "" and a.act.epoch == 0
    np.testing.assert_array_equal(np.array(a.act.action, np.float32), fb)
    assert a.act.value == 0.0 and a.act.seq == 5


def test_deadline_too_short_gets_fallback(lib, bundle, start):
    """A deadline shorter than the policy's running p99 is answered with the fallback at once."""
    d, c = start(bundle)
    c.put_samples("t", bundle.states[:40], np.arange(40, dtype=np.float32) - 20)
    c.switch("arm", "t")
    # Fill the estimator's first window (1024 policy evaluations) with a generous deadline.
    for i in range(1100):
        r = c.do_act("arm", bundle.states[i % 500], seq=i, deadline_us=1000000)
        assert r.act.flags & ACT_FALLBACK == 0
    # 1 µs: decoding the request and evaluating the policy take longer than that, so every
    # reply either is refused up front by the p99 estimate or finishes late; both give the fallback.
    late = [c.do_act("arm", bundle.states[i], seq=i, deadline_us=1) for i in range(20)]
    assert all(r.act.flags & (ACT_FALLBACK | ACT_DEADLINE) == ACT_FALLBACK | ACT_DEADLINE for r in late)
    assert all(r.act.task == "t" and r.act.epoch == 1 for r in late)
    status = c.call(c.admin, harness.wire.Request(status=harness.wire.StatusRequest())).status
    assert status.deadline_misses >= 20 and status.acts >= 1120


def test_controller_sees_every_switch_whole(bundle, start):
    """1 kHz for 2 s on one channel while a supervisor switches it 100 times between two tasks.
    Every reply must come (none missing, none an error), carry the task that the switch with its
    epoch installed, never go back in epoch, and be at least as new as the last switch the
    supervisor had been told about when the request was sent."""
    d, c = start(bundle)
    s = bundle.states[:48]
    c.put_samples("a", s, np.linspace(0, 1, 48, dtype=np.float32))
    c.put_samples("b", s, np.linspace(1, 0, 48, dtype=np.float32))
    first = c.switch("line-1", "a").channel.epoch
    epoch_task = {first: "a"}
    acked = [first]
    requested = [first]
    stop = threading.Event()

    def supervisor():
        for k in range(100):
            task = "b" if k % 2 == 0 else "a"
            requested[0] = first + k + 1
            r = c.switch("line-1", task)
            assert r.WhichOneof("body") == "channel", r
            epoch_task[r.channel.epoch] = task
            acked[0] = r.channel.epoch
            time.sleep(0.018)
        stop.set()

    sent = []  # (seq, acked epoch at send)
    replies = {}
    sock = c.act
    period = 0.001
    t_sup = threading.Thread(target=supervisor)
    t0 = time.perf_counter()
    t_sup.start()
    seq = 0
    # 2,000 requests on a 1 ms schedule (2 s), then on while the supervisor is still switching.
    # Counted, not timed: a host stall near the end must not cut the run short of 2,000.
    while seq < 2000 or not stop.is_set():
        if time.perf_counter() - t0 > 10.0:
            break
        target = t0 + seq * period
        while time.perf_counter() < target:
            while sock.poll(0):
                r = harness.wire.Reply.FromString(sock.recv())
                replies[r.id] = (r, requested[0])
        sent.append((seq, acked[0]))
        q = c.act_request("line-1", s[seq % 48], seq=seq, deadline_us=50000)
        q.protocol, q.id = 1, seq + 1
        sock.send(q.SerializeToString())
        seq += 1
    t_sup.join()
    end = time.monotonic() + 10
    while len(replies) < len(sent) and time.monotonic() < end:
        if sock.poll(100):
            r = harness.wire.Reply.FromString(sock.recv())
            replies[r.id] = (r, requested[0])
    assert len(sent) >= 2000, "the 10 s bound ended the run before 2,000 requests were sent"
    assert len(replies) == len(sent), f"{len(sent) - len(replies)} replies missing"
    assert len(epoch_task) == 101
    last = 0
    for seq, acked_at_send in sent:
        r, requested_at_recv = replies[seq + 1]
        assert r.WhichOneof("body") == "act", r
        assert r.act.seq == seq
        assert r.act.flags & ACT_NO_TASK == 0
        e = r.act.epoch
        assert e >= last, f"epoch went back from {last} to {e} at seq {seq}"
        assert acked_at_send <= e <= requested_at_recv
        assert r.act.task == epoch_task[e], f"epoch {e} belongs to {epoch_task[e]}, reply says {r.act.task}"
        last = e
    assert last == first + 100


def test_puts_in_flight(bundle, start):
    """Requests sent back to back on one socket while an encoding runs: the switch to the task
    still being encoded is refused with ENOTREADY (answered at once, so before the put), the
    repeated put and the put of the same content under another name wait for the one encoding,
    and all three puts are answered with the same digest and vector. On a loaded machine the
    encoding can finish before veerd reads the switch; then the switch must succeed instead,
    and its reply must come after the put's."""
    d, c = start(bundle)
    rng = np.random.default_rng(9)
    n = 5000
    s = bundle.states[rng.integers(0, len(bundle.states), n)] + rng.normal(scale=0.01, size=(n, bundle.states.shape[1]))
    r = rng.normal(size=n)
    def put(name, id_):
        q = harness.wire.Request(protocol=1, id=id_)
        q.put_task.name = name
        q.put_task.spec.samples.states.extend(np.asarray(s, np.float32).ravel())
        q.put_task.spec.samples.rewards.extend(np.asarray(r, np.float32))
        return q.SerializeToString()
    sw = harness.wire.Request(protocol=1, id=2)
    sw.switch_channel.channel, sw.switch_channel.task = "arm", "big"
    for data in (put("big", 1), sw.SerializeToString(), put("big", 3), put("big-twin", 4)):
        c.admin.send(data)
    replies = []
    while len(replies) < 4:
        assert c.admin.poll(60000)
        replies.append(harness.wire.Reply.FromString(c.admin.recv()))
    order = [x.id for x in replies]
    switch_reply = replies[order.index(2)]
    switched_early = order.index(2) < order.index(1)
    if switched_early:
        expect_error(switch_reply, "ENOTREADY", "switch_channel.task")
    else:
        assert switch_reply.WhichOneof("body") == "channel", switch_reply
        assert switch_reply.channel.epoch == 1
    puts = {x.id: x for x in replies if x.id != 2}
    assert sorted(puts) == [1, 3, 4]
    assert all(x.WhichOneof("body") == "task" and x.task.encoded for x in puts.values())
    assert puts[1].task.digest == puts[3].task.digest == puts[4].task.digest
    assert list(puts[1].task.z) == list(puts[4].task.z)
    assert puts[4].task.name == "big-twin"
    assert c.switch("arm", "big").channel.epoch == (1 if switched_early else 2)


def metric(port, name):
    """One unlabelled counter from veerd's /metrics (Prometheus text format: `name value`)."""
    import urllib.request
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as r:
        for line in r.read().decode().splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
    raise KeyError(name)


@pytest.mark.parametrize("threads", ["1", "2", "3"])
def test_batched_acts_match_reference(bundle, start, threads):
    """--act-batch 8, its pass on one thread or shared by 2 or 3 (--act-threads): a burst of acts on three channels with three tasks, sent without waiting so
    that they queue and are answered in batches (one veer_act_each per batch), with requests for
    a channel with no task, of a wrong state length, with a NaN, undecodable bytes and a
    describe mixed in. Every reply comes back (in each batch those that need no policy before
    the pass, the policy's acts in the order sent); errors and fallbacks are the ones a single
    act would give; every action and value equals the independent NumPy forward pass
    (veer.reference, the reference of tests/reference/test_networks.py) for the state and its
    channel's task within 1e-5 (normwise relative, Higham 2nd ed. section 1.2; for discrete
    models the argmax may differ only between actions whose Q tie within that tolerance)."""
    from veer import bundle as vb
    port = harness.free_port()
    d, c = start(bundle, "tcp", ("--act-batch", "8", "--act-threads", threads,
                                 "--http", f"127.0.0.1:{port}"))
    rng = np.random.default_rng(8)
    zs = {}
    for k in range(3):
        rewards = rng.normal(size=64).astype(np.float32)
        reply = c.put_samples(f"bin-{k}", bundle.states[:64], rewards)
        assert reply.WhichOneof("body") == "task", reply
        zs[f"cell-{k}"] = np.array(reply.task.z, np.float32)
        assert c.switch(f"cell-{k}", f"bin-{k}").channel.epoch >= 1

    n = 240
    kinds, states, chans, payloads = [], [], [], []
    for i in range(n):
        state = bundle.states[200 + i]
        if i % 29 == 7:
            kind, q = "short", c.act_request("cell-0", state[:-1], seq=i, deadline_us=2000000)
        elif i % 31 == 11:
            bad = state.copy()
            bad[3] = np.nan
            kind, q = "nan", c.act_request("cell-1", bad, seq=i, deadline_us=2000000)
        elif i % 37 == 13:
            kind, q = "garbage", None
        elif i % 17 == 5:
            kind, q = "idle", c.act_request("idle", state, seq=i, deadline_us=2000000)
        elif i == 100:
            kind, q = "describe", harness.wire.Request()
            q.describe.SetInParent()
        else:
            kind, q = "act", c.act_request(f"cell-{i % 3}", state, seq=i, deadline_us=2000000)
        kinds.append(kind)
        states.append(state)
        chans.append(f"cell-{i % 3}")
        if q is None:  # bytes that do not decode as a Request (a truncated varint)
            payloads.append(b"\x08\xff\xff\xff")
            continue
        q.protocol, q.id = 1, 1000 + i
        payloads.append(q.SerializeToString())
    for p in payloads:  # all at once: the act thread finds them queued
        c.act.send(p)
    replies = []
    for _ in range(n):
        assert c.act.poll(20000), f"only {len(replies)} of {n} replies"
        r = harness.wire.Reply()
        r.ParseFromString(c.act.recv())
        replies.append(r)
    # Each batch answers what needs no policy first, then the policy's acts: every id once, and
    # the acts of the policy in the order sent (undecodable bytes get id 0).
    ids = [r.id for r in replies]
    assert sorted(i for i in ids if i) == [1000 + i for i in range(n) if kinds[i] != "garbage"]
    assert ids.count(0) == kinds.count("garbage")
    acted_ids = [i for i in ids if i and kinds[i - 1000] == "act"]
    assert acted_ids == sorted(acted_ids), "the policy's acts were answered out of order"
    by_id = {r.id: r for r in replies if r.id}
    garbage = [r for r in replies if r.id == 0]
    replies = [garbage.pop() if kinds[i] == "garbage" else by_id[1000 + i] for i in range(n)]

    acted = [i for i in range(n) if kinds[i] == "act"]
    for i in range(n):
        r = replies[i]
        if kinds[i] == "short":
            expect_error(r, "EDIM", "act.state")
        elif kinds[i] == "nan":
            expect_error(r, "ENONFINITE", "act.state[3]")
        elif kinds[i] == "garbage":
            expect_error(r, "EBADMSG", "request")
        elif kinds[i] == "idle":
            assert r.act.flags == ACT_FALLBACK | ACT_NO_TASK and r.act.seq == i
        elif kinds[i] == "describe":
            assert r.WhichOneof("body") == "describe"
        else:
            assert r.WhichOneof("body") == "act", r
            assert r.act.seq == i and r.act.task == f"bin-{i % 3}"
            assert r.act.flags & (ACT_FALLBACK | ACT_DEADLINE) == 0, r.act

    ref = vb.read_bundle(bundle.data)
    S = np.array([states[i] for i in acted], np.float64)
    Z = np.array([zs[chans[i]] for i in acted], np.float64)
    A = np.array([replies[i].act.action for i in acted], np.float64)
    V = np.array([replies[i].act.value for i in acted], np.float64)
    rel = 1e-5
    if ref.action.kind == "continuous":
        a_r, v_r, clipped = ref.policy(S, Z)
        assert np.max(np.abs(A - a_r) / (ref.action.high - ref.action.low)) < rel
        scale = np.abs(ref.F(S, a_r, Z)).max(axis=1) * np.abs(Z).sum(axis=1)
        assert np.max(np.abs(V - v_r) / scale) < rel
    else:
        idx_r, v_r, q_all = ref.policy(S, Z)
        idx = np.rint(A[:, 0]).astype(int)
        rows = np.arange(len(S))
        f = ref.F(S, idx[:, None].astype(np.float64), Z)
        scale = np.abs(f).max(axis=1) * np.abs(Z).sum(axis=1)
        assert np.all(q_all[rows, idx_r] - q_all[rows, idx] <= rel * scale)
        assert np.mean(idx == idx_r) > 0.9
        assert np.max(np.abs(V - q_all[rows, idx]) / scale) < rel

    # The policy ran once per batch: exactly the acted states, in fewer passes than states.
    states_total = metric(port, "veer_act_policy_states_total")
    passes = metric(port, "veer_act_policy_passes_total")
    assert states_total == len(acted)
    assert passes < states_total, "no two queued acts were answered together"


@pytest.fixture(scope="module")
def table_bundle(tmp_path_factory):
    """A model whose F reads the state through an embedding table (`veer train --arch table` on
    a small random log of two integer features, 4 and 5 values): a state with an index outside
    its table is refused by the model itself, not by veerd's checks."""
    import subprocess
    d = tmp_path_factory.mktemp("table")
    rng = np.random.default_rng(5)
    s = np.stack([rng.integers(0, 4, 400), rng.integers(0, 5, 400)], 1).astype(np.float32)
    a = rng.integers(0, 3, 400).astype(np.int32)
    nxt = np.stack([(s[:, 0] + a) % 4, (s[:, 1] + 1) % 5], 1).astype(np.float32)
    for name, arr in (("s", s), ("a", a), ("n", nxt)):
        np.save(d / f"{name}.npy", arr)
    out = d / "table.veer"
    subprocess.run([os.path.join(harness.BUILD, "bin", "veer"), "train", "--states", str(d / "s.npy"),
                    "--actions", str(d / "a.npy"), "--next-states", str(d / "n.npy"),
                    "--discrete", "3", "--step", "0.1", "--preset", "tabular", "--state-counts", "4,5",
                    "--z-dim", "8", "--steps", "50", "--rng-key", "3", "--threads", "1", "--quiet",
                    "--out", str(out)], check=True, capture_output=True)
    return types.SimpleNamespace(path=out)


@pytest.mark.parametrize("threads", ["1", "2"])
def test_batched_refusal_falls_back_for_that_state_only(table_bundle, start, threads):
    """In a batch, a state the model refuses (an index outside its embedding table) fails the
    pass; veerd then redoes the batch's rows one by one (on whichever thread holds them), so
    that act alone gets the fallback with VEER_ACT_NONFINITE, as a single act would, and every
    other act gets the independent NumPy forward pass's argmax (veer.reference; a different
    index only in a tie within 1e-5, Higham 2nd ed. section 1.2)."""
    from veer import bundle as vb
    d, c = start(table_bundle, "ipc", ("--act-batch", "8", "--act-threads", threads))
    fallback = list(c.describe().describe.fallback_action)
    reply = c.put_goals("cell", np.array([[1, 2]], np.float32))
    z = np.array(reply.task.z, np.float64)
    assert c.switch("line", "cell").channel.epoch == 1
    rng = np.random.default_rng(6)
    n = 96
    states = np.stack([rng.integers(0, 4, n), rng.integers(0, 5, n)], 1).astype(np.float32)
    bad = {i: v for i, v in zip(range(3, n, 7), [(0, 4.0), (1, 5.0), (0, -1.0), (1, 1.5)] * n)}
    for i, (f, v) in bad.items():
        states[i, f] = v
    for i in range(n):  # all at once: the act thread finds them queued
        q = c.act_request("line", states[i], seq=i, deadline_us=2000000)
        q.protocol, q.id = 1, 1 + i
        c.act.send(q.SerializeToString())
    replies = {}
    for _ in range(n):
        assert c.act.poll(20000), f"only {len(replies)} of {n} replies"
        r = harness.wire.Reply()
        r.ParseFromString(c.act.recv())
        assert r.WhichOneof("body") == "act", r
        replies[r.act.seq] = r.act
    assert sorted(replies) == list(range(n))
    good = [i for i in range(n) if i not in bad]
    for i in bad:
        assert replies[i].flags == ACT_FALLBACK | harness.ACT_NONFINITE, (i, replies[i])
        assert list(replies[i].action) == fallback
    ref = vb.read_bundle(table_bundle.path.read_bytes())
    S = states[good].astype(np.float64)
    idx_r, _, q_all = ref.policy(S, np.repeat(z[None, :], len(good), 0))
    idx = np.array([int(round(replies[i].action[0])) for i in good])
    # Only the coverage flag (1 << 5, include/veer/runtime.h) may be set: a random log's
    # training statistics put some of these states beyond its p99.9 distance.
    assert all(replies[i].flags & ~(1 << 5) == 0 for i in good), {i: replies[i].flags for i in good}
    rows = np.arange(len(good))
    scale = np.abs(q_all).max(axis=1)
    assert np.all(q_all[rows, idx_r] - q_all[rows, idx] <= 1e-5 * scale)
