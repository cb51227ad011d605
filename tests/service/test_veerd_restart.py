"""What a supervisor was told is stored, stays stored: tasks and switches survive SIGKILL, come
back with the same content digests, task vectors, epochs and actions; a torn or damaged last
journal record costs that record only, with a warning; compaction keeps the state.

The journal is read here by an independent parser of the documented frame format
(src/service/journal.h: magic, then u32 little-endian length, BLAKE2b-256 of the payload,
payload), with Python's hashlib.blake2b (RFC 7693) for the checksums."""
import hashlib
import os
import struct

import numpy as np

import harness
from harness import wire


def frames(path):
    """[(offset, end, JournalRecord)] for every frame, checked with hashlib."""
    import veer_journal_pb2 as journal
    data = open(path, "rb").read()
    assert data[:8] == b"VEERJNL1"
    out, off = [], 8
    while off < len(data):
        (n,) = struct.unpack_from("<I", data, off)
        digest = data[off + 4: off + 36]
        payload = data[off + 36: off + 36 + n]
        assert len(payload) == n, "torn frame"
        assert hashlib.blake2b(payload, digest_size=32).digest() == digest
        rec = journal.JournalRecord()
        rec.ParseFromString(payload)
        out.append((off, off + 36 + n, rec))
        off += 36 + n
    return out


def build_state(c, s):
    rng = np.random.default_rng(8)
    c.put_samples("sort-left", s[:40], rng.normal(size=40))
    c.put_samples("sort-right", s[40:80], rng.normal(size=40), rescale=wire.CHOICE_OFF)
    c.put_goals("park", s[100:102], [1.0, 0.25])
    c.put_samples("sort-left-copy", s[:40], np.random.default_rng(8).normal(size=40))  # same content
    c.put_samples("temporary", s[:10], np.arange(10))
    assert c.drop("temporary").WhichOneof("body") == "done"
    for task in ["sort-left", "sort-right", "park", "sort-left"]:
        assert c.switch("arm-1", task).WhichOneof("body") == "channel"
    assert c.switch("arm-2", "park").WhichOneof("body") == "channel"


def snapshot(c, s):
    tasks = {t.name: (bytes(t.digest), tuple(c.get(t.name).task.z)) for t in c.list_tasks().tasks.tasks}
    channels = {x.name: (x.task, x.epoch) for x in c.list_channels().channels.channels}
    acts = []
    for ch in ["arm-1", "arm-2"]:
        for i in range(10):
            r = c.do_act(ch, s[200 + i], seq=i, deadline_us=500000).act
            acts.append((ch, tuple(r.action), r.value, r.flags, r.task, r.epoch))
    return tasks, channels, acts


def test_everything_acknowledged_survives_sigkill(continuous_bundle, start, tmp_path):
    s = continuous_bundle.states
    state = tmp_path / "state"
    d, c = start(continuous_bundle, state_dir=state)
    build_state(c, s)
    before = snapshot(c, s)
    d.kill()
    assert sorted(before[0]) == ["park", "sort-left", "sort-left-copy", "sort-right"]
    assert before[1] == {"arm-1": ("sort-left", 4), "arm-2": ("park", 1)}
    d2, c2 = start(continuous_bundle, state_dir=state)
    assert "4 tasks, 2 channels restored" in d2.log()
    after = snapshot(c2, s)
    assert after == before
    # Epochs continue from where they were.
    assert c2.switch("arm-1", "park").channel.epoch == 5
    recs = frames(state / "journal")
    kinds = [r.WhichOneof("body") for _, _, r in recs]
    assert kinds.count("put") >= 4 and kinds[-1] == "channel_switch"
    assert recs[-1][2].channel_switch.epoch == 5
    assert c2.get("sort-left").task.digest == c2.get("sort-left-copy").task.digest


def test_torn_last_record_loses_only_it(continuous_bundle, start, tmp_path):
    s = continuous_bundle.states
    state = tmp_path / "state"
    d, c = start(continuous_bundle, state_dir=state)
    build_state(c, s)
    tasks_before, channels_before, _ = snapshot(c, s)
    d.kill()
    recs = frames(state / "journal")
    last_off, last_end, last = recs[-1]
    assert last.channel_switch.channel == "arm-2" and last.channel_switch.epoch == 1
    # Cut the last frame in the middle, as a crash during the write would.
    os.truncate(state / "journal", last_off + (last_end - last_off) // 2)
    d2, c2 = start(continuous_bundle, state_dir=state)
    log = d2.log()
    assert "veerd: warning: journal:" in log and "cut" in log
    tasks, channels, _ = snapshot_partial(c2)
    assert tasks == tasks_before
    assert channels == {"arm-1": ("sort-left", 4)}  # only arm-2's switch is gone
    assert os.path.getsize(state / "journal") == last_off  # cut there on disk
    # A flipped byte in the (new) last record: the same rule.
    d2.kill()
    recs = frames(state / "journal")
    off, end, _ = recs[-1]
    with open(state / "journal", "r+b") as f:
        f.seek(end - 3)
        b = f.read(1)
        f.seek(end - 3)
        f.write(bytes([b[0] ^ 0x01]))
    d3, c3 = start(continuous_bundle, state_dir=state)
    assert "checksum mismatch" in d3.log()
    tasks, channels, _ = snapshot_partial(c3)
    assert tasks == tasks_before
    assert channels == {"arm-1": ("park", 3)}  # switches: sort-left 1, sort-right 2, park 3, sort-left 4


def snapshot_partial(c):
    tasks = {t.name: (bytes(t.digest), tuple(c.get(t.name).task.z)) for t in c.list_tasks().tasks.tasks}
    channels = {x.name: (x.task, x.epoch) for x in c.list_channels().channels.channels if x.task}
    return tasks, channels, None


def test_compaction_keeps_state(continuous_bundle, start, tmp_path):
    s = continuous_bundle.states
    state = tmp_path / "state"
    d, c = start(continuous_bundle, state_dir=state, extra=["--journal-compact-bytes", "4096"])
    build_state(c, s)
    live = sum(end - off for off, end, r in frames(state / "journal")
               if r.WhichOneof("body") == "put" and r.put.name != "temporary") + 8
    sizes = []
    for k in range(300):
        assert c.switch("arm-1", ["sort-right", "park"][k % 2]).WhichOneof("body") == "channel"
        sizes.append(os.path.getsize(state / "journal"))
    before = snapshot(c, s)
    assert "journal compacted" in d.log()
    # Compaction rewrites at twice the live size: the journal stays within that plus a record.
    assert max(sizes) < 2 * (live + 200) + 200, (max(sizes), live)
    assert min(sizes[100:]) < live + 400  # and it did shrink back to about the live state
    assert d.stop() == 0
    d2, c2 = start(continuous_bundle, state_dir=state, extra=["--journal-compact-bytes", "4096"])
    assert snapshot(c2, s) == before
    assert before[1]["arm-1"] == ("park", 304)


def test_sigterm_stops_cleanly_and_keeps_state(continuous_bundle, start, tmp_path):
    s = continuous_bundle.states
    state = tmp_path / "state"
    d, c = start(continuous_bundle, state_dir=state)
    build_state(c, s)
    before = snapshot(c, s)
    assert d.stop() == 0
    assert "stopped cleanly" in d.log()
    d2, c2 = start(continuous_bundle, state_dir=state)
    assert snapshot(c2, s) == before


def test_unreadable_journal_is_moved_aside(continuous_bundle, start, tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    (state / "journal").write_bytes(b"somebody else's file, not a journal at all")
    d, c = start(continuous_bundle, state_dir=state)
    assert "moved it to" in d.log()
    assert (state / "journal.unreadable").read_bytes().startswith(b"somebody else's")
    assert list(c.list_tasks().tasks.tasks) == []


def test_sigterm_answers_acts_already_queued(start, tmp_path):
    """SIGTERM while a controller's burst is queued: every request already taken in is answered
    before veerd exits 0. The discrete bundle (256-wide networks) makes each act take long enough
    that most of the burst is still queued when the signal lands."""
    from veer import bundle as vb
    from veer import synth
    import signal
    import time
    m, _, states = synth.build_random(synth.preset_layout("small"), rng_key=13, n_states=300)
    path = tmp_path / "small.veer"
    vb.write_file_atomic(str(path), vb.pack_bundle(m))
    b = type("B", (), {"path": path})
    d, c = start(b, kind="ipc")
    states = np.asarray(states, np.float32)
    c.put_samples("t", states[:30], np.arange(30, dtype=np.float32))
    c.switch("arm", "t")
    n = 400
    for i in range(n):
        q = c.act_request("arm", states[i % 300], seq=i, deadline_us=10000000)
        q.protocol, q.id = 1, i + 1
        c.act.send(q.SerializeToString())
    assert c.act.poll(5000)
    got = [wire.Reply.FromString(c.act.recv())]
    time.sleep(0.005)  # let libzmq's I/O thread hand the rest of the burst to the socket
    os.kill(d.proc.pid, signal.SIGTERM)
    while c.act.poll(3000):
        got.append(wire.Reply.FromString(c.act.recv()))
    assert d.proc.wait(20) == 0
    assert "SIGTERM: stopping" in d.log()
    assert sorted(r.act.seq for r in got) == list(range(n))
    assert all(r.WhichOneof("body") == "act" and r.act.task == "t" for r in got)


def test_task_that_no_longer_encodes_leaves_its_channel_on_the_fallback(continuous_bundle, start,
                                                                        tmp_path):
    """Restarted on a model whose states are longer (24 features instead of 12), the stored goal
    task cannot be re-encoded: veerd still starts, keeps the task visible but unusable, and the
    channel that was switched to it answers with the new model's fallback action and NO_TASK
    instead of acting on a vector that belongs to another model (DESIGN.md invariant 3). The
    channel's epoch is kept, a switch to the broken task is refused naming the field, and a task
    put for the new model works as usual."""
    from veer import bundle as vb
    from veer import synth
    s = continuous_bundle.states
    state = tmp_path / "state"
    d, c = start(continuous_bundle, state_dir=state)
    c.put_goals("park", s[100:102], [1.0, 0.25])
    assert c.switch("arm-1", "park").channel.epoch == 1
    assert c.switch("arm-1", "park").channel.epoch == 2
    assert d.stop() == 0

    m, _, wide_states = synth.build_random(synth.preset_layout("small"), rng_key=5, n_states=300)
    wide_path = tmp_path / "wide.veer"
    vb.write_file_atomic(str(wide_path), vb.pack_bundle(m))
    wide = type(continuous_bundle)(wide_path, np.asarray(wide_states, np.float32), None)
    d2, c2 = start(wide, state_dir=state)
    log = d2.log()
    assert "task 'park' does not encode for the loaded model" in log
    assert "channel 'arm-1' was switched to task 'park'" in log and "starts with no task" in log
    listed = {t.name: t for t in c2.list_tasks().tasks.tasks}
    assert list(listed) == ["park"] and not listed["park"].encoded
    assert [(x.name, x.task, x.epoch) for x in c2.list_channels().channels.channels] == [("arm-1", "", 2)]

    fallback = list(c2.describe().describe.fallback_action)
    r = c2.do_act("arm-1", wide.states[0], seq=1, deadline_us=500000).act
    assert r.flags == harness.ACT_FALLBACK | harness.ACT_NO_TASK and r.task == ""
    np.testing.assert_array_equal(r.action, np.asarray(fallback, np.float32))

    harness.expect_error(c2.switch("arm-1", "park"), "ENOTREADY", "switch_channel.task")
    assert [(x.name, x.task, x.epoch) for x in c2.list_channels().channels.channels] == [("arm-1", "", 2)]

    c2.put_goals("park-wide", wide.states[10:11], [1.0])
    assert c2.switch("arm-1", "park-wide").channel.epoch == 3
    r = c2.do_act("arm-1", wide.states[0], seq=2, deadline_us=500000).act
    assert r.flags & harness.ACT_FALLBACK == 0 and r.task == "park-wide" and r.epoch == 3
    assert c2.drop("park").WhichOneof("body") == "done"
