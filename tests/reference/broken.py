"""A catalogue of broken model bundles, each made by editing a good one, with the error code
and the field libveer must name when it refuses it.

The good bundles come from veer.synth (random weights): one with continuous actions and an
actor, one with discrete actions. Each entry edits either the file's bytes (framing damage) or
the decoded Model (content damage, then re-framed with a correct checksum so only the intended
fault is present).

Run as a script to write the catalogue as files (for a fuzzer's starting corpus or by hand):
    python3 tests/reference/broken.py OUTDIR
"""
from __future__ import annotations

import math
import os
import sys
from typing import Callable, List, NamedTuple

from veer import bundle as vb
from veer import synth

pb = vb.pb


class Broken(NamedTuple):
    name: str
    data: bytes
    code: str   # the VEER_E* name from include/veer/error.h, without the prefix
    field: str  # a prefix of the field libveer must name


def good_models():
    cont = synth.make_layout(kind="continuous", state_dim=6, z_dim=8, action_dim=2,
                             hidden=[16, 16], b_features=[0, 2, 3], layer_norm=True,
                             model_version="good-continuous")
    disc = synth.make_layout(kind="discrete", state_dim=5, z_dim=8, action_count=4,
                             hidden=[16, 16], merge="bilinear", bilinear_k=4,
                             model_version="good-discrete")
    mc, _, _ = synth.build_random(cont, rng_key=11, n_states=300, reference_count=32)
    md, _, _ = synth.build_random(disc, rng_key=12, n_states=300, reference_count=32)
    return mc, md


def _model_edit(base, edit: Callable) -> bytes:
    m = pb.Model()
    m.CopyFrom(base)
    edit(m)
    return vb.pack_bundle(m)


def _set(seq, i, value):
    seq[i] = value


def catalogue() -> List[Broken]:
    mc, md = good_models()
    good = vb.pack_bundle(mc)
    out: List[Broken] = []

    def raw(name, data, code, field):
        out.append(Broken(name, data, code, field))

    def edit(name, base, fn, code, field):
        out.append(Broken(name, _model_edit(base, fn), code, field))

    # -- the file frame -------------------------------------------------------------------
    raw("empty_file", b"", "ENOTBUNDLE", "magic")
    raw("bad_magic", b"VEERMDL0" + good[8:], "ENOTBUNDLE", "magic")
    raw("short_magic", good[:5], "ENOTBUNDLE", "magic")
    raw("other_file", b"\x89PNG\r\n\x1a\n" + bytes(64), "ENOTBUNDLE", "magic")
    raw("version_2", vb.pack_bundle(mc, format_version=2), "EVERSION", "format_version")
    raw("version_0_magic_only", b"VEERMDL1", "EVERSION", "format_version")
    flipped = bytearray(good)
    flipped[len(good) // 2] ^= 0x10  # a weight byte well inside the payload
    raw("flipped_payload_byte", bytes(flipped), "ECHECKSUM", "checksum")
    raw("checksum_short", vb.pack_bundle(mc, checksum=bytes(16)), "ECHECKSUM", "checksum")
    raw("truncated_file", good[: len(good) * 2 // 3], "ENOTBUNDLE", "bundle_file")
    garbage = b"\xff" * 40
    raw("payload_not_a_model", vb.pack_bundle(garbage), "EDECODE", "payload")

    # -- dimensions and networks ----------------------------------------------------------
    edit("dim_chain_broken", mc,
         lambda m: setattr(m.forward.head[0], "in_dim", m.forward.head[0].in_dim + 1),
         "EDIMCHAIN", "forward.head[0].in_dim")
    edit("weight_count_short", mc, lambda m: m.backward.branches[0].layers[0].weight.pop(),
         "EDIMCHAIN", "backward.branches[0].layers[0].weight")
    edit("b_output_not_z_dim", mc, lambda m: (m.backward.branches[0].layers.pop(),
                                               m.backward.branches[0].layers.pop()),
         "EDIMCHAIN", "backward")
    edit("bilinear_k_mismatch", md, lambda m: setattr(m.forward, "bilinear_k", 5),
         "EDIMCHAIN", "forward.bilinear_k")
    edit("missing_actor_continuous", mc, lambda m: m.ClearField("actor"),
         "ENETMISSING", "actor")
    edit("missing_backward", md, lambda m: m.ClearField("backward"), "ENETMISSING", "backward")
    edit("actor_in_discrete", md, lambda m: m.actor.CopyFrom(mc.actor), "EFIELD", "actor")
    edit("bilinear_three_branches", md,
         lambda m: m.forward.branches.add().CopyFrom(m.forward.branches[0]),
         "EFIELD", "forward.branches")
    edit("layer_kind_unset", mc, lambda m: setattr(m.actor.branches[0].layers[1], "kind", 0),
         "EFIELD", "actor.branches[0].layers[1].kind")
    edit("b_reads_task", mc,
         lambda m: m.backward.branches[0].inputs.add(kind=pb.INPUT_TASK),
         "EFIELD", "backward.branches[0].inputs[1]")
    edit("feature_index_out_of_range", mc,
         lambda m: _set(m.backward.branches[0].inputs[0].features, 1, 6),
         "EFIELD", "backward.branches[0].inputs[0].features[1]")
    edit("layer_norm_eps_zero", mc,
         lambda m: setattr(m.actor.branches[0].layers[1], "eps", 0.0),
         "EFIELD", "actor.branches[0].layers[1].eps")

    # -- non-finite values ----------------------------------------------------------------
    edit("nan_weight", mc, lambda m: _set(m.forward.branches[0].layers[0].weight, 3, math.nan),
         "ENONFINITE", "forward.branches[0].layers[0].weight")
    edit("inf_bias", md, lambda m: _set(m.forward.branches[1].layers[0].bias, 0, math.inf),
         "ENONFINITE", "forward.branches[1].layers[0].bias")
    edit("nan_reference_b", mc, lambda m: _set(m.reference.b, 5, math.nan),
         "ENONFINITE", "reference.b")

    # -- actions and fallback -------------------------------------------------------------
    edit("low_above_high", mc, lambda m: _set(m.action.low, 1, m.action.high[1] + 1.0),
         "EBOUNDS", "action.low[1]")
    edit("nan_bound", mc, lambda m: _set(m.action.high, 0, math.nan), "EBOUNDS", "action.high[0]")
    edit("bounds_wrong_length", mc, lambda m: m.action.high.pop(), "EBOUNDS", "action.high")
    edit("fallback_outside_bounds", mc,
         lambda m: _set(m.fallback_action, 0, m.action.high[0] + 0.5),
         "EFALLBACK", "fallback_action[0]")
    edit("fallback_wrong_length", mc, lambda m: m.fallback_action.append(0.0),
         "EFALLBACK", "fallback_action")
    edit("fallback_index_out_of_range", md, lambda m: _set(m.fallback_action, 0, 4.0),
         "EFALLBACK", "fallback_action")
    edit("action_kind_unset", mc, lambda m: setattr(m.action, "kind", pb.ACTION_KIND_UNSET),
         "EFIELD", "action.kind")
    edit("discrete_count_zero", md, lambda m: setattr(m.action, "count", 0),
         "EFIELD", "action.count")

    # -- model header ---------------------------------------------------------------------
    edit("feature_names_short", mc, lambda m: m.feature_names.pop(), "EFIELD", "feature_names")
    edit("discount_above_one", mc, lambda m: setattr(m, "discount", 1.5), "EFIELD", "discount")
    edit("z_dim_zero", mc, lambda m: setattr(m, "z_dim", 0), "EFIELD", "z_dim")

    # -- statistics, reference set, Cov(B) ------------------------------------------------
    edit("stats_mean_wrong_size", mc, lambda m: m.stats.mean.pop(), "ESTATSSIZE", "stats.mean")
    edit("stats_cov_wrong_size", mc, lambda m: m.stats.cov.extend([0.0] * 6),
         "ESTATSSIZE", "stats.cov")
    edit("quantile_edges_decreasing", mc,
         lambda m: _set(m.stats.quantile_edges, 2, m.stats.quantile_edges[1] - 1.0),
         "ESTATSSIZE", "stats.quantile_edges[2]")
    edit("cov_not_symmetric", mc, lambda m: _set(m.stats.cov, 1, m.stats.cov[1] + 1.0),
         "EFIELD", "stats.cov[1]")
    edit("mahalanobis_p999_below_p99", mc,
         lambda m: setattr(m.stats, "mahalanobis_p999", m.stats.mahalanobis_p99 / 2),
         "EFIELD", "stats.mahalanobis_p999")
    edit("reference_states_shape", mc, lambda m: m.reference.states.pop(),
         "EREFSHAPE", "reference.states")
    edit("reference_count_too_big", mc, lambda m: setattr(m.reference, "count", 33),
         "EREFSHAPE", "reference.states")
    edit("reference_b_shape", md, lambda m: m.reference.b.extend([0.0] * 8),
         "EREFSHAPE", "reference.b")
    edit("cov_b_wrong_size", md, lambda m: m.cov_b.pop(), "ESTATSSIZE", "cov_b")
    assert len({b.name for b in out}) == len(out)
    return out


if __name__ == "__main__":
    outdir = sys.argv[1]
    os.makedirs(outdir, exist_ok=True)
    for b in catalogue():
        with open(os.path.join(outdir, f"{b.name}.veer"), "wb") as f:
            f.write(b.data)
    print(f"wrote {len(catalogue())} broken bundles to {outdir}")
