"""The demo command's core and the FB evaluation, end to end on the shipped demo model.

1. veer-arm-demo against a real veerd (ipc:// sockets, HTTP on 127.0.0.1) for a few seconds:
   exit 0, one status line a second naming the tasks in the supervisor's switch order, every
   tick's act counted by veerd itself (its status reply), and an SVG report that parses as XML
   (xml.etree, the Python standard library's parser) with a trajectory panel per task.
2. veer-arm-fb-eval's numbers come from the served policy: its keep_high task vector and its
   first action are recomputed independently, the task vector with NumPy from the published
   encoding z = (1/n) Σ (r_i − r̄) B(s_i), rescaled to norm √d (Touati, Rapin & Ollivier, ICLR
   2023, §4; centring as runtime.h describes it) with the reward written here from its
   definition in tasks.h, and the action with the NumPy reference networks (veer.reference);
   and the same task registered in veerd over ZeroMQ answers the same action.
"""
import json
import os
import re
import shutil
import signal
import subprocess
import tempfile
import time
import xml.etree.ElementTree as ET

import numpy as np
import pytest

BUILD = os.environ.get("VEER_BUILD_DIR", "build")
SOURCE = os.environ.get("VEER_SOURCE_DIR", ".")
BIN = os.path.join(BUILD, "bin")
BUNDLE = os.path.join(SOURCE, "clients", "demo", "model", "parcel-arm.veer")
TASKS = ["reach_left", "reach_near", "reach_far", "keep_high", "keep_still", "avoid_chute",
         "slow_reach_near"]


class Veerd:
    """veerd on the demo model with ipc:// sockets and HTTP on an ephemeral 127.0.0.1 port;
    stopped by its pid."""

    def __init__(self):
        self.dir = tempfile.mkdtemp(prefix="vdm")  # short: ipc paths are limited
        self.act, self.admin = f"ipc://{self.dir}/act", f"ipc://{self.dir}/admin"
        self.log_path = os.path.join(self.dir, "veerd.log")
        self.log = open(self.log_path, "w")
        self.proc = subprocess.Popen(
            [os.path.join(BIN, "veerd"), "--bundle", BUNDLE, "--state-dir",
             os.path.join(self.dir, "state"), "--act", self.act, "--admin", self.admin,
             "--events", f"ipc://{self.dir}/events", "--http", "127.0.0.1:0"],
            stdout=self.log, stderr=subprocess.STDOUT)
        self.http = None
        end = time.monotonic() + 20
        while time.monotonic() < end and self.proc.poll() is None:
            m = re.search(r"on port (\d+)", open(self.log_path).read())
            if m and "ready:" in open(self.log_path).read():
                self.http = f"127.0.0.1:{m.group(1)}"
                break
            time.sleep(0.05)
        assert self.http, "veerd did not become ready:\n" + open(self.log_path).read()

    def stop(self):
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
            self.proc.wait(15)
        self.log.close()
        shutil.rmtree(self.dir, ignore_errors=True)


@pytest.fixture
def veerd():
    v = Veerd()
    yield v
    v.stop()


def test_demo_runs_to_the_end_through_veerd(veerd, tmp_path):
    from veer.client import Client

    svg = tmp_path / "report.svg"
    r = subprocess.run(
        [os.path.join(BIN, "veer-arm-demo"), "--bundle", BUNDLE, "--act", veerd.act, "--admin",
         veerd.admin, "--http", veerd.http, "--duration", "6", "--switch-every", "2",
         "--heavy-at", "3", "--svg", str(svg)],
        capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
    lines = [l for l in r.stdout.splitlines() if l.startswith("t=")]
    assert len(lines) == 6, r.stdout
    # Switches every 2 s in suite order: the task named in each second's replies.
    named = [re.match(r"t=\s*\d+s\s+(\S+)", l).group(1) for l in lines]
    assert named[0] == "reach_left" and named[-1] == "reach_far", named
    assert set(named) <= set(TASKS)
    assert "summary: 6000 of 6000 ticks" in r.stdout

    # veerd itself counted every act (local fallbacks after a missed deadline still reached it).
    with Client(admin=veerd.admin, timeout_s=5) as c:
        st = c.status()
    assert st.acts >= 5900, (st.acts, r.stdout)

    root = ET.parse(svg).getroot()
    assert root.tag.endswith("svg")
    texts = [t.text for t in root.iter() if t.tag.endswith("text")]
    for name in TASKS:
        assert name in texts, name
    polylines = [p for p in root.iter() if p.tag.endswith("polyline")]
    assert len(polylines) >= 3  # paths of the three tasks that ran, plus drift lines


def keep_high_reward(states):
    # tasks.h: keep_high = (y + 0.65) / 1.30 clamped to [0, 1], y the gripper height.
    return np.clip((states[:, 7] + 0.65) / 1.30, 0.0, 1.0)


def quick_fb_eval(tmp_path, decisions, *extra):
    """Cheap baselines (a tiny planner) for `decisions` steps, then veer-arm-fb-eval on the shipped
    bundle with `extra` flags; returns its completed process and the path of its JSON."""
    base = tmp_path / "baselines.json"
    r = subprocess.run(
        [os.path.join(BIN, "veer-arm-eval-baselines"), "--decisions", str(decisions),
         "--random-repeats", "1", "--population", "12", "--elites", "3", "--iterations", "1",
         "--horizon", "3", "--knot-every", "1", "--json", str(base), "--quiet"],
        capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    out = tmp_path / "fb.json"
    r = subprocess.run(
        [os.path.join(BIN, "veer-arm-fb-eval"), "--bundle", BUNDLE, "--baselines", str(base),
         "--json", str(out), *extra], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    return r, out


def test_fb_evaluation_numbers_come_from_the_served_policy(tmp_path):
    from veer.bundle import read_bundle
    from veer.client import Client

    r, out = quick_fb_eval(tmp_path, 5)
    assert "| keep_high |" in r.stdout and "**mean**" in r.stdout
    res = json.loads(out.read_text())
    row = next(t for t in res["tasks"] if t["task"] == "keep_high")
    probe = row["probe"]
    z_eval = np.array(probe["z"], dtype=np.float64)
    state = np.array(probe["state"], dtype=np.float32)
    action_eval = np.array(probe["action"], dtype=np.float64)

    b = read_bundle(BUNDLE)
    ref = b.arrays["reference.states"].astype(np.float64)
    rew = keep_high_reward(ref)
    bs = b.B(ref)
    z = ((rew - rew.mean())[:, None] * bs).mean(axis=0)
    z *= np.sqrt(b.model.z_dim) / np.linalg.norm(z)
    np.testing.assert_allclose(z_eval, z, rtol=1e-4, atol=1e-4 * np.sqrt(b.model.z_dim))

    actions, _values, _clipped = b.policy(state[None, :].astype(np.float64), z[None, :])
    np.testing.assert_allclose(action_eval, actions[0], atol=2e-3 * 12)

    # The same task through veerd: the served action for the probe state.
    v = Veerd()
    try:
        with Client(act=v.act, admin=v.admin, timeout_s=10) as c:
            c.put_samples("keep_high", ref.astype(np.float32), rew.astype(np.float32), center=True)
            c.switch("probe", "keep_high")
            got = c.act("probe", state, deadline_us=200000)
        assert not got.fallback, got.flag_names
        np.testing.assert_allclose(got.action, action_eval, atol=2e-3 * 12)
    finally:
        v.stop()


def test_bootstrap_spread_is_the_percentiles_of_its_resamples(tmp_path):
    """--bootstrap's medians and 10-90 % ranges against NumPy's percentile (linear interpolation,
    NumPy's default) of the per-resample scores it writes; the resamples are draws with
    replacement (Efron 1979), so with more than one they do not all give one score."""
    r, out = quick_fb_eval(tmp_path, 25, "--bootstrap", "5")
    assert "bootstrap resamples" in r.stdout
    res = json.loads(out.read_text())
    per_task = []
    for row in res["tasks"]:
        scores = np.array(row["bootstrap_scores"])
        assert scores.shape == (5,)
        p50, p10, p90 = np.percentile(scores, [50, 10, 90])
        assert row["bootstrap_score_median"] == pytest.approx(p50, abs=1e-9)
        assert row["bootstrap_score_p10"] == pytest.approx(p10, abs=1e-9)
        assert row["bootstrap_score_p90"] == pytest.approx(p90, abs=1e-9)
        per_task.append(scores)
    means = np.mean(per_task, axis=0)
    boot = res["bootstrap"]
    assert boot["resamples"] == 5
    p50, p10, p90 = np.percentile(means, [50, 10, 90])
    assert boot["mean_score_median"] == pytest.approx(p50, abs=1e-9)
    assert boot["mean_score_p10"] == pytest.approx(p10, abs=1e-9)
    assert boot["mean_score_p90"] == pytest.approx(p90, abs=1e-9)
    assert np.ptp(np.concatenate(per_task)) > 0.0


def test_bad_inputs_get_clear_refusals(tmp_path):
    """Each tool refuses a bad flag or file with a message naming it (common practice)."""
    r = subprocess.run([os.path.join(BIN, "veer-arm-demo"), "--bundle", BUNDLE, "--act",
                        "ipc:///nonexistent/act", "--admin", "ipc:///nonexistent/admin",
                        "--duration", "0"], capture_output=True, text=True, timeout=30)
    assert r.returncode == 2 and "--duration" in r.stderr
    r = subprocess.run([os.path.join(BIN, "veer-arm-demo"), "--act", "x", "--admin", "y"],
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 2 and "--bundle" in r.stderr

    other = tmp_path / "other.json"
    other.write_text(json.dumps({"decisions": 5, "query_ms": 20, "parcel_mass_kg": 0.5,
                                 "starts": [[0.0, 0.0, 0.0, 0.0]] * 5, "tasks": []}))
    r = subprocess.run([os.path.join(BIN, "veer-arm-fb-eval"), "--bundle", BUNDLE,
                        "--baselines", str(other)], capture_output=True, text=True, timeout=30)
    assert r.returncode == 1 and "starts[0][0]" in r.stderr
    shipped = os.path.join(SOURCE, "clients", "demo", "model", "baselines.json")
    r = subprocess.run([os.path.join(BIN, "veer-arm-fb-eval"), "--bundle", str(other),
                        "--baselines", shipped], capture_output=True, text=True, timeout=30)
    assert r.returncode == 1 and "VEER_" in r.stderr and str(other) in r.stderr
    r = subprocess.run([os.path.join(BIN, "veer-arm-fb-eval"), "--bundle", BUNDLE,
                        "--baselines", str(other), "--query-ms", "50"],
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 2 and "--query-ms" in r.stderr
    for bad in ("-1", "201", "abc", ""):
        r = subprocess.run([os.path.join(BIN, "veer-arm-fb-eval"), "--bundle", BUNDLE,
                            "--baselines", shipped, "--bootstrap", bad],
                           capture_output=True, text=True, timeout=30)
        assert r.returncode == 2 and "--bootstrap" in r.stderr, (bad, r.stderr)
