"""The catalogue of broken bundles (broken.py): libveer must refuse each one with the code
listed for it (include/veer/error.h) and name the field, through both veer_bundle_open_mem and
veer_bundle_open. The two good bundles the catalogue is made from must load: without that
control, a loader that refused everything would pass.
"""
import ctypes as C

import pytest

import broken
import veerlib
from veer import bundle as vb

CATALOGUE = broken.catalogue()


def open_mem(lib, data):
    h, err = C.c_void_p(), veerlib.VeerError()
    rc = lib.veer_bundle_open_mem(data, len(data), C.byref(h), C.byref(err))
    if h:
        lib.veer_bundle_close(h)
    return rc, h, err


def test_catalogue_is_large_and_varied():
    assert len(CATALOGUE) >= 12
    assert len({b.code for b in CATALOGUE}) >= 12


def test_good_bundles_load(lib):
    for m in broken.good_models():
        rc, _, err = open_mem(lib, vb.pack_bundle(m))
        assert rc == 0, f"{err.field.decode()}: {err.message.decode()}"


@pytest.mark.parametrize("entry", CATALOGUE, ids=[b.name for b in CATALOGUE])
def test_refused_with_code_and_field(lib, entry, tmp_path):
    rc, h, err = open_mem(lib, entry.data)
    got = lib.veer_errname(rc).decode() if rc else "0"
    assert rc == veerlib.CODES[entry.code], (
        f"{entry.name}: expected VEER_{entry.code}, got {got} "
        f"({err.field.decode()}: {err.message.decode()})")
    assert err.code == rc
    assert err.field.decode().startswith(entry.field), err.field.decode()
    assert err.message.decode().strip()
    # The same through a file.
    path = tmp_path / f"{entry.name}.veer"
    path.write_bytes(entry.data)
    h2, err2 = C.c_void_p(), veerlib.VeerError()
    rc2 = lib.veer_bundle_open(str(path).encode(), C.byref(h2), C.byref(err2))
    assert rc2 == rc and not h2 and err2.field == err.field


def test_missing_file(lib, tmp_path):
    h, err = C.c_void_p(), veerlib.VeerError()
    rc = lib.veer_bundle_open(str(tmp_path / "absent.veer").encode(), C.byref(h), C.byref(err))
    assert rc == veerlib.CODES["EIO"] and not h and err.field.decode()


FRAME_CODES = {"ENOTBUNDLE", "EVERSION", "ECHECKSUM", "EDECODE"}


@pytest.mark.parametrize("entry", CATALOGUE, ids=[b.name for b in CATALOGUE])
def test_python_reader_never_crashes(entry):
    """The Python reader checks only the frame: it refuses frame damage with the same code and
    field as libveer, and shows damaged content as it is (for a person to look at) without a
    traceback."""
    if entry.code in FRAME_CODES:
        with pytest.raises(vb.BundleFormatError) as e:
            vb.read_bundle(entry.data)
        assert (e.value.code, e.value.field) == ("VEER_" + entry.code, entry.field)
    else:
        s = vb.summary(vb.read_bundle(entry.data))
        assert s["format_version"] == 1


def test_mutated_payloads_never_crash(lib):
    """Random damage inside the payload, re-framed with a correct checksum so that the
    validator itself (not the checksum) must cope: every result is either a known error code
    with a field, or a bundle that loads and then acts with finite actions within its bounds.
    Bounded: 1500 mutants, a fixed generator, well under a minute."""
    import time
    import numpy as np
    rng = np.random.default_rng(5)
    known = set(veerlib.CODES.values())
    outcomes = {}
    t_end = time.monotonic() + 60
    for m in broken.good_models():
        payload = bytearray(m.SerializeToString())
        for i in range(750):
            if time.monotonic() > t_end:
                break
            mutant = bytearray(payload)
            for _ in range(rng.integers(1, 4)):
                pos = rng.integers(0, len(mutant))
                if rng.random() < 0.7:
                    mutant[pos] = rng.integers(0, 256)
                else:  # drop a run of bytes: shifts every later field
                    del mutant[pos:pos + int(rng.integers(1, 9))]
            data = vb.pack_bundle(bytes(mutant))
            h, err = C.c_void_p(), veerlib.VeerError()
            rc = lib.veer_bundle_open_mem(data, len(data), C.byref(h), C.byref(err))
            outcomes[rc] = outcomes.get(rc, 0) + 1
            if rc != 0:
                assert rc in known and not h, f"mutant {i}: unknown result {rc}"
                assert err.field or rc == veerlib.CODES["ENOMEM"], f"mutant {i}: no field"
                continue
            lib.veer_bundle_close(h)
            with veerlib.Runtime(lib, data, max_batch=4) as rt:
                info = rt.info
                s = rng.normal(size=(4, info.state_dim)).astype(np.float32)
                z = rng.normal(size=info.z_dim).astype(np.float32)
                a, v, fl = rt.act_batch(s, z)
                assert np.all(np.isfinite(a)) and np.all(np.isfinite(v))
                if info.action_kind == 1:
                    low = np.ctypeslib.as_array(info.action_low, (info.action_dim,))
                    high = np.ctypeslib.as_array(info.action_high, (info.action_dim,))
                    assert np.all(a >= low) and np.all(a <= high)
                else:
                    assert np.all((a >= 0) & (a < info.action_count))
    # The mutants must reach the validator's content checks, not only the decoder.
    print("outcomes by code:", dict(sorted(outcomes.items())))
    assert len(outcomes) >= 5, outcomes


def test_degenerate_training_states_still_load(lib):
    """Training logs with a constant feature, an exactly collinear one, a rare binary flag and
    features five orders of magnitude apart: the exporter picks a ridge that libveer can invert
    and says when the ridge is large for a feature; libveer's precision matrix, applied to the
    training states, gives back the stored Mahalanobis p99 (numpy.quantile over the distances)."""
    import warnings
    import numpy as np
    from veer import synth
    rng = np.random.default_rng(3)
    lay = synth.make_layout(kind="discrete", state_dim=8, z_dim=8, action_count=3, hidden=[16, 16])
    w = synth.random_weights(lay, rng)
    x = rng.normal(size=(3000, 8)) * [1, 10, 100, 1000, 1, 1, 1, 1]
    x[:, 4] = 3.0
    x[:, 5] = x[:, 0] + 2 * x[:, 1]
    x[:, 6] = rng.random(3000) < 0.01
    x[:, 7] = rng.normal(size=3000) * 0.01
    x = x.astype(np.float32)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        m = vb.build_model(lay, w, x)
    assert any(" 7 (variance" in str(c.message) for c in caught)
    with veerlib.Runtime(lib, vb.pack_bundle(m)) as rt:
        P = np.ctypeslib.as_array(rt.info.state_precision, (8, 8)).astype(np.float64)
        mu = np.asarray(m.stats.mean, np.float64)
        d = np.sqrt(np.einsum("ni,ij,nj->n", x - mu, P, x - mu))
        assert np.quantile(d, 0.99) == pytest.approx(m.stats.mahalanobis_p99, rel=1e-2)
