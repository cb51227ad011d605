"""Who may change the task, and configuration errors.

CurveZMQ (RFC 26) on the admin socket with a ZAP handler (RFC 27) against a file of allowed
public keys: a supervisor with a listed key can switch; one with an unlisted key or with no
CURVE at all gets no connection, and nothing changes. Without keys, veerd refuses a non-loopback
admin address. Bad configuration exits 2 with a message naming the flag."""
import os
import shutil
import struct
import subprocess

import numpy as np
import pytest
import zmq

import harness
from harness import VEERD


def write_keys(tmp_path, allowed_publics):
    server_public, server_secret = zmq.curve_keypair()
    (tmp_path / "server.secret").write_bytes(server_secret + b"\n")
    lines = ["# supervisors allowed to switch tasks", ""] + [k.decode() for k in allowed_publics]
    (tmp_path / "allowed").write_text("\n".join(lines) + "\n")
    return server_public


def test_curve_admin(continuous_bundle, start, tmp_path):
    sup_public, sup_secret = zmq.curve_keypair()
    stranger_public, stranger_secret = zmq.curve_keypair()
    server_public = write_keys(tmp_path, [sup_public])
    extra = ["--server-key", str(tmp_path / "server.secret"), "--allowed-keys", str(tmp_path / "allowed")]
    d, c = start(continuous_bundle, extra=extra, curve=(server_public, sup_public, sup_secret))
    s = continuous_bundle.states
    assert c.put_samples("a", s[:10], np.arange(10, dtype=np.float32)).WhichOneof("body") == "task"
    assert c.put_samples("b", s[:10], -np.arange(10, dtype=np.float32)).WhichOneof("body") == "task"
    assert c.switch("arm", "a").channel.epoch == 1
    # The act socket needs no key unless --act-auth.
    assert c.do_act("arm", s[0]).act.task == "a"

    def attempt(curve, timeout_ms=1500):
        other = harness.Client(d.eps, curve=curve)
        try:
            q = harness.wire.Request(protocol=1, id=1)
            q.switch_channel.channel, q.switch_channel.task = "arm", "b"
            return other.send_raw(other.admin, q.SerializeToString(), timeout_ms=timeout_ms)
        finally:
            other.close()

    assert attempt((server_public, stranger_public, stranger_secret)) is None
    assert attempt(None) is None
    ch = c.list_channels().channels.channels
    assert [(x.name, x.task, x.epoch) for x in ch] == [("arm", "a", 1)]
    assert "auth: refused a CURVE connection" in d.log()
    assert stranger_public.decode() in d.log()
    # A second listed-key supervisor connection still works after the refusals.
    assert attempt((server_public, sup_public, sup_secret), timeout_ms=20000).channel.epoch == 2


def test_curve_act_socket(continuous_bundle, start, tmp_path):
    ctl_public, ctl_secret = zmq.curve_keypair()
    server_public = write_keys(tmp_path, [ctl_public])
    extra = ["--server-key", str(tmp_path / "server.secret"), "--allowed-keys", str(tmp_path / "allowed"),
             "--act-auth"]
    keys = (server_public, ctl_public, ctl_secret)
    d, c = start(continuous_bundle, extra=extra, curve=keys, act_curve=keys)
    assert c.describe().WhichOneof("body") == "describe"
    plain = harness.Client(d.eps)
    try:
        q = harness.wire.Request(protocol=1, id=1)
        q.describe.SetInParent()
        assert plain.send_raw(plain.act, q.SerializeToString(), timeout_ms=1500) is None
    finally:
        plain.close()


def run_veerd(args, env=None, timeout=20):
    e = dict(os.environ)
    e.update(env or {})
    return subprocess.run([VEERD, *args], capture_output=True, text=True, timeout=timeout, env=e)


@pytest.mark.parametrize("admin", ["tcp://0.0.0.0:7999", "tcp://*:7999", "tcp://192.168.1.5:7999",
                                   "tcp://127.0.0.1.evil:7999", "tcp://eth0:7999"])
def test_non_loopback_admin_refused_without_keys(continuous_bundle, tmp_path, admin):
    r = run_veerd(["--bundle", str(continuous_bundle.path), "--state-dir", str(tmp_path / "s"),
                   "--admin", admin])
    assert r.returncode == 2, r.stderr
    assert "--admin" in r.stderr and "loopback" in r.stderr
    assert not (tmp_path / "s").exists(), "nothing is started or written"


@pytest.mark.parametrize("kind", ["tcp-localhost", "tcp-127.0.0.2", "ipc"])
def test_loopback_admin_accepted(continuous_bundle, start, tmp_path, kind):
    eps = harness.endpoints("tcp", tmp_path)
    if kind == "tcp-localhost":
        eps["admin"] = eps["admin"].replace("127.0.0.1", "localhost")
    elif kind == "tcp-127.0.0.2":
        eps["admin"] = eps["admin"].replace("127.0.0.1", "127.0.0.2")
    else:
        eps["admin"] = f"ipc://{tmp_path}/admin.sock"
    d, c = start(continuous_bundle, eps=eps)
    assert c.describe(c.admin).WhichOneof("body") == "describe"


@pytest.mark.parametrize("args,env,flag", [
    (["--max-tasks", "abc"], {}, "--max-tasks"),
    (["--max-tasks", "0"], {}, "--max-tasks"),
    (["--max-tasks=-3"], {}, "--max-tasks"),
    ([], {"VEER_MAX_CHANNELS": "9999999"}, "--max-channels"),
    (["--default-deadline-us"], {}, "--default-deadline-us"),
    (["--no-such-flag"], {}, "--no-such-flag"),
    (["--act", "udp://127.0.0.1:1"], {}, "--act"),
    (["--act", "tcp://127.0.0.1:7001", "--admin", "tcp://127.0.0.1:7001"], {}, "--admin"),
    (["--server-key", "/nonexistent"], {}, "--allowed-keys"),
    (["--act-auth"], {}, "--act-auth"),
    (["--act-auth=maybe"], {}, "--act-auth"),
    (["--deadline-percentile", "49"], {}, "--deadline-percentile"),
    ([], {"VEER_DEADLINE_PERCENTILE": "101"}, "--deadline-percentile"),
    (["--act-batch", "0"], {}, "--act-batch"),
    ([], {"VEER_ACT_BATCH": "17"}, "--act-batch"),
    (["--act-threads", "0"], {}, "--act-threads"),
    ([], {"VEER_ACT_THREADS": "5"}, "--act-threads"),
    (["--act-threads", "2"], {}, "--act-threads"),  # without --act-batch: nothing to share
])
def test_bad_configuration_exits_2(continuous_bundle, tmp_path, args, env, flag):
    r = run_veerd(["--bundle", str(continuous_bundle.path), "--state-dir", str(tmp_path / "s"), *args], env)
    assert r.returncode == 2, r.stderr
    assert flag in r.stderr, r.stderr


def test_missing_bundle_and_bad_key_files(continuous_bundle, tmp_path):
    r = run_veerd(["--state-dir", str(tmp_path / "s")], {"VEER_BUNDLE": ""})
    # An empty VEER_BUNDLE counts as given; the load then fails (exit 1) naming --bundle.
    assert r.returncode == 1 and "--bundle" in r.stderr
    env = {k: v for k, v in os.environ.items() if k != "VEER_BUNDLE"}
    r = subprocess.run([VEERD, "--state-dir", str(tmp_path / "s")], capture_output=True, text=True, env=env)
    assert r.returncode == 2 and "--bundle" in r.stderr
    (tmp_path / "bad.secret").write_text("not a key\n")
    (tmp_path / "allowed").write_text("# none\n")
    r = run_veerd(["--bundle", str(continuous_bundle.path), "--server-key", str(tmp_path / "bad.secret"),
                   "--allowed-keys", str(tmp_path / "allowed")])
    assert r.returncode == 2 and "--server-key" in r.stderr and "Z85" in r.stderr
    pub, sec = zmq.curve_keypair()
    (tmp_path / "good.secret").write_bytes(sec)
    (tmp_path / "allowed").write_text(pub.decode() + "\nshort-line\n")
    r = run_veerd(["--bundle", str(continuous_bundle.path), "--server-key", str(tmp_path / "good.secret"),
                   "--allowed-keys", str(tmp_path / "allowed")])
    assert r.returncode == 2 and "--allowed-keys" in r.stderr and "line 2" in r.stderr


def test_help_explains_every_flag():
    r = run_veerd(["--help"])
    assert r.returncode == 0
    for flag in ["--bundle", "--state-dir", "--act", "--admin", "--events", "--http", "--default-deadline-us",
                 "--max-message-bytes", "--act-max-message-bytes", "--max-samples", "--max-tasks",
                 "--max-channels", "--journal-compact-bytes", "--server-key", "--allowed-keys", "--act-auth",
                 "--deadline-percentile", "--act-batch", "--act-threads"]:
        assert f"  {flag} " in r.stdout, flag
    for var in ["VEER_BUNDLE", "VEER_ADMIN", "VEER_STATE_DIR", "VEER_SERVER_KEY"]:
        assert var in r.stdout


def test_flag_overrides_environment(continuous_bundle, tmp_path):
    # The environment says 0 (invalid) but the flag wins with a valid value: veerd starts.
    eps = harness.endpoints("ipc", tmp_path)
    env = dict(os.environ, VEER_MAX_TASKS="1")
    args = [VEERD, "--bundle", str(continuous_bundle.path), "--state-dir", str(tmp_path / "s"),
            "--act", eps["act"], "--admin", eps["admin"], "--events", eps["events"], "--max-tasks", "2"]
    log = tmp_path / "log"
    with open(log, "wb") as f:
        p = subprocess.Popen(args, stdout=f, stderr=f, env=env)
    c = harness.Client(eps)
    try:
        s = continuous_bundle.states
        assert c.put_samples("one", s[:5], [1, 2, 3, 4, 5]).WhichOneof("body") == "task"
        assert c.put_samples("two", s[:5], [1, 2, 3, 4, 6]).WhichOneof("body") == "task"
        harness.expect_error(c.put_samples("three", s[:5], [1, 2, 3, 4, 7]), "ETOOMANY", "put_task.name")
    finally:
        c.close()
        os.kill(p.pid, 15)
        assert p.wait(20) == 0


# ---- real-time tuning (--act-priority, --cpu-latency-us) ---------------------------------------

def _fifo_allowed():
    return shutil.which("chrt") is not None and subprocess.run(
        ["chrt", "-f", "1", "true"], capture_output=True).returncode == 0


def _thread_scheduling(pid):
    """{thread id: (name, policy, rt priority)} from /proc/PID/task/*/stat (proc(5): fields 40
    rt_priority and 41 policy; the name is field 2, in parentheses)."""
    out = {}
    for tid in os.listdir(f"/proc/{pid}/task"):
        with open(f"/proc/{pid}/task/{tid}/stat") as f:
            text = f.read()
        name = text[text.index("(") + 1:text.rindex(")")]
        rest = text[text.rindex(")") + 2:].split()  # fields 3, 4, ...
        out[int(tid)] = (name, int(rest[41 - 3]), int(rest[40 - 3]))
    return out


def _cpu_latency_now():
    with open("/dev/cpu_dma_latency", "rb") as f:
        return struct.unpack("<i", f.read(4))[0]


SCHED_OTHER, SCHED_FIFO = 0, 1  # sched.h


@pytest.mark.skipif(not _fifo_allowed(), reason="this machine does not allow SCHED_FIFO (no CAP_SYS_NICE)")
@pytest.mark.parametrize("helpers", [0, 1])
def test_act_priority_puts_act_and_zmq_threads_at_fifo(continuous_bundle, start, helpers):
    split = ["--act-batch", "4", "--act-threads", str(1 + helpers)] if helpers else []
    d, c = start(continuous_bundle, extra=["--act-priority", "15", *split])
    s = continuous_bundle.states
    c.put_goals("park", s[:1], [1.0])
    assert c.switch("line-1", "park").channel.epoch == 1
    r = c.do_act("line-1", s[5], seq=1, deadline_us=500000).act
    assert r.task == "park" and r.flags & harness.ACT_FALLBACK == 0
    # Read the threads only after a reply came back: veerd logs "ready" once its sockets are
    # bound, and libzmq's I/O thread may not have run yet then (it sets its own priority and
    # name when it first runs; a slow CI host once caught it still unnamed at SCHED_OTHER). A
    # reply has passed through it, so by now it has.
    threads = _thread_scheduling(d.proc.pid)
    fifo = sorted(name for name, pol, prio in threads.values() if pol == SCHED_FIFO and prio == 15)
    other = [name for name, pol, _ in threads.values() if pol == SCHED_OTHER]
    # The act thread (named like the process), its helpers under --act-threads, and libzmq's I/O
    # and reaper threads; the main loop and libuv's workers stay at ordinary priority, so admin
    # work cannot starve acts.
    assert fifo == ["ZMQbg/IO/0", "ZMQbg/Reaper", "veerd"] + ["veerd-helper"] * helpers, threads
    assert threads[d.proc.pid][1] == SCHED_OTHER and "veerd" in other


@pytest.mark.skipif(shutil.which("setpriv") is None or shutil.which("prlimit") is None,
                    reason="needs setpriv and prlimit (util-linux) to take the capability away")
def test_act_priority_refused_without_permission(continuous_bundle, tmp_path):
    """Without CAP_SYS_NICE and with RLIMIT_RTPRIO 0 the kernel refuses SCHED_FIFO: veerd says
    what to grant and exits 2 before it creates its state directory."""
    r = subprocess.run(["prlimit", "--rtprio=0", "setpriv", "--bounding-set", "-sys_nice", "--inh-caps",
                        "-sys_nice", VEERD, "--bundle", str(continuous_bundle.path), "--state-dir",
                        str(tmp_path / "s"), "--act-priority", "40"],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2, r.stderr
    assert "--act-priority 40" in r.stderr and "LimitRTPRIO=40" in r.stderr
    assert not (tmp_path / "s").exists()


@pytest.mark.skipif(not os.access("/dev/cpu_dma_latency", os.R_OK | os.W_OK),
                    reason="/dev/cpu_dma_latency is not writable here")
def test_cpu_latency_request_held_while_running(continuous_bundle, start):
    """The kernel reports the strictest request in force (Linux pm_qos_interface.rst): while
    veerd runs it is at most the 37 us asked for; once veerd stops, that request is gone."""
    d, c = start(continuous_bundle, extra=["--cpu-latency-us", "37"])
    assert "holding a CPU wake-up latency request of 37 us" in d.log()
    assert _cpu_latency_now() <= 37
    assert d.stop() == 0
    assert _cpu_latency_now() != 37


def _cpus_allowed(pid, tid):
    with open(f"/proc/{pid}/task/{tid}/status") as f:
        for line in f:
            if line.startswith("Cpus_allowed_list:"):
                return line.split(":", 1)[1].strip()
    return None


@pytest.mark.skipif(len(os.sched_getaffinity(0)) < 2, reason="needs two CPUs to tell pinned from not")
def test_act_cpu_pins_the_act_and_zmq_io_threads(continuous_bundle, start):
    cpu = max(os.sched_getaffinity(0))
    d, c = start(continuous_bundle, extra=["--act-cpu", str(cpu)])
    s = continuous_bundle.states
    c.put_goals("park", s[:1], [1.0])
    c.switch("line-1", "park")
    assert c.do_act("line-1", s[3], seq=1, deadline_us=500000).act.task == "park"
    pinned = {}
    for tid, (name, _, _) in _thread_scheduling(d.proc.pid).items():
        pinned.setdefault(name, []).append(_cpus_allowed(d.proc.pid, tid))
    # The act thread is the one "veerd" thread besides the main one that is pinned.
    assert str(cpu) in pinned["veerd"] and pinned["ZMQbg/IO/0"] == [str(cpu)], pinned
    assert _cpus_allowed(d.proc.pid, d.proc.pid) != str(cpu)  # the loop thread is not pinned


def test_act_cpu_outside_the_allowed_set_is_refused(continuous_bundle, tmp_path):
    bad = max(os.sched_getaffinity(0)) + 1
    r = run_veerd(["--bundle", str(continuous_bundle.path), "--state-dir", str(tmp_path / "s"),
                   "--act-cpu", str(bad)])
    assert r.returncode == 2, r.stderr
    assert f"--act-cpu {bad}" in r.stderr and "may not run on CPU" in r.stderr
    assert not (tmp_path / "s").exists()
