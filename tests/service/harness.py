"""Starting a real veerd for the integration tests, and talking to it over ZeroMQ.

veerd runs as a subprocess bound to 127.0.0.1 (free ports picked by the kernel) or to ipc://
sockets in the test's temporary directory, with a temporary state directory. It is stopped by
its process id. Requests and replies are the generated veer_wire_pb2 messages.
"""
from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import zmq

import veer_wire_pb2 as wire

BUILD = os.environ.get("VEER_BUILD_DIR", "")
SOURCE = os.environ.get("VEER_SOURCE_DIR", os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))
VEERD = os.path.join(BUILD, "bin", "veerd")

# The runtime's ctypes bindings, shared with the reference tests (read-only use).
sys.path.insert(0, os.path.join(SOURCE, "tests", "reference"))

ACT_CLIPPED, ACT_FALLBACK, ACT_NONFINITE, ACT_DEADLINE, ACT_NO_TASK = 1, 2, 4, 8, 16

# include/veer/error.h (numbers are stable by that header's rule).
E = {"EFIELD": -20, "ENONFINITE": -16, "EEMPTY": -30, "EDIM": -31, "ENOSIGNAL": -32, "ETOOMANY": -33,
     "EBADMSG": -40, "EMSGTYPE": -41, "EMSGSIZE": -42, "ENOTASK": -44, "ETASKACTIVE": -45,
     "ENAMECONFLICT": -46, "ENOTREADY": -48, "EREFSHAPE": -18, "EPROTOCOL": -62}


def free_ports(n: int) -> list:
    """n distinct free ports: all n sockets are held open while the kernel picks, since ports
    picked one after another may repeat once each socket is closed (seen in CI: veerd then
    refused --events equal to --act)."""
    socks = [socket.socket() for _ in range(n)]
    try:
        for s in socks:
            s.bind(("127.0.0.1", 0))
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def free_port() -> int:
    return free_ports(1)[0]


def endpoints(kind: str, tmp) -> dict:
    if kind == "tcp":
        ports = free_ports(3)
        return {n: f"tcp://127.0.0.1:{p}" for n, p in zip(("act", "admin", "events"), ports)}
    return {n: f"ipc://{tmp}/{n}.sock" for n in ("act", "admin", "events")}


class Veerd:
    """One veerd process. `log` is its stderr, read back as text."""

    started = 0

    def __init__(self, bundle, state_dir, eps: dict, extra=(), env=None, log_path=None):
        self.eps = eps
        Veerd.started += 1
        self.log_path = log_path or f"{state_dir}.{Veerd.started}.log"
        args = [VEERD, "--bundle", str(bundle), "--state-dir", str(state_dir), "--act", eps["act"],
                "--admin", eps["admin"], "--events", eps["events"], *extra]
        self.logf = open(self.log_path, "ab")
        self.proc = subprocess.Popen(args, stdout=self.logf, stderr=self.logf, env=env)
        self._wait_ready()

    def _wait_ready(self, timeout=20.0):
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if "veerd: info: ready:" in self.log():
                return
            if self.proc.poll() is not None:
                raise RuntimeError(f"veerd exited with {self.proc.returncode}:\n{self.log()}")
            time.sleep(0.02)
        self.kill()
        raise RuntimeError(f"veerd did not become ready:\n{self.log()}")

    def log(self) -> str:
        with open(self.log_path, "r", errors="replace") as f:
            return f.read()

    def stop(self, timeout=20.0) -> int:
        """SIGTERM by pid; returns the exit code."""
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
        try:
            rc = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.kill()
            raise
        self.logf.close()
        return rc

    def kill(self):
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait(10)
        self.logf.close()


class Client:
    """DEALER sockets to veerd's act and admin endpoints, with optional CURVE keys."""

    def __init__(self, eps: dict, curve=None, act_curve=None):
        self.ctx = zmq.Context()
        self.act = self._socket(eps["act"], act_curve)
        self.admin = self._socket(eps["admin"], curve)
        self.next_id = 1

    def _socket(self, endpoint, curve):
        s = self.ctx.socket(zmq.DEALER)
        s.setsockopt(zmq.LINGER, 0)
        if curve is not None:
            server_public, public, secret = curve
            s.curve_serverkey = server_public
            s.curve_publickey = public
            s.curve_secretkey = secret
        s.connect(endpoint)
        return s

    def close(self):
        self.act.close()
        self.admin.close()
        self.ctx.term()

    def send_raw(self, sock, data: bytes, timeout_ms=5000):
        """Sends bytes; returns the decoded Reply, or None when none came within the timeout."""
        sock.send(data)
        if not sock.poll(timeout_ms):
            return None
        r = wire.Reply()
        r.ParseFromString(sock.recv())
        return r

    def call(self, sock, req: wire.Request, timeout_ms=10000, protocol=1):
        req.protocol = protocol
        if not req.id:
            req.id = self.next_id
            self.next_id += 1
        r = self.send_raw(sock, req.SerializeToString(), timeout_ms)
        if r is None:
            raise TimeoutError("no reply from veerd")
        assert r.id == req.id
        return r

    # Convenience wrappers; each returns the Reply.
    def put_samples(self, name, states, rewards, **opts):
        q = wire.Request()
        q.put_task.name = name
        q.put_task.spec.samples.states.extend(np.asarray(states, np.float32).ravel())
        q.put_task.spec.samples.rewards.extend(np.asarray(rewards, np.float32).ravel())
        for k, v in opts.items():
            setattr(q.put_task.spec.options, k, v)
        return self.call(self.admin, q)

    def put_goals(self, name, goals, weights=None):
        q = wire.Request()
        q.put_task.name = name
        q.put_task.spec.goals.states.extend(np.asarray(goals, np.float32).ravel())
        if weights is not None:
            q.put_task.spec.goals.weights.extend(np.asarray(weights, np.float32).ravel())
        return self.call(self.admin, q)

    def switch(self, channel, task):
        q = wire.Request()
        q.switch_channel.channel = channel
        q.switch_channel.task = task
        return self.call(self.admin, q)

    def drop(self, name):
        q = wire.Request()
        q.drop_task.name = name
        return self.call(self.admin, q)

    def get(self, name):
        q = wire.Request()
        q.get_task.name = name
        return self.call(self.admin, q)

    def list_tasks(self):
        q = wire.Request()
        q.list_tasks.SetInParent()
        return self.call(self.admin, q)

    def list_channels(self):
        q = wire.Request()
        q.list_channels.SetInParent()
        return self.call(self.admin, q)

    def describe(self, sock=None):
        q = wire.Request()
        q.describe.SetInParent()
        return self.call(sock if sock is not None else self.act, q)

    def act_request(self, channel, state, seq=0, deadline_us=0):
        q = wire.Request()
        q.act.channel = channel
        q.act.state.extend(np.asarray(state, np.float32).ravel())
        q.act.seq = seq
        q.act.deadline_us = deadline_us
        return q

    def do_act(self, channel, state, seq=0, deadline_us=0):
        return self.call(self.act, self.act_request(channel, state, seq, deadline_us))


def expect_error(reply, code: str, field: str):
    assert reply.WhichOneof("body") == "error", f"expected {code}, got {reply}"
    assert reply.error.code == E[code], f"expected {code} ({E[code]}), got {reply.error}"
    assert reply.error.name == "VEER_" + code
    assert reply.error.field == field, f"expected field {field!r}, got {reply.error.field!r}"
    assert reply.error.message, "every error carries a message"
