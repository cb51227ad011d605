#!/usr/bin/python3
"""Writes the fuzz targets' starting corpora (tests/fuzz/corpus/<target>/start-*) and the small
bundle the service targets serve (tests/fuzz/fixtures/arm-small.veer).

The starting inputs are small valid inputs of each decoder, plus a few near misses, for the fuzzers to
mutate from; reproducers of findings live beside them as repro-* files and are never rewritten
here. The bundle is an UNTRAINED parcel-arm model with random weights (4 state features, 2
continuous actions): for exercising decoders only, its actions mean nothing.

Run from the repository root after building (the protobuf modules come from the build):
    VEER_BUILD_DIR=build /usr/bin/python3 tests/fuzz/make_corpus.py
The output is the same bytes on every run.
"""
import glob
import os
import shutil
import struct
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.join(HERE, "..", "..")
BUILD = os.environ.get("VEER_BUILD_DIR", os.path.join(ROOT, "build"))
sys.path.insert(0, os.path.join(ROOT, "clients", "python"))
sys.path.insert(0, os.path.join(BUILD, "python"))

import veer_journal_pb2 as jpb  # noqa: E402
import veer_wire_pb2 as wpb  # noqa: E402
from veer import bundle as vb  # noqa: E402
from veer import synth  # noqa: E402

FEATURES = ["gripper_x_m", "gripper_y_m", "parcel_x_m", "gripper_closed"]


def out(target, name, data: bytes):
    d = os.path.join(HERE, "corpus", target)
    os.makedirs(d, exist_ok=True)
    with open(os.path.join(d, "start-" + name), "wb") as f:
        f.write(data)


def model(kind="continuous", **kw):
    rng = np.random.default_rng(7)
    layout = synth.make_layout(kind=kind, state_dim=len(FEATURES), z_dim=4, hidden=[8],
                               action_dim=2, action_count=3, feature_names=FEATURES,
                               model_version="arm-small-fuzz", **kw)
    weights = synth.random_weights(layout, rng)
    states = rng.uniform(-1.0, 1.0, (200, len(FEATURES)))
    for i, c in zip(kw.get("embed_state") or [], kw.get("state_counts") or []):
        states[:, i] = rng.integers(0, c, 200)
    return vb.build_model(layout, weights, states, reference_count=8, bins=4, rng_key=1,
                          created="2026-01-01T00:00:00Z")


def bundles():
    arm = model()
    data = vb.pack_bundle(arm)
    os.makedirs(os.path.join(HERE, "fixtures"), exist_ok=True)
    with open(os.path.join(HERE, "fixtures", "arm-small.veer"), "wb") as f:
        f.write(data)
    out("bundle", "arm-small.veer", data)
    # Payload-form starting inputs: the target frames them with a correct checksum.
    out("bundle", "arm-small.model", arm.SerializeToString())
    out("bundle", "discrete.model", model("discrete").SerializeToString())
    out("bundle", "bilinear.model", model("discrete", merge="bilinear", bilinear_k=3).SerializeToString())
    out("bundle", "layernorm.model", model(layer_norm=True).SerializeToString())
    out("bundle", "tabular.model", model("discrete", embed_action=True, embed_state=[0, 1],
                                         state_counts=[3, 4]).SerializeToString())
    return arm


def npy():
    for p in sorted(glob.glob(os.path.join(ROOT, "tests", "train", "data", "*.npy"))):
        with open(p, "rb") as f:
            out("npy", os.path.basename(p), f.read())


def request(**kw):
    r = wpb.Request(protocol=1, id=kw.pop("id", 7), **kw)
    return r.SerializeToString()


def act_requests(state_dim):
    st = [0.1, -0.2, 0.3, 1.0][:state_dim]
    out("act", "act", request(act=wpb.ActRequest(channel="arm", state=st, seq=3)))
    out("act", "act-deadline", request(act=wpb.ActRequest(channel="arm", state=st, deadline_us=500, seq=4)))
    out("act", "act-no-task", request(act=wpb.ActRequest(channel="belt", state=st, seq=5)))
    out("act", "act-nan", request(act=wpb.ActRequest(channel="arm", state=[float("nan")] + st[1:], seq=6)))
    out("act", "act-short", request(act=wpb.ActRequest(channel="arm", state=st[:2], seq=6)))
    out("act", "describe", request(describe=wpb.DescribeRequest()))
    out("act", "status", request(status=wpb.StatusRequest()))
    out("act", "protocol-2", wpb.Request(protocol=2, id=1, describe=wpb.DescribeRequest()).SerializeToString())
    out("act", "empty", b"")
    out("act", "frames", b"\xfe\x03" + request(act=wpb.ActRequest(channel="arm", state=st, seq=3)))


def spec_samples(state_dim, n=3):
    rng = np.random.default_rng(3)
    s = rng.uniform(-1, 1, (n, state_dim)).astype(np.float32)
    return wpb.TaskSpec(samples=wpb.RewardSamples(states=s.ravel().tolist(),
                                                  rewards=[1.0, -0.5, 0.25][:n]))


def spec_goals(state_dim):
    return wpb.TaskSpec(goals=wpb.GoalStates(states=[0.5] * state_dim, weights=[1.0]),
                        options=wpb.TaskOptions(rescale=wpb.CHOICE_OFF))


def spec_reference(ref_count):
    return wpb.TaskSpec(reference=wpb.ReferenceRewards(rewards=[float(i % 3) for i in range(ref_count)]))


def admin_requests(state_dim, ref_count):
    out("admin", "put-samples", request(put_task=wpb.PutTask(name="reach", spec=spec_samples(state_dim))))
    out("admin", "put-goals", request(put_task=wpb.PutTask(name="bin2", spec=spec_goals(state_dim))))
    out("admin", "put-reference", request(put_task=wpb.PutTask(name="ref", spec=spec_reference(ref_count))))
    out("admin", "put-ridge", request(put_task=wpb.PutTask(
        name="reach", spec=wpb.TaskSpec(samples=spec_samples(state_dim).samples,
                                        options=wpb.TaskOptions(cov_correction=True, ridge=0.1,
                                                                center=wpb.CHOICE_ON)))))
    out("admin", "get", request(get_task=wpb.GetTask(name="reach")))
    out("admin", "list", request(list_tasks=wpb.ListTasks()))
    out("admin", "drop", request(drop_task=wpb.DropTask(name="reach")))
    out("admin", "switch", request(switch_channel=wpb.SwitchChannel(channel="arm", task="reach")))
    out("admin", "channels", request(list_channels=wpb.ListChannels()))
    out("admin", "status", request(status=wpb.StatusRequest()))
    out("admin", "describe", request(describe=wpb.DescribeRequest()))
    out("admin", "act", request(act=wpb.ActRequest(channel="arm", state=[0.0] * state_dim)))


def frame_records(records):
    """The fuzz target's framed form: a 0 byte, then 16-bit length + record for each."""
    b = b"\x00"
    for r in records:
        p = r.SerializeToString()
        b += struct.pack("<H", len(p)) + p
    return b


def journal(state_dim, ref_count):
    import hashlib
    put = jpb.JournalRecord(seq=1, put=jpb.TaskPut(name="reach", spec=spec_samples(state_dim)))
    put_goals = jpb.JournalRecord(seq=2, put=jpb.TaskPut(name="bin2", spec=spec_goals(state_dim)))
    put_ref = jpb.JournalRecord(seq=3, put=jpb.TaskPut(name="ref", spec=spec_reference(ref_count)))
    sw = jpb.JournalRecord(seq=4, channel_switch=jpb.ChannelSwitch(channel="arm", task="reach", epoch=1))
    sw2 = jpb.JournalRecord(seq=5, channel_switch=jpb.ChannelSwitch(channel="arm", task="bin2", epoch=2))
    drop = jpb.JournalRecord(seq=6, drop=jpb.TaskDrop(name="reach"))
    drop_active = jpb.JournalRecord(seq=6, drop=jpb.TaskDrop(name="bin2"))
    out("journal", "puts-switches-drop", frame_records([put, put_goals, put_ref, sw, sw2, drop]))
    out("journal", "drop-active", frame_records([put_goals, sw2, drop_active]))
    out("journal", "switch-unknown", frame_records([sw]))
    out("journal", "torn-tail", frame_records([put, sw])[:-5])
    out("journal", "empty", b"\x00")
    # The raw form (odd first byte): the file's own bytes, checksums included.
    raw = b"VEERJNL1"
    for r in (put, sw):
        p = r.SerializeToString()
        raw += struct.pack("<I", len(p)) + hashlib.blake2b(p, digest_size=32).digest() + p
    out("journal", "raw", b"\x01" + raw)


def reply(**kw):
    return wpb.Reply(protocol=1, id=0, **kw).SerializeToString()


def client_replies(arm):
    act = wpb.ActReply(seq=0, action=[0.25, 0.5], value=1.5, task="reach", epoch=2,
                       model_version=arm.model_version, flags=0, server_us=40)
    out("client_reply", "act", b"\x00" + reply(act=act))
    out("client_reply", "act-long-task", b"\x00" + reply(act=wpb.ActReply(action=[0.0, 0.0], task="t" * 300)))
    out("client_reply", "act-error", b"\x40" + reply(error=wpb.Error(code=-5, name="VEER_EDIM", message="m",
                                                                      field="act.state")))
    d = wpb.DescribeReply(model_version="other", model_digest=b"\x01" * 32, state_dim=4, z_dim=4,
                          feature_names=FEATURES, action_kind=1, action_dim=2,
                          action_low=[-1, -1], action_high=[1, 1], fallback_action=[0, 0],
                          decision_step_s=0.02, discount=0.98, default_deadline_us=900)
    out("client_reply", "describe", b"\x01" + reply(describe=d))
    ti = wpb.TaskInfo(name="reach", digest=b"\x02" * 32, source=1, count=3, r2=0.5, norm_raw=2.0,
                      z=[0.1, 0.2, 0.3, 0.4], active_on=["arm", "belt"], encoded=True)
    out("client_reply", "tasks", b"\x02" + reply(tasks=wpb.TaskList(tasks=[ti, wpb.TaskInfo(name="x")])))
    out("client_reply", "channels", b"\x03" + reply(channels=wpb.ChannelList(
        channels=[wpb.ChannelInfo(name="arm", task="reach", epoch=3, acts=10)])))
    out("client_reply", "status", b"\x04" + reply(status=wpb.StatusReply(
        model_version="m", ready=True, uptime_s=1.0, tasks=1, channels=1, acts=5, version="0.1.0")))
    out("client_reply", "task", b"\x05" + reply(task=ti))
    out("client_reply", "channel", b"\x06" + reply(channel=wpb.ChannelInfo(name="arm", task="reach", epoch=1)))
    out("client_reply", "done", b"\x07" + reply(done=wpb.Done()))


def npy_bytes(a):
    import io
    f = io.BytesIO()
    np.save(f, a)
    return f.getvalue()


def tlog():
    rng = np.random.default_rng(5)
    s = rng.uniform(-1, 1, (4, 3)).astype(np.float32)
    a = rng.uniform(-1, 1, (4, 2)).astype(np.float32)
    n = rng.uniform(-1, 1, (4, 3)).astype(np.float32)
    d = np.array([0, 0, 1, 0], dtype=np.float32)

    def pack(mode, files):
        b = bytes([mode])
        for f in files:
            b += struct.pack("<H", len(f)) + f
        return b
    out("tlog", "continuous", pack(4, [npy_bytes(s), npy_bytes(a), npy_bytes(n), npy_bytes(d)]))
    da = np.array([0, 3, 1, 2], dtype=np.int64)
    out("tlog", "discrete", pack(1, [npy_bytes(s), npy_bytes(da), npy_bytes(n)]))
    ts = np.array([[0, 1], [4, 2], [3, 3], [1, 0]], dtype=np.float32)
    out("tlog", "tabular", pack(3, [npy_bytes(ts), npy_bytes(da.astype(np.int32)), npy_bytes(ts[::-1].copy())]))


def main():
    for d in glob.glob(os.path.join(HERE, "corpus", "*", "start-*")):
        os.remove(d)
    arm = bundles()
    npy()
    act_requests(arm.state_dim)
    ref_count = 8
    admin_requests(arm.state_dim, ref_count)
    journal(arm.state_dim, ref_count)
    client_replies(arm)
    tlog()
    n = len(glob.glob(os.path.join(HERE, "corpus", "*", "start-*")))
    print(f"wrote {n} starting inputs and fixtures/arm-small.veer")


if __name__ == "__main__":
    main()
