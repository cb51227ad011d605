"""The act deadline of the C client (include/veer/client.h) and the Python client against a
real veerd that is stopped with SIGSTOP: while stopped, every act call returns the model's
fallback action flagged FALLBACK|DEADLINE, no later than the deadline plus a generous margin;
after SIGCONT the replies veerd then sends for those calls are thrown away by sequence number,
and the next call gets its own, fresh answer.

The margin is deliberately loose (0.5 s on a 20 ms deadline) because the machine is shared and
this is a correctness test, not a benchmark: the property checked is "returned, with the flag",
never a latency figure (tests/bench measures those)."""
import json
import subprocess
import time

import numpy as np
import pytest

from conftest import PROBE, VEER
from veer.client import Client, FALLBACK, DEADLINE

MARGIN_NS = 500_000_000  # generous: shared machine; see the module docstring


class Probe:
    """The C test controller (tests/clients/client_probe.c), driven line by line."""

    def __init__(self, endpoint):
        self.p = subprocess.Popen([PROBE, endpoint], stdin=subprocess.PIPE,
                                  stdout=subprocess.PIPE, text=True)
        self.hello = self.read()

    def read(self):
        line = self.p.stdout.readline()
        assert line, "client_probe exited"
        return json.loads(line)

    def act(self, channel, deadline_us, state):
        self.p.stdin.write(f"act {channel} {deadline_us} {','.join(map(repr, map(float, state)))}\n")
        self.p.stdin.flush()
        return self.read()

    def stats(self):
        self.p.stdin.write("stats\n")
        self.p.stdin.flush()
        return self.read()

    def close(self):
        try:
            self.p.stdin.write("quit\n")
            self.p.stdin.flush()
            self.p.wait(10)
        except Exception:
            self.p.kill()
            self.p.wait()


@pytest.fixture
def armed(veerd):
    """veerd with channel "arm" running a goal task, and the C probe connected to it."""
    with Client(act=veerd.act, admin=veerd.admin) as c:
        d = c.model.state_dim
        c.put_goals("reach", np.full((1, d), 0.2, np.float32))
        c.switch("arm", "reach")
    probe = Probe(veerd.act)
    yield veerd, probe, d
    probe.close()


def test_c_client_falls_back_while_veerd_is_stopped(armed):
    veerd, probe, d = armed
    assert probe.hello["open"] == 0
    fallback = probe.hello["fallback"]
    state = np.linspace(-0.5, 0.5, d)

    live = probe.act("arm", 200000, state)
    assert live["rc"] == 0 and not (live["flags"] & FALLBACK), live
    assert live["task"] == "reach"

    veerd.pause()
    try:
        stopped = [probe.act("arm", 20000, state) for _ in range(3)]
    finally:
        veerd.resume()
    for r in stopped:
        assert r["rc"] == 0
        assert r["flags"] & FALLBACK and r["flags"] & DEADLINE, r
        assert r["action"] == fallback
        assert r["epoch"] == 0 and r["task"] == ""
        assert r["round_trip_ns"] < 20_000_000 + MARGIN_NS, r
    assert stopped[0]["seq"] < stopped[1]["seq"] < stopped[2]["seq"]

    # veerd now answers the three stale requests; the next call must drop those answers and
    # return its own (a higher seq, the live task, the same action as before for the same state).
    time.sleep(0.3)
    fresh = probe.act("arm", 200000, state)
    assert fresh["rc"] == 0 and not (fresh["flags"] & FALLBACK), fresh
    assert fresh["seq"] > stopped[-1]["seq"]
    assert fresh["action"] == live["action"]
    st = probe.stats()
    assert st["late_discarded"] == 3, st
    assert st["deadline_fallbacks"] == 3 and st["replies"] == 2, st
    assert st["hist_count"] == 5  # every call's round trip is in the histogram


def test_c_client_act_allocates_nothing(armed):
    """The act path's promise (include/veer/client.h): no allocation in our code per call,
    counted through libveer's allocation hook (libzmq's own buffers do not go through it)."""
    veerd, probe, d = armed
    state = np.linspace(-1, 1, d)
    probe.act("arm", 200000, state)
    before = probe.stats()["allocations"]
    for i in range(200):
        r = probe.act("arm", 200000, state * (i % 7) / 7)
        assert r["rc"] == 0 and not (r["flags"] & FALLBACK)
    veerd.pause()
    try:
        assert probe.act("arm", 5000, state)["flags"] & DEADLINE
    finally:
        veerd.resume()
    time.sleep(0.2)
    assert not (probe.act("arm", 200000, state)["flags"] & FALLBACK)  # discards the late one
    assert probe.stats()["allocations"] == before


def test_cli_reports_a_stopped_veerd_as_unreachable(armed):
    veerd, probe, d = armed
    veerd.pause()
    try:
        r = subprocess.run([VEER, "act", "arm", ",".join(["0"] * d), "--timeout-ms", "300",
                            "--json"], capture_output=True, text=True, env=veerd.env(),
                           timeout=60)
        s = subprocess.run([VEER, "status", "--timeout-ms", "300"], capture_output=True,
                           text=True, env=veerd.env(), timeout=60)
    finally:
        veerd.resume()
    assert r.returncode == 4 and json.loads(r.stdout)["error"]["name"] == "VEER_ETIMEDOUT"
    assert s.returncode == 4 and "no answer from veerd" in s.stderr


def test_python_client_falls_back_while_veerd_is_stopped(armed):
    veerd, probe, d = armed
    with Client(act=veerd.act) as c:
        state = np.zeros(d, np.float32)
        live = c.act("arm", state, deadline_us=200000)
        assert not live.fallback
        veerd.pause()
        try:
            r = c.act("arm", state, deadline_us=20000)
        finally:
            veerd.resume()
        assert r.flags & FALLBACK and r.flags & DEADLINE
        np.testing.assert_array_equal(r.action, c.model.fallback_action)
        assert r.round_trip_s < 0.02 + MARGIN_NS / 1e9
        time.sleep(0.3)
        again = c.act("arm", state, deadline_us=200000)
        assert not again.fallback and again.seq > r.seq
        np.testing.assert_array_equal(again.action, live.action)
        assert c.late_discarded == 1


def test_c_client_refusals_keep_the_fallback_in_the_action(armed):
    veerd, probe, d = armed
    nan_state = [0.0] * d
    nan_state[1] = float("nan")
    r = probe.act("arm", 200000, nan_state)
    assert r["name"] == "VEER_ENONFINITE" and r["field"] == "state"
    assert r["action"] == probe.hello["fallback"]
    # An unknown channel is veerd's refusal, passed through with its code.
    r = probe.act("nowhere", 200000, [0.0] * d)
    assert r["rc"] != 0 or (r["flags"] & FALLBACK), r
    assert r["action"] == probe.hello["fallback"] or not (r["flags"] & FALLBACK)


def test_c_client_rides_through_a_veerd_restart(armed):
    """A controller keeps its client across a veerd restart: while veerd is down every call
    returns the fallback at once (nothing is connected, so nothing is queued to arrive stale
    later); once veerd is back, ZeroMQ reconnects by itself and the restored task answers."""
    veerd, probe, d = armed
    state = np.linspace(0, 1, d)
    before = probe.act("arm", 200000, state)
    assert not (before["flags"] & FALLBACK)
    veerd.terminate()
    time.sleep(0.2)  # let the client's side see the disconnect
    down = probe.act("arm", 200000, state)
    assert down["flags"] & FALLBACK and down["flags"] & DEADLINE
    # Not connected: the call does not even wait for its 200 ms deadline (bound generous: half).
    assert down["round_trip_ns"] < 100_000_000, down
    assert down["action"] == probe.hello["fallback"]
    veerd.start()
    end = time.monotonic() + 10
    while True:
        after = probe.act("arm", 200000, state)
        if not (after["flags"] & FALLBACK) or time.monotonic() > end:
            break
        time.sleep(0.05)
    assert not (after["flags"] & FALLBACK), after
    assert after["task"] == "reach" and after["action"] == before["action"]


def test_c_client_counts_replies_from_another_model(armed, tmp_path):
    """veerd restarted with another bundle of the same shape: the client keeps acting (the
    journal's tasks are re-encoded), and counts the replies whose model differs from the one it
    described, so the controller knows its stored fallback may be stale."""
    from veer import bundle as vb, synth
    veerd, probe, d = armed
    state = np.linspace(0, 1, d)
    assert not (probe.act("arm", 200000, state)["flags"] & FALLBACK)
    assert probe.stats()["model_changes"] == 0
    layout = synth.make_layout(model_version="continuous-retrained", **synth.PRESETS["continuous"])
    m, _, _ = synth.build_random(layout, rng_key=8)
    other = str(tmp_path / "other.veer")
    vb.write_file_atomic(other, vb.pack_bundle(m))
    veerd.terminate()
    veerd.argv[veerd.argv.index("--bundle") + 1] = other
    veerd.start()
    end = time.monotonic() + 10
    while (probe.act("arm", 200000, state)["flags"] & FALLBACK) and time.monotonic() < end:
        time.sleep(0.05)
    st = probe.stats()
    assert st["model_changes"] >= 1, st
