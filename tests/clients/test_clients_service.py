"""The veer CLI and the Python client against a real veerd (started by the fixture on ipc://,
or 127.0.0.1 for the discrete model): what the CLI prints with --json equals what the Python
client sees over its own socket, task vectors equal the published encoding formulas computed in
NumPy, and `veer act` returns the policy of the exporter's independent NumPy forward pass
(clients/python/veer/reference.py) for the task vector veerd reports.

References: z = (1/n) sum r_i B(s_i) and z = sum w_k B(g_k), rescaled to norm sqrt(d)
(DESIGN.md "The maths", the published forward-backward method); a = clip(actor(s, z)) and
a = argmax_a F(s, a, z).z (same). Tolerances: float32 networks evaluated against float64 NumPy,
rtol 1e-4 / atol 1e-5 (common practice, no source)."""
import json
import subprocess

import numpy as np
import pytest

from conftest import VEER
from veer.bundle import read_bundle
from veer.client import Client, VeerError, FALLBACK

REFUSED, USAGE, INPUT = 1, 2, 3


def run(veerd, *args):
    return subprocess.run([VEER, *args], capture_output=True, text=True, env=veerd.env(),
                          timeout=60)


def cli_json(veerd, *args, code=0):
    r = run(veerd, *args, "--json")
    assert r.returncode == code, (args, r.returncode, r.stdout, r.stderr)
    return json.loads(r.stdout)


def fmt(v):
    return ",".join(repr(float(x)) for x in v)


def rescaled(z, d):
    return z * (np.sqrt(d) / np.linalg.norm(z))


@pytest.fixture
def ctx(veerd, bundles):
    b = read_bundle(bundles["continuous"])
    c = Client(act=veerd.act, admin=veerd.admin)
    yield veerd, b, c
    c.close()


def test_describe_matches_the_bundle(ctx):
    veerd, b, c = ctx
    m = c.model
    assert m.state_dim == b.model.state_dim and m.z_dim == b.model.z_dim
    assert m.model_version == b.model.model_version
    assert m.digest == b.digest
    np.testing.assert_array_equal(m.fallback_action, np.float32(b.model.fallback_action))
    np.testing.assert_array_equal(m.action_low, np.float32(b.model.action.low))
    np.testing.assert_array_equal(m.action_high, np.float32(b.model.action.high))


def test_goal_task_cli_python_numpy_agree(ctx):
    veerd, b, c = ctx
    rng = np.random.default_rng(11)
    goals = rng.normal(size=(2, b.model.state_dim)).astype(np.float32)
    w = np.array([0.7, 0.3], np.float32)
    t = cli_json(veerd, "task", "put", "to_bin", "--goal", fmt(goals[0]), "--goal",
                 fmt(goals[1]), "--weights", fmt(w), "--rescale", "on")
    assert t["name"] == "to_bin" and t["source"] == "goals" and t["count"] == 2
    z_ref = rescaled((w[:, None] * b.B(goals.astype(np.float64))).sum(0), b.model.z_dim)
    np.testing.assert_allclose(t["z"], z_ref, rtol=1e-4, atol=1e-5)
    py = c.get_task("to_bin")
    assert py.digest.hex() == t["digest"]
    np.testing.assert_array_equal(py.z, np.float32(t["z"]))
    shown = cli_json(veerd, "task", "show", "to_bin")
    assert shown == t or (shown["z"] == t["z"] and shown["digest"] == t["digest"])


def test_sample_task_from_csv_and_npy_equals_python_and_numpy(ctx, tmp_path):
    veerd, b, c = ctx
    rng = np.random.default_rng(12)
    s = rng.normal(size=(40, b.model.state_dim)).astype(np.float32)
    r = rng.uniform(-1, 1, size=40).astype(np.float32)
    np.savetxt(tmp_path / "s.csv", s, delimiter=",", fmt="%.9g")
    np.savetxt(tmp_path / "r.csv", r, fmt="%.9g")
    np.save(tmp_path / "s.npy", s)
    np.save(tmp_path / "r.npy", r.astype(np.float64))
    opts = ("--center", "off", "--rescale", "off")
    t_csv = cli_json(veerd, "task", "put", "pick_csv", "--samples", str(tmp_path / "s.csv"),
                     "--rewards", str(tmp_path / "r.csv"), *opts)
    t_npy = cli_json(veerd, "task", "put", "pick_npy", "--samples", str(tmp_path / "s.npy"),
                     "--rewards", str(tmp_path / "r.npy"), *opts)
    t_py = c.put_samples("pick_py", s, r, center=False, rescale=False)
    # %.9g round-trips float32 exactly, so all three carry the same numbers and the same spec.
    assert t_csv["digest"] == t_npy["digest"] == t_py.digest.hex()
    z_ref = (r[:, None].astype(np.float64) * b.B(s.astype(np.float64))).mean(0)
    np.testing.assert_allclose(t_csv["z"], z_ref, rtol=1e-4, atol=1e-5)
    np.testing.assert_array_equal(np.float32(t_npy["z"]), t_py.z)
    assert t_csv["count"] == 40 and t_csv["source"] == "samples"

    listed = cli_json(veerd, "task", "list")["tasks"]
    py_list = {t.name: t for t in c.list_tasks()}
    assert sorted(x["name"] for x in listed) == sorted(py_list)
    for x in listed:
        assert x["digest"] == py_list[x["name"]].digest.hex()
        np.testing.assert_array_equal(np.float32(x["z"]), py_list[x["name"]].z)


def test_switch_act_channels_status_and_drop(ctx):
    veerd, b, c = ctx
    rng = np.random.default_rng(13)
    g = rng.normal(size=b.model.state_dim).astype(np.float32)
    cli_json(veerd, "task", "put", "reach", "--goal", fmt(g))
    ch = cli_json(veerd, "switch", "arm", "reach")
    assert ch["name"] == "arm" and ch["task"] == "reach"

    state = rng.normal(size=b.model.state_dim).astype(np.float32)
    # A channel nobody switched answers with the fallback action and says why (veerd's rule).
    none = cli_json(veerd, "act", "conveyor", fmt(state))
    assert set(none["flags"]) == {"fallback", "no_task"}, none
    np.testing.assert_array_equal(np.float32(none["action"]), c.model.fallback_action)
    a = cli_json(veerd, "act", "arm", fmt(state))
    assert not (a["flag_bits"] & FALLBACK), a
    assert a["task"] == "reach" and a["epoch"] == ch["epoch"]
    z = c.get_task("reach").z.astype(np.float64)
    act_ref, q_ref, _ = b.policy(state[None].astype(np.float64), z[None])
    np.testing.assert_allclose(a["action"], act_ref[0], rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(a["value"], q_ref[0], rtol=1e-4, atol=1e-4)
    py = c.act("arm", state, deadline_us=200000)
    np.testing.assert_array_equal(py.action, np.float32(a["action"]))
    assert py.epoch == a["epoch"] and not py.fallback

    chans = cli_json(veerd, "channels")["channels"]
    py_chans = {x.name: x for x in c.channels()}
    assert [x["name"] for x in chans] == ["arm"] and set(py_chans) == {"arm"}
    assert chans[0]["task"] == py_chans["arm"].task == "reach"
    assert chans[0]["epoch"] == py_chans["arm"].epoch
    st = cli_json(veerd, "status")
    py_st = c.status()
    assert st["ready"] and st["tasks"] == py_st.tasks == 1 and st["channels"] == 1
    assert st["model_version"] == b.model.model_version

    # An active task cannot be dropped; the error names the code and the task.
    err = cli_json(veerd, "task", "drop", "reach", code=REFUSED)["error"]
    assert err["name"] == "VEER_ETASKACTIVE", err
    with pytest.raises(VeerError) as e:
        c.drop_task("reach")
    assert e.value.name == "VEER_ETASKACTIVE"
    assert c.get_task("reach").name == "reach"  # nothing changed
    cli_json(veerd, "task", "put", "park", "--goal", fmt(np.zeros_like(g) + 0.1))
    ch2 = cli_json(veerd, "switch", "arm", "park")
    assert ch2["epoch"] > ch["epoch"]
    assert cli_json(veerd, "task", "drop", "reach") == {"dropped": "reach"}
    err = cli_json(veerd, "task", "show", "reach", code=REFUSED)["error"]
    assert err["name"] == "VEER_ENOTASK"


def test_refusals_name_code_and_field(ctx, tmp_path):
    veerd, b, c = ctx
    d = b.model.state_dim
    # A goal of the wrong length: veerd's VEER_EDIM, refused (1).
    r = run(veerd, "task", "put", "short", "--goal", fmt(np.zeros(d - 1)), "--json")
    assert r.returncode == REFUSED, r.stderr
    err = json.loads(r.stdout)["error"]
    assert err["name"] == "VEER_EDIM" and err["field"], err
    assert "VEER_EDIM" in r.stderr
    # A sample file with the wrong number of columns: the file is at fault, so exit 3, with
    # veerd's own code in the message.
    np.savetxt(tmp_path / "s.csv", np.ones((5, d + 2)), delimiter=",")
    np.savetxt(tmp_path / "r.csv", np.arange(5.0))
    r = run(veerd, "task", "put", "wide", "--samples", str(tmp_path / "s.csv"), "--rewards",
            str(tmp_path / "r.csv"), "--json")
    assert r.returncode == INPUT and json.loads(r.stdout)["error"]["name"] == "VEER_EDIM"
    # All-zero rewards carry no signal.
    np.savetxt(tmp_path / "s2.csv", np.ones((5, d)), delimiter=",")
    np.savetxt(tmp_path / "z.csv", np.zeros(5))
    r = run(veerd, "task", "put", "flat", "--samples", str(tmp_path / "s2.csv"), "--rewards",
            str(tmp_path / "z.csv"), "--json")
    assert r.returncode == REFUSED and json.loads(r.stdout)["error"]["name"] == "VEER_ENOSIGNAL"
    # The same name with different content.
    cli_json(veerd, "task", "put", "home", "--goal", fmt(np.zeros(d) + 0.5))
    err = cli_json(veerd, "task", "put", "home", "--goal", fmt(np.zeros(d) - 0.5),
                   code=REFUSED)["error"]
    assert err["name"] == "VEER_ENAMECONFLICT", err
    # Unknown task on switch; a state of the wrong length on act (checked locally: usage).
    err = cli_json(veerd, "switch", "arm", "nowhere", code=REFUSED)["error"]
    assert err["name"] == "VEER_ENOTASK", err
    r = run(veerd, "act", "arm", fmt(np.zeros(d + 1)))
    assert r.returncode == USAGE and f"reads {d}" in r.stderr
    # The Python client passes veerd's refusals through with code and field; a NaN reward is
    # judged by veerd (the client sends what it is given), a bad state locally before sending.
    rw = np.ones(5, np.float32)
    rw[3] = np.nan
    with pytest.raises(VeerError) as e:
        c.put_samples("nan", np.ones((5, d), np.float32), rw)
    assert e.value.name == "VEER_ENONFINITE" and "rewards" in e.value.field, e.value
    with pytest.raises(VeerError) as e:
        c.act("arm", np.zeros(d + 1))
    assert e.value.name == "VEER_EDIM" and e.value.field == "state"
    with pytest.raises(VeerError) as e:
        c.switch("arm", "nowhere")
    assert e.value.name == "VEER_ENOTASK"
    # None of that changed what was stored.
    assert [t.name for t in c.list_tasks()] == ["home"]


def test_discrete_model_over_tcp(veerd_discrete_tcp, bundles):
    veerd = veerd_discrete_tcp
    b = read_bundle(bundles["small"])
    rng = np.random.default_rng(14)
    d = b.model.state_dim
    cli_json(veerd, "task", "put", "sort", "--goal", fmt(rng.normal(size=d)))
    cli_json(veerd, "switch", "belt", "sort")
    with Client(act=veerd.act, admin=veerd.admin) as c:
        z = c.get_task("sort").z.astype(np.float64)
        for _ in range(5):
            s = rng.normal(size=d).astype(np.float32)
            a = cli_json(veerd, "act", "belt", fmt(s))
            idx, q, q_all = b.policy(s[None].astype(np.float64), z[None])
            # Near-ties between two actions can flip under float32; accept either then.
            best = np.sort(q_all[0])[-2:]
            if best[1] - best[0] > 1e-4 * max(1.0, abs(best[1])):
                assert a["action"] == [float(idx[0])], (a, idx)
            np.testing.assert_allclose(a["value"], q_all[0][int(a["action"][0])], rtol=1e-4,
                                       atol=1e-4)
            py = c.act("belt", s, deadline_us=200000)
            assert py.action.tolist() == a["action"]


def test_curve_keys_from_keygen(bundles, tmp_path):
    """Keys written by `veer keygen` work end to end with veerd's CURVE admin socket: the
    allowed supervisor can switch, an unknown key cannot (no answer: the handshake fails, exit
    4) and nothing changes."""
    from conftest import Veerd, need_veerd
    need_veerd()
    server, good, bad = (str(tmp_path / n) for n in ("server", "good", "bad"))
    for p in (server, good, bad):
        assert subprocess.run([VEER, "keygen", p]).returncode == 0
    allowed = tmp_path / "allowed"
    allowed.write_text("# supervisors allowed to switch the arm\n" + open(good + ".pub").read())
    d = Veerd(bundles["continuous"], transport="tcp",
              extra=("--server-key", server + ".secret", "--allowed-keys", str(allowed)),
              ready_keys=dict(server_key=open(server + ".pub").read().strip(),
                              public_key=open(good + ".pub").read().strip(),
                              secret_key=open(good + ".secret").read().strip()))
    try:
        def veer_as(prefix, *args):
            return subprocess.run([VEER, *args, "--server-key", server + ".pub", "--key", prefix,
                                   "--timeout-ms", "1500", "--json"], capture_output=True,
                                  text=True, env=d.env(), timeout=60)
        n = read_bundle(bundles["continuous"]).model.state_dim
        r = veer_as(good, "task", "put", "reach", "--goal", fmt(np.full(n, 0.1)))
        assert r.returncode == 0, r.stderr
        assert veer_as(good, "switch", "arm", "reach").returncode == 0
        r = veer_as(bad, "task", "put", "other", "--goal", fmt(np.full(n, 0.2)))
        assert r.returncode == 4, (r.stdout, r.stderr)
        r = subprocess.run([VEER, "status", "--timeout-ms", "1500"], env=d.env(),
                           capture_output=True, text=True)
        assert r.returncode == 4  # no key at all: no answer either
        listed = json.loads(veer_as(good, "task", "list").stdout)["tasks"]
        assert [t["name"] for t in listed] == ["reach"]
    finally:
        d.stop()


def test_reference_rewards_and_options_reach_veerd(ctx, tmp_path):
    """--reference-rewards: z = (1/m) sum r_j B_j over the bundle's stored reference embeddings
    (DESIGN.md "The maths"); and the encoding options on the command line reach veerd: each
    changes the stored specification (its digest) and the task vector."""
    veerd, b, c = ctx
    ref_b = b.arrays["reference.b"].astype(np.float64)
    m = ref_b.shape[0]
    rng = np.random.default_rng(15)
    r = rng.uniform(-1, 1, size=m)
    np.save(tmp_path / "ref.npy", r)
    t = cli_json(veerd, "task", "put", "ref", "--reference-rewards", str(tmp_path / "ref.npy"),
                 "--center", "off", "--rescale", "off")
    assert t["source"] == "reference" and t["count"] == m
    np.testing.assert_allclose(t["z"], (r[:, None] * ref_b).mean(0), rtol=1e-4, atol=1e-5)
    py = c.put_reference("ref_py", r, center=False, rescale=False)
    assert py.digest.hex() == t["digest"]
    # Centring subtracts the mean reward first: z = (1/m) sum (r_j - mean r) B_j.
    tc = cli_json(veerd, "task", "put", "ref_c", "--reference-rewards", str(tmp_path / "ref.npy"),
                  "--center", "on", "--rescale", "off")
    np.testing.assert_allclose(tc["z"], ((r - r.mean())[:, None] * ref_b).mean(0), rtol=1e-4,
                               atol=1e-5)
    # Wrong count for the reference set: veerd's VEER_EDIM, and the file is at fault (3).
    np.save(tmp_path / "short.npy", r[:-1])
    rr = run(veerd, "task", "put", "ref_short", "--reference-rewards", str(tmp_path / "short.npy"),
             "--json")
    assert rr.returncode == INPUT and json.loads(rr.stdout)["error"]["name"] == "VEER_EDIM"

    s = rng.normal(size=(60, b.model.state_dim)).astype(np.float32)
    w = rng.uniform(-1, 1, size=60).astype(np.float32)
    np.save(tmp_path / "s.npy", s)
    np.save(tmp_path / "w.npy", w)
    base = ("--samples", str(tmp_path / "s.npy"), "--rewards", str(tmp_path / "w.npy"))
    plain = cli_json(veerd, "task", "put", "plain", *base)
    corr = cli_json(veerd, "task", "put", "corr", *base, "--cov-correction")
    corr_r = cli_json(veerd, "task", "put", "corr_r", *base, "--cov-correction", "--ridge", "0.5")
    digests = {plain["digest"], corr["digest"], corr_r["digest"]}
    assert len(digests) == 3
    assert not np.allclose(plain["z"], corr["z"]) and not np.allclose(corr["z"], corr_r["z"])
    py = c.put_samples("corr_py", s, w, cov_correction=True, ridge=0.5)
    assert py.digest.hex() == corr_r["digest"]


def test_events_show_what_the_cli_changed(ctx):
    """The Python events subscriber sees the switch the CLI made: same channel, tasks, epoch."""
    from veer.client import Events
    veerd, b, c = ctx
    d = b.model.state_dim
    cli_json(veerd, "task", "put", "a", "--goal", fmt(np.full(d, 0.1)))
    cli_json(veerd, "task", "put", "b", "--goal", fmt(np.full(d, -0.1)))
    with Events(veerd.events, ["veer.switch"]) as ev:
        # A subscription takes a moment to reach the publisher: switch until one is seen.
        got, switches = None, []
        for i in range(50):
            switches.append(cli_json(veerd, "switch", "arm", "ab"[i % 2]))
            got = ev.recv(timeout_s=0.1)
            if got is not None:
                break
        assert got is not None, "no switch event within 50 switches"
        topic, e = got
        assert topic == "veer.switch" and e.WhichOneof("body") == "switched"
        mine = [s for s in switches if s["epoch"] == e.switched.epoch]
        assert len(mine) == 1, (e, switches)
        assert e.switched.channel == "arm" and e.switched.to_task == mine[0]["task"]
        # Every later switch arrives in order, each with the next epoch and a higher seq.
        k = switches.index(mine[0])
        nxt = cli_json(veerd, "switch", "arm", "a" if switches[-1]["task"] == "b" else "b")
        expected = switches[k + 1:] + [nxt]
        prev = e
        for want in expected:
            got = ev.recv(timeout_s=5.0)
            assert got is not None, f"missing the event for {want}"
            cur = got[1]
            assert cur.switched.epoch == want["epoch"] and cur.switched.to_task == want["task"]
            assert cur.switched.epoch == prev.switched.epoch + 1 and cur.seq > prev.seq
            prev = cur
