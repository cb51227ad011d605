"""`veer inspect` against the Python reader (clients/python/veer/bundle.py), which decodes the
file with Google's protobuf runtime: a second, independent decoder of the same bytes.

--json must give every key of `python3 -m veer.bundle show --json` with the same values;
the text output must name the features, the layer shapes and the bounds; a bad bundle must
exit 3 naming the error code and the field; the shipped example must be what its script makes.
"""
import importlib.util
import json
import os
import re
import subprocess

import numpy as np
import pytest

import broken
from veer import bundle as vb
from veer import synth


def veer_cli(build_dir, *args):
    return subprocess.run([os.path.join(build_dir, "bin", "veer"), "inspect", *args],
                          capture_output=True, text=True, timeout=60)


def same(c, p, where="$"):
    """Deep comparison; floats within float32 rounding (both sides widen a float32)."""
    if isinstance(p, dict):
        for k in p:
            assert k in c, f"{where}.{k} missing from veer inspect --json"
            same(c[k], p[k], f"{where}.{k}")
    elif isinstance(p, list):
        assert len(c) == len(p), f"{where}: {len(c)} items, reader has {len(p)}"
        for i, (x, y) in enumerate(zip(c, p)):
            same(x, y, f"{where}[{i}]")
    elif isinstance(p, float):
        assert c == pytest.approx(p, rel=1e-6, abs=1e-12), where
    else:
        assert c == p, where


def bundles(tmp_path, source_dir):
    disc = synth.make_layout(kind="discrete", state_dim=7, z_dim=12, action_count=5,
                             merge="bilinear", bilinear_k=6, embed_action=True,
                             model_version="inspect-discrete")
    emb = synth.make_layout(kind="discrete", state_dim=9, z_dim=10, action_count=3,
                            b_features=[0, 2, 7, 8], embed_state=[7, 8], state_counts=[3, 4],
                            layer_norm=True, model_version="inspect-embedding")
    out = [os.path.join(source_dir, "examples", "parcel-arm-untrained.veer")]
    for i, (lay, kw) in enumerate([(disc, {}),
                                   (emb, dict(embed_state=[7, 8], state_counts=[3, 4]))]):
        m, _, _ = synth.build_random(lay, rng_key=30 + i, n_states=300, **kw)
        path = tmp_path / f"b{i}.veer"
        path.write_bytes(vb.pack_bundle(m))
        out.append(str(path))
    return out


def test_json_matches_reader(lib, build_dir, source_dir, tmp_path):
    for path in bundles(tmp_path, source_dir):
        r = veer_cli(build_dir, path, "--json")
        assert r.returncode == 0, r.stderr
        got = json.loads(r.stdout)
        want = vb.summary(vb.read_bundle(path))
        same(got, want)
        assert got["memory_bytes"] > 4 * want["parameters"]


def test_text_names_what_matters(lib, build_dir, source_dir, tmp_path):
    for path in bundles(tmp_path, source_dir):
        b = vb.read_bundle(path)
        r = veer_cli(build_dir, path)
        assert r.returncode == 0, r.stderr
        for name in b.model.feature_names:
            assert name in r.stdout
        for L in b.model.forward.branches[0].layers:
            assert f"{vb.LAYER_NAMES[L.kind]}({L.in_dim}->{L.out_dim})" in r.stdout
        # One line per feature: "*" when B reads it, the index, the name, the training mean.
        mean = b.arrays["stats.mean"]
        for i, name in enumerate(b.model.feature_names):
            hit = re.search(rf"^ +([* ]) +{i} +{re.escape(name)} +(\S+)", r.stdout, re.M)
            assert hit, f"feature {i} {name} not listed"
            assert (hit.group(1) == "*") == (i in b.b_features())
            assert float(hit.group(2)) == pytest.approx(mean[i], rel=1e-3, abs=1e-6)
        if b.action.kind == "continuous":
            assert f"[{b.action.low[0]:g}, {b.action.high[0]:g}]" in r.stdout
        assert b.model.provenance.created in r.stdout


@pytest.mark.parametrize("name", ["bad_magic", "flipped_payload_byte", "nan_weight",
                                  "low_above_high", "reference_states_shape"])
def test_bad_bundle_exits_3(lib, build_dir, tmp_path, name):
    entry = next(b for b in broken.catalogue() if b.name == name)
    path = tmp_path / f"{name}.veer"
    path.write_bytes(entry.data)
    r = veer_cli(build_dir, str(path))
    assert r.returncode == 3 and r.stdout == ""
    assert f"VEER_{entry.code}" in r.stderr and entry.field in r.stderr
    r = veer_cli(build_dir, str(path), "--json")
    assert r.returncode == 3
    err = json.loads(r.stdout)["error"]
    assert err["name"] == f"VEER_{entry.code}" and err["field"].startswith(entry.field)


def test_usage_errors(build_dir):
    assert veer_cli(build_dir).returncode == 2
    assert veer_cli(build_dir, "a.veer", "--frobnicate").returncode == 2
    assert veer_cli(build_dir, "--help").returncode == 0


def test_shipped_example_is_what_its_script_makes(source_dir, tmp_path):
    """The committed example files equal a fresh run of examples/make_parcel_arm_example.py,
    and the reward file is the reward the script documents, recomputed here."""
    script = os.path.join(source_dir, "examples", "make_parcel_arm_example.py")
    spec = importlib.util.spec_from_file_location("make_example", script)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    mod.HERE = str(tmp_path)
    mod.main()
    for name in (mod.BUNDLE, mod.SAMPLES, mod.REWARDS):
        with open(os.path.join(source_dir, "examples", name), "rb") as f:
            assert f.read() == (tmp_path / name).read_bytes(), f"examples/{name} is stale"
    assert os.path.getsize(os.path.join(source_dir, "examples", mod.BUNDLE)) < 1 << 20
    s = np.loadtxt(os.path.join(source_dir, "examples", mod.SAMPLES), delimiter=",")
    r = np.loadtxt(os.path.join(source_dir, "examples", mod.REWARDS))
    want = -np.sqrt(((s[:, 3:6] - [0.60, -0.40, 0.30]) ** 2).sum(axis=1)) - 0.5 * (1 - s[:, 9])
    np.testing.assert_allclose(r, want, atol=2e-5)
    b = vb.read_bundle(os.path.join(source_dir, "examples", mod.BUNDLE))
    assert "UNTRAINED" in b.model.provenance.notes and b.action.kind == "continuous"
