"""Fixtures for veerd's integration tests: random-weight model bundles written by the exporter's
helpers (clients/python/veer), libveer through ctypes as the in-process reference, and a running
veerd on 127.0.0.1 or ipc:// with a fresh state directory."""
import os

import numpy as np
import pytest

import harness


@pytest.fixture(scope="session")
def lib():
    import veerlib
    return veerlib.load_library()


class BundleFile:
    def __init__(self, path, states, data):
        self.path, self.states, self.data = path, states, data


@pytest.fixture(scope="session", params=["continuous", "small"])
def bundle(request, tmp_path_factory):
    """A continuous-action and a discrete-action bundle with random weights, and the training
    states the exporter drew for them (live-looking states for tasks and acts)."""
    from veer import bundle as vb
    from veer import synth
    m, _, states = synth.build_random(synth.preset_layout(request.param), rng_key=11, n_states=600)
    data = vb.pack_bundle(m)
    path = tmp_path_factory.mktemp("bundles") / f"{request.param}.veer"
    vb.write_file_atomic(str(path), data)
    return BundleFile(path, np.asarray(states, np.float32), data)


@pytest.fixture(scope="session")
def continuous_bundle(tmp_path_factory):
    from veer import bundle as vb
    from veer import synth
    m, _, states = synth.build_random(synth.preset_layout("continuous"), rng_key=12, n_states=600)
    data = vb.pack_bundle(m)
    path = tmp_path_factory.mktemp("bundles") / "continuous.veer"
    vb.write_file_atomic(str(path), data)
    return BundleFile(path, np.asarray(states, np.float32), data)


@pytest.fixture
def start(tmp_path):
    """start(bundle, kind="tcp", extra=()) -> (Veerd, Client); everything stops at the end."""
    started = []

    def _start(b, kind="tcp", extra=(), state_dir=None, eps=None, curve=None, act_curve=None):
        eps = eps or harness.endpoints(kind, tmp_path)
        sd = state_dir or (tmp_path / f"state{len(started)}")
        d = harness.Veerd(b.path, sd, eps, extra)
        c = harness.Client(eps, curve=curve, act_curve=act_curve)
        started.append((d, c))
        return d, c

    yield _start
    for d, c in started:
        c.close()
        if d.proc.poll() is None:
            rc = d.stop()
            assert rc == 0, f"veerd did not stop cleanly ({rc}):\n{d.log()}"
