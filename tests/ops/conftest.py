"""Fixtures for the operators' view tests: a random-weight bundle from the exporter's helpers
(clients/python/veer/synth.py), and a real veerd on 127.0.0.1 with its HTTP endpoint on a free
port and a fresh state directory, stopped by process id at the end. The process handling is
veerd's own test harness (tests/service/harness.py), used read-only."""
import os
import sys

import numpy as np
import pytest

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "service"))

import harness  # noqa: E402


@pytest.fixture(scope="session")
def lib():
    sys.path.insert(0, os.path.join(HERE, "..", "reference"))
    import veerlib
    return veerlib.load_library()


class BundleFile:
    def __init__(self, path, states, data):
        self.path, self.states, self.data = path, states, data


@pytest.fixture(scope="session")
def continuous_bundle(tmp_path_factory):
    from veer import bundle as vb
    from veer import synth
    m, _, states = synth.build_random(synth.preset_layout("continuous"), rng_key=21, n_states=600)
    data = vb.pack_bundle(m)
    path = tmp_path_factory.mktemp("bundles") / "continuous.veer"
    vb.write_file_atomic(str(path), data)
    return BundleFile(path, np.asarray(states, np.float32), data)


class Service:
    def __init__(self, d, c, http_port):
        self.d, self.c, self.http_port = d, c, http_port
        self.url = f"http://127.0.0.1:{http_port}"


@pytest.fixture
def start(tmp_path):
    """start(bundle, extra=()) -> Service with veerd serving HTTP on 127.0.0.1."""
    started = []

    def _start(b, extra=()):
        eps = harness.endpoints("tcp", tmp_path)
        port = harness.free_port()
        d = harness.Veerd(b.path, tmp_path / f"state{len(started)}", eps,
                          ("--http", f"127.0.0.1:{port}", *extra))
        c = harness.Client(eps)
        started.append((d, c))
        return Service(d, c, port)

    yield _start
    for d, c in started:
        c.close()
        if d.proc.poll() is None:
            rc = d.stop()
            assert rc == 0, f"veerd did not stop cleanly ({rc}):\n{d.log()}"
