#!/usr/bin/python3
"""Makes the shipped example bundle and reward samples for a parcel-sorting arm.

UNTRAINED EXAMPLE: the networks have random weights. The bundle is for trying the tools
(`veer inspect`, the runtime, the service) on a fresh clone, never for driving an arm: its
actions mean nothing. A real bundle comes from the trainer or from the exporter with trained
weights.

The arm: a three-joint arm over a conveyor that picks parcels and drops them into bins. Its
state has 10 features (joint angles, gripper position, parcel position and mass, gripper
closure, belt speed); its action is 4 continuous commands (three joint velocities and the
gripper closure). B reads only the 6 features a sorting reward depends on (where the gripper
and the parcel are, and whether the gripper holds it).

The training states are invented: uniform draws over plausible ranges, with the gripper
position tied to the joint angles by a planar approximation. The reward samples are for the
task "bring the gripper, holding the parcel, over bin 2 at (0.60, -0.40, 0.30) m":
    r = -|gripper - bin 2| - 0.5 (1 - gripper_closed)   (distance in metres)

Run from the repository root after building (the schema module comes from the build):
    VEER_BUILD_DIR=build /usr/bin/python3 examples/make_parcel_arm_example.py
It rewrites the three files below byte for byte the same each time.
"""
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "clients", "python"))

from veer import bundle as vb  # noqa: E402
from veer import synth  # noqa: E402

BUNDLE = "parcel-arm-untrained.veer"
SAMPLES = "parcel-arm-samples.csv"
REWARDS = "parcel-arm-rewards.csv"

FEATURES = ["base_angle_rad", "shoulder_angle_rad", "elbow_angle_rad",
            "gripper_x_m", "gripper_y_m", "gripper_z_m",
            "parcel_x_m", "parcel_y_m", "parcel_mass_kg", "gripper_closed"]
B_READS = [3, 4, 5, 6, 7, 9]
BIN_2 = np.array([0.60, -0.40, 0.30])


def training_states(rng, n):
    base = rng.uniform(-1.6, 1.6, n)
    shoulder = rng.uniform(-0.2, 1.3, n)
    elbow = rng.uniform(-1.4, 0.4, n)
    reach = 0.45 * np.cos(shoulder) + 0.40 * np.cos(shoulder + elbow)
    x = reach * np.cos(base) + rng.normal(0, 0.01, n)
    y = reach * np.sin(base) + rng.normal(0, 0.01, n)
    z = 0.35 + 0.45 * np.sin(shoulder) + 0.40 * np.sin(shoulder + elbow) + rng.normal(0, 0.01, n)
    parcel_x = rng.uniform(-0.2, 0.8, n)
    parcel_y = rng.uniform(-0.6, 0.6, n)
    mass = rng.uniform(0.1, 5.0, n)
    closed = rng.uniform(0.0, 1.0, n)
    return np.stack([base, shoulder, elbow, x, y, z, parcel_x, parcel_y, mass, closed], axis=1)


def reward(states):
    return (-np.linalg.norm(states[:, 3:6] - BIN_2, axis=1) - 0.5 * (1.0 - states[:, 9]))


def main():
    rng = np.random.default_rng(2026)
    layout = synth.make_layout(kind="continuous", state_dim=len(FEATURES), z_dim=16,
                               hidden=[64, 64], action_dim=4, b_features=B_READS,
                               feature_names=FEATURES, actor_normalized=True,
                               model_version="parcel-arm-untrained-1")
    layout["action"] = {"kind": "continuous",
                        "low": [-1.0, -0.8, -0.8, 0.0], "high": [1.0, 0.8, 0.8, 1.0],
                        "names": ["base_velocity_rad_s", "shoulder_velocity_rad_s",
                                  "elbow_velocity_rad_s", "gripper_command"]}
    # Hold the joints still and keep the gripper closed: dropping a parcel is worse
    # than holding one a moment longer.
    layout["fallback_action"] = [0.0, 0.0, 0.0, 1.0]
    layout["decision_step_s"] = 0.02
    layout["discount"] = 0.98
    layout["provenance"] = {
        "producer": "examples/make_parcel_arm_example.py",
        "source_digest": "none: random weights",
        "notes": "UNTRAINED EXAMPLE with random weights, for trying veer's tools; "
                 "its actions mean nothing: never drive an arm with it."}
    weights = synth.random_weights(layout, rng)
    states = training_states(rng, 4000)
    m = vb.build_model(layout, weights, states, reference_count=128, bins=8, rng_key=1,
                       created="2026-01-01T00:00:00Z")
    vb.write_file_atomic(os.path.join(HERE, BUNDLE), vb.pack_bundle(m))

    samples = training_states(rng, 24)
    np.savetxt(os.path.join(HERE, SAMPLES), samples, fmt="%.5f", delimiter=",")
    np.savetxt(os.path.join(HERE, REWARDS), reward(samples), fmt="%.5f")
    print(f"wrote {BUNDLE} ({os.path.getsize(os.path.join(HERE, BUNDLE))} bytes), "
          f"{SAMPLES} and {REWARDS} (24 reward samples)")


if __name__ == "__main__":
    main()
