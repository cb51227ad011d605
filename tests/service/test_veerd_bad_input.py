"""Bad input over the wire: each gets its error code and the offending field, and veerd still
answers a normal act on the same socket afterwards, with the registered tasks unchanged.
Expected codes come from include/veer/error.h; the fields follow the wire schema's field names
(proto/veer_wire.proto)."""
import struct

import numpy as np
import pytest

import harness
from harness import E, expect_error, wire


@pytest.fixture
def served(continuous_bundle, start):
    """veerd with small limits, one task 'base' active on channel 'arm'."""
    d, c = start(continuous_bundle, extra=["--max-samples", "50", "--act-max-message-bytes", "4096",
                                            "--max-message-bytes", "65536"])
    s = continuous_bundle.states
    put = c.put_samples("base", s[:20], np.linspace(-1, 1, 20, dtype=np.float32))
    assert put.WhichOneof("body") == "task"
    assert c.switch("arm", "base").WhichOneof("body") == "channel"
    return d, c, s, put.task


def still_serving(c, s, base):
    r = c.do_act("arm", s[0], seq=99, deadline_us=100000)
    assert r.WhichOneof("body") == "act" and r.act.seq == 99 and r.act.task == "base"
    t = c.get("base").task
    assert t.digest == base.digest and list(t.z) == list(base.z)


def raw(c, sock, data):
    r = c.send_raw(sock, data)
    assert r is not None, "no reply"
    return r


def test_random_bytes(served):
    d, c, s, base = served
    rng = np.random.default_rng(5)
    for sock in (c.act, c.admin):
        for _ in range(5):
            # First byte 0x0f: field 1 with wire type 7, which does not exist in protobuf's
            # encoding (protobuf encoding spec: wire types 0-5), so no decoder can accept it.
            data = b"\x0f" + rng.bytes(int(rng.integers(1, 200)))
            expect_error(raw(c, sock, data), "EBADMSG", "request")
    still_serving(c, s, base)


def test_truncated_message(served):
    d, c, s, base = served
    q = c.act_request("arm", s[0], seq=1)
    q.protocol, q.id = 1, 7
    data = q.SerializeToString()
    expect_error(raw(c, c.act, data[: len(data) - 9]), "EBADMSG", "request")
    p = wire.Request(protocol=1, id=8)
    p.put_task.name = "cut"
    p.put_task.spec.samples.states.extend(s[:5].ravel())
    p.put_task.spec.samples.rewards.extend([1, 2, 3, 4, 5])
    data = p.SerializeToString()
    expect_error(raw(c, c.admin, data[: len(data) // 2]), "EBADMSG", "request")
    expect_error(c.get("cut"), "ENOTASK", "get_task.name")
    still_serving(c, s, base)


def test_unknown_message_type(served):
    d, c, s, base = served
    # A body field this server does not know (field 99, length-delimited, empty), and no body.
    future = wire.Request(protocol=1, id=3).SerializeToString() + bytes([0x9a, 0x06, 0x00])
    for sock in (c.act, c.admin):
        r = raw(c, sock, future)
        expect_error(r, "EMSGTYPE", "body")
        assert r.id == 3
        expect_error(c.call(sock, wire.Request()), "EMSGTYPE", "body")
    # Admin requests on the act socket, and acts on the admin socket.
    q = wire.Request()
    q.list_tasks.SetInParent()
    expect_error(c.call(c.act, q), "EMSGTYPE", "body")
    expect_error(c.call(c.admin, c.act_request("arm", s[0])), "EMSGTYPE", "body")
    still_serving(c, s, base)


def test_wrong_protocol_version(served):
    d, c, s, base = served
    for version in (0, 2, 1000):
        for sock in (c.act, c.admin):
            q = wire.Request()
            q.describe.SetInParent()
            expect_error(c.call(sock, q, protocol=version), "EPROTOCOL", "protocol")
    still_serving(c, s, base)


def test_bad_act_requests(served):
    d, c, s, base = served
    dim = s.shape[1]
    expect_error(c.do_act("arm", s[0][:-1]), "EDIM", "act.state")
    expect_error(c.do_act("arm", np.concatenate([s[0], [1.0]])), "EDIM", "act.state")
    expect_error(c.do_act("arm", []), "EDIM", "act.state")
    for bad, idx in ((np.nan, 3), (np.inf, 0), (-np.inf, dim - 1)):
        st = s[0].copy()
        st[idx] = bad
        expect_error(c.do_act("arm", st), "ENONFINITE", f"act.state[{idx}]")
    expect_error(c.do_act("", s[0]), "EFIELD", "act.channel")
    expect_error(c.do_act("x" * 64, s[0]), "EFIELD", "act.channel")
    still_serving(c, s, base)


def test_bad_tasks(served):
    d, c, s, base = served
    dim = s.shape[1]
    r5 = np.array([1, -1, 2, 0.5, 3], np.float32)
    cases = []
    st = s[:5].copy()
    st[2, 4] = np.nan
    cases.append((c.put_samples("n1", st, r5), "ENONFINITE", f"put_task.spec.samples.states[{2 * dim + 4}]"))
    rr = r5.copy()
    rr[3] = np.inf
    cases.append((c.put_samples("n2", s[:5], rr), "ENONFINITE", "put_task.spec.samples.rewards[3]"))
    g = s[:2].copy()
    g[1, 0] = -np.inf
    cases.append((c.put_goals("n3", g), "ENONFINITE", f"put_task.spec.goals.states[{dim}]"))
    cases.append((c.put_goals("n3b", s[:2], [1.0, np.nan]), "ENONFINITE", "put_task.spec.goals.weights[1]"))
    cases.append((c.put_samples("n4", np.zeros((0, dim)), []), "EEMPTY", "put_task.spec.samples.states"))
    cases.append((c.put_samples("n5", s[:51], np.ones(51)), "ETOOMANY", "put_task.spec.samples.rewards"))
    cases.append((c.put_samples("n6", s[:5], np.zeros(5)), "ENOSIGNAL", "put_task.spec.samples.rewards"))
    cases.append((c.put_goals("n7", s[0][:-1]), "EDIM", "put_task.spec.goals.states"))
    cases.append((c.put_goals("n7b", s[:2], [1, 2, 3]), "EDIM", "put_task.spec.goals.weights"))
    cases.append((c.put_samples("n8", s[:5], r5[:4]), "EDIM", "put_task.spec.samples.rewards"))
    cases.append((c.put_samples("", s[:5], r5), "EFIELD", "put_task.name"))
    cases.append((c.put_samples("x" * 200, s[:5], r5), "EFIELD", "put_task.name"))
    cases.append((c.put_samples("n9", s[:5], r5, ridge=-1.0), "EFIELD", "put_task.spec.options.ridge"))
    q = wire.Request()
    q.put_task.name = "n10"
    cases.append((c.call(c.admin, q), "EFIELD", "put_task.spec"))
    q = wire.Request()
    q.put_task.name = "n11"
    q.put_task.spec.options.rescale = wire.CHOICE_ON
    cases.append((c.call(c.admin, q), "EFIELD", "put_task.spec.source"))
    q = wire.Request()
    q.put_task.name = "n12"
    q.put_task.spec.reference.rewards.extend([1.0, 2.0])
    cases.append((c.call(c.admin, q), "EDIM", "put_task.spec.reference.rewards"))
    cases.append((c.put_samples("base", s[:5], r5), "ENAMECONFLICT", "put_task.name"))
    for reply, code, field in cases:
        expect_error(reply, code, field)
    names = [t.name for t in c.list_tasks().tasks.tasks]
    assert names == ["base"], names
    still_serving(c, s, base)


def test_unknown_names_and_active_drop(served):
    d, c, s, base = served
    expect_error(c.switch("arm", "missing"), "ENOTASK", "switch_channel.task")
    expect_error(c.switch("", "base"), "EFIELD", "switch_channel.channel")
    expect_error(c.get("missing"), "ENOTASK", "get_task.name")
    expect_error(c.drop("missing"), "ENOTASK", "drop_task.name")
    r = c.drop("base")
    expect_error(r, "ETASKACTIVE", "drop_task.name")
    assert "arm" in r.error.message
    ch = c.list_channels().channels.channels
    assert [(x.name, x.task, x.epoch) for x in ch] == [("arm", "base", 1)]
    still_serving(c, s, base)


def test_message_over_the_size_limit(served):
    """Act socket limit 4096 bytes: up to twice that gets EMSGSIZE; beyond it libzmq drops the
    sender's connection (no reply); the client's DEALER reconnects by itself and its next
    request is answered."""
    d, c, s, base = served
    q = c.act_request("arm", np.zeros(1500, np.float32))  # 6000 bytes of state
    q.protocol, q.id = 1, 5
    expect_error(raw(c, c.act, q.SerializeToString()), "EMSGSIZE", "request")
    q = c.act_request("arm", np.zeros(3000, np.float32))  # 12000 bytes: over the hard limit
    q.protocol, q.id = 1, 6
    assert c.send_raw(c.act, q.SerializeToString(), timeout_ms=1500) is None
    still_serving(c, s, base)
    # The admin socket's limit (65536 here) the same way.
    big = wire.Request(protocol=1, id=9)
    big.put_task.name = "huge"
    big.put_task.spec.samples.states.extend(np.ones(20000, np.float32))
    big.put_task.spec.samples.rewards.extend(np.ones(20000 // s.shape[1], np.float32))
    expect_error(raw(c, c.admin, big.SerializeToString()), "EMSGSIZE", "request")
    expect_error(c.get("huge"), "ENOTASK", "get_task.name")
    still_serving(c, s, base)
