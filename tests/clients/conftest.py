"""Fixtures for the client tests: paths to the built binaries, random-weight bundles from the
exporter's helper (veer.synth), and a real veerd started per test on ipc:// or 127.0.0.1 with a
temporary state directory, stopped by its process id."""
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time

import pytest

BUILD = os.environ.get("VEER_BUILD_DIR", "")
BIN = os.path.join(BUILD, "bin")
VEER = os.path.join(BIN, "veer")
VEERD = os.path.join(BIN, "veerd")
PROBE = os.path.join(BIN, "client_probe")


def need_veerd():
    if not os.path.exists(VEERD):
        pytest.skip("veerd is not built yet (src/service/main.c missing): nothing to test against")


@pytest.fixture(scope="session")
def bundles():
    """Paths of two random-weight bundles written once per session: a continuous-action one
    and a discrete-action one (the exporter's presets)."""
    from veer import synth
    d = tempfile.mkdtemp(prefix="vcb")
    out = {}
    for name in ("continuous", "small"):
        path = os.path.join(d, f"{name}.veer")
        synth.write_preset(path, name, rng_key=7)
        out[name] = path
    yield out
    shutil.rmtree(d, ignore_errors=True)


# Port picking is the service tests' (tests/service/harness.py), shared rather than copied.
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "service"))
from harness import free_port, free_ports  # noqa: E402,F401


class Veerd:
    """One veerd process. ``act`` / ``admin`` are its endpoints; ``terminate()`` sends SIGTERM to
    its pid and waits, ``start()`` starts it again on the same endpoints and state directory,
    ``stop()`` terminates and removes the directory."""

    def __init__(self, bundle, transport="ipc", extra=(), ready_keys=None):
        self.ready_keys = ready_keys or {}
        self.dir = tempfile.mkdtemp(prefix="vcd")  # short: ipc paths are limited to ~100 bytes
        if transport == "ipc":
            self.act = f"ipc://{self.dir}/act"
            self.admin = f"ipc://{self.dir}/admin"
            self.events = f"ipc://{self.dir}/events"
        else:
            p = free_ports(3)
            self.act, self.admin = f"tcp://127.0.0.1:{p[0]}", f"tcp://127.0.0.1:{p[1]}"
            self.events = f"tcp://127.0.0.1:{p[2]}"
        self.log = open(os.path.join(self.dir, "veerd.log"), "w+")
        self.argv = [VEERD, "--bundle", bundle, "--state-dir", os.path.join(self.dir, "state"),
                     "--act", self.act, "--admin", self.admin, "--events", self.events, *extra]
        self.start()

    def start(self):
        """Starts veerd (again: same endpoints, same state directory) and waits until ready."""
        self.proc = subprocess.Popen(self.argv, stdout=self.log, stderr=subprocess.STDOUT)
        self.wait_ready()

    def terminate(self):
        """SIGTERM to the pid and wait; the state directory stays for a restart."""
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGCONT)
            os.kill(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(10)

    def wait_ready(self, seconds=20.0):
        from veer.client import Client, VeerTimeout
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                raise RuntimeError(f"veerd exited with {self.proc.returncode}:\n{self.output()}")
            try:
                with Client(act=self.act, admin=self.admin, timeout_s=0.5,
                            **self.ready_keys) as c:
                    if c.status().ready:
                        return
            except VeerTimeout:
                pass
            time.sleep(0.05)
        raise RuntimeError(f"veerd did not become ready in {seconds} s:\n{self.output()}")

    def output(self):
        self.log.flush()
        self.log.seek(0)
        return self.log.read()

    def env(self):
        e = dict(os.environ)
        e.update(VEER_ACT=self.act, VEER_ADMIN=self.admin)
        e.pop("VEER_SERVER_KEY", None)
        e.pop("VEER_KEY", None)
        return e

    def pause(self):
        """SIGSTOP, then wait until every thread is really stopped: kill() returns before the
        signal has reached threads running on the other core, which could still answer."""
        os.kill(self.proc.pid, signal.SIGSTOP)
        end = time.monotonic() + 10
        while time.monotonic() < end:
            states = []
            for t in os.listdir(f"/proc/{self.proc.pid}/task"):
                try:
                    with open(f"/proc/{self.proc.pid}/task/{t}/stat") as f:
                        states.append(f.read().rsplit(")", 1)[1].split()[0])
                except FileNotFoundError:
                    pass
            if states and all(st in "Tt" for st in states):
                return
            time.sleep(0.001)
        raise RuntimeError("veerd did not stop within 10 s of SIGSTOP")

    def resume(self):
        os.kill(self.proc.pid, signal.SIGCONT)

    def stop(self):
        self.terminate()
        self.log.close()
        shutil.rmtree(self.dir, ignore_errors=True)


@pytest.fixture
def veerd(bundles):
    need_veerd()
    d = Veerd(bundles["continuous"])
    yield d
    d.stop()


@pytest.fixture
def veerd_discrete_tcp(bundles):
    need_veerd()
    d = Veerd(bundles["small"], transport="tcp")
    yield d
    d.stop()
