"""The veer CLI without a veerd: usage errors (exit 2), bad input files (exit 3, caught before
any connection), an unreachable service (exit 4), and `veer keygen` (keys checked with pyzmq's
own Z85 and CURVE code, an implementation independent of ours). Exit codes as documented in
clients/c/cli/cli.h."""
import json
import os
import stat
import subprocess

import numpy as np
import pytest
import zmq
import zmq.utils.z85 as z85

from conftest import VEER, free_port

USAGE, INPUT, UNREACHABLE = 2, 3, 4


def veer(*args, env=None):
    e = dict(os.environ)
    # Point at a port where nothing listens, so a command that wrongly connects fails as 4.
    e["VEER_ADMIN"] = e["VEER_ACT"] = f"tcp://127.0.0.1:{free_port()}"
    e.update(env or {})
    return subprocess.run([VEER, *args], capture_output=True, text=True, env=e, timeout=60)


@pytest.mark.parametrize("args", [
    [],
    ["task"],
    ["task", "frobnicate"],
    ["task", "put"],
    ["task", "put", "t", "--goal", "1,2", "--reference-rewards", "r.csv"],
    ["task", "put", "t", "--samples", "s.csv"],
    ["task", "put", "t", "--weights", "1"],
    ["task", "put", "t", "--goal", "1,2", "--center", "maybe"],
    ["task", "put", "t", "--goal", "1,2", "--ridge", "-1"],
    ["task", "put", "t", "--goal", "1,2", "--goal", "1,2,3"],
    ["task", "put", "t", "--goal", "1,2", "--weights", "1,2"],
    ["task", "put", "t", "--goal", "1,nan"],
    ["task", "put", "t", "--goal", "1,2", "--cov-correction"],
    ["task", "put", "t", "--samples", "s.txt", "--rewards", "r.txt"],
    ["task", "show"],
    ["task", "drop", "a", "b"],
    ["switch", "arm"],
    ["switch", "arm", "t", "--bogus"],
    ["channels", "extra"],
    ["status", "--timeout-ms", "0"],
    ["status", "--admin"],
    ["act", "arm"],
    ["act", "arm", "1,abc"],
    ["act", "arm", "1,2", "--deadline-us", "0"],
    ["keygen"],
])
def test_usage_errors_exit_2(args):
    r = veer(*args)
    assert r.returncode == USAGE, (args, r.stdout, r.stderr)
    assert r.stderr.strip(), "a usage error must say what is wrong"


def test_usage_error_as_json_names_the_flag():
    r = veer("task", "put", "t", "--goal", "1,2", "--center", "maybe", "--json")
    assert r.returncode == USAGE
    doc = json.loads(r.stdout)
    assert doc["error"]["kind"] == "usage"
    assert doc["error"]["field"] == "--center"
    assert doc["error"]["exit"] == USAGE


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return str(p)


@pytest.mark.parametrize("states,rewards,needle", [
    ("0,1\n2,nan\n", "1\n2\n", "line 2, column 2: NaN"),
    ("0,1\n2,inf\n", "1\n2\n", "line 2, column 2: infinite"),
    ("0,1\n2,3,4\n", "1\n2\n", "line 2 has 3 values"),
    ("0,1\n2,x\n", "1\n2\n", "line 2, column 2: not a number"),
    ("0,1\n2,3\n", "1\n2\n3\n", "3 rewards but"),
    ("0,1\n2,3\n", "1,2\n3,4\n", "one reward per row"),
    ("# only a comment\n", "1\n", "no rows"),
    ("0,1\n2,3\n", "1\n-1e39\n", "infinite"),  # beyond float32: refused, not turned into inf
])
def test_bad_csv_files_exit_3_with_line_and_column(tmp_path, states, rewards, needle):
    s = write(tmp_path, "s.csv", states)
    rw = write(tmp_path, "r.csv", rewards)
    r = veer("task", "put", "t", "--samples", s, "--rewards", rw)
    assert r.returncode == INPUT, (r.stdout, r.stderr)
    assert needle in r.stderr


def test_csv_header_line_is_allowed_but_only_first(tmp_path):
    # A header of feature names on line 1 is skipped; the command then gets as far as trying
    # to reach veerd (4), which proves the file itself was accepted.
    s = write(tmp_path, "s.csv", "x,y\n0,1\n2,3\n")
    rw = write(tmp_path, "r.csv", "reward\n1\n2\n")
    assert veer("task", "put", "t", "--samples", s, "--rewards", rw,
                "--timeout-ms", "200").returncode == UNREACHABLE
    s2 = write(tmp_path, "s2.csv", "0,1\nx,y\n")
    assert veer("task", "put", "t", "--samples", s2, "--rewards", rw).returncode == INPUT


def test_bad_npy_files_exit_3(tmp_path):
    good_r = str(tmp_path / "r.npy")
    np.save(good_r, np.array([1.0, 2.0], np.float32))
    nan_s = str(tmp_path / "nan.npy")
    np.save(nan_s, np.array([[0, 1], [np.nan, 2]], np.float32))
    r = veer("task", "put", "t", "--samples", nan_s, "--rewards", good_r)
    assert r.returncode == INPUT and "row 2, column 1: NaN" in r.stderr, r.stderr
    int_s = str(tmp_path / "int.npy")
    np.save(int_s, np.array([[0, 1], [2, 3]], np.int64))
    r = veer("task", "put", "t", "--samples", int_s, "--rewards", good_r)
    assert r.returncode == INPUT and "float32 or float64" in r.stderr, r.stderr
    cube = str(tmp_path / "cube.npy")
    np.save(cube, np.zeros((2, 2, 2), np.float32))
    assert veer("task", "put", "t", "--samples", cube, "--rewards", good_r).returncode == INPUT
    junk = write(tmp_path, "junk.npy", "not an npy file")
    assert veer("task", "put", "t", "--samples", junk, "--rewards", good_r).returncode == INPUT
    missing = str(tmp_path / "missing.csv")
    r = veer("task", "put", "t", "--samples", missing, "--rewards", good_r)
    assert r.returncode == INPUT and "missing.csv" in r.stderr


@pytest.mark.parametrize("args", [
    ["status"], ["channels"], ["task", "list"], ["task", "show", "t"], ["task", "drop", "t"],
    ["switch", "arm", "t"], ["act", "arm", "1,2,3"], ["task", "put", "t", "--goal", "1,2"],
])
def test_unreachable_service_exits_4(args):
    r = veer(*args, "--timeout-ms", "300", "--json")
    assert r.returncode == UNREACHABLE, (args, r.stdout, r.stderr)
    doc = json.loads(r.stdout)
    assert doc["error"]["name"] == "VEER_ETIMEDOUT"
    assert doc["error"]["exit"] == UNREACHABLE


def test_env_and_flag_endpoints(tmp_path):
    # --admin wins over VEER_ADMIN: a malformed flag value is a usage error even though the
    # environment's endpoint is well-formed, and the error names the endpoint.
    r = veer("status", "--admin", "nonsense://x")
    assert r.returncode == USAGE and "nonsense://x" in r.stderr
    r = veer("status", env={"VEER_ADMIN": "nonsense://y"})
    assert r.returncode == USAGE and "nonsense://y" in r.stderr


def test_keygen_writes_a_curve_pair_zmq_accepts(tmp_path):
    prefix = str(tmp_path / "supervisor")
    r = veer("keygen", prefix, "--json")
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    pub = open(prefix + ".pub").read().strip()
    sec = open(prefix + ".secret").read().strip()
    assert doc["public_key"] == pub
    assert stat.S_IMODE(os.stat(prefix + ".secret").st_mode) == 0o600
    # pyzmq's Z85 decoder (RFC 32) and its CURVE key derivation: the public key must be the
    # one that belongs to the secret key.
    assert len(z85.decode(pub.encode())) == 32
    assert len(z85.decode(sec.encode())) == 32
    assert zmq.curve_public(sec.encode()) == pub.encode()

    # Never overwritten by accident; --force replaces both with a fresh pair.
    assert veer("keygen", prefix).returncode == INPUT
    assert open(prefix + ".pub").read().strip() == pub
    assert veer("keygen", prefix, "--force").returncode == 0
    pub2 = open(prefix + ".pub").read().strip()
    assert pub2 != pub
    assert stat.S_IMODE(os.stat(prefix + ".secret").st_mode) == 0o600
    assert veer("keygen", str(tmp_path / "no" / "such" / "dir")).returncode == INPUT


def test_server_key_needs_client_keys(tmp_path):
    prefix = str(tmp_path / "server")
    assert veer("keygen", prefix).returncode == 0
    r = veer("status", "--server-key", prefix + ".pub")
    assert r.returncode == USAGE and "--key" in r.stderr
    bad = write(tmp_path, "bad.pub", "short\n")
    r = veer("status", "--server-key", bad, "--key", prefix)
    assert r.returncode == INPUT and "40-character" in r.stderr
