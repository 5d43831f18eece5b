"""The recorder's estimator parameters: checks across parameters and the hand-over to the core.

Only the node module's plain functions are used here (no rclpy context, no processes).
"""

import re

import numpy as np
import pytest

from compliant_demo.nodes.recorder import _check_parameters, _estimator_factory

BASE = {
    "skill": "cork_seat",
    "operator": "operator_a",
    "tags": [],
    "notes": "",
    "joints": ["shoulder", "elbow"],
    "stiffness_channel": "estimate",
    "nominal_rate_hz": 1000.0,
    "estimator_window_s": 0.5,
    "estimator_noise_variance_ratio": 62500.0,
    "estimator_band_low_hz": 4.8,
    "estimator_band_high_hz": 12.8,
    "estimator_min_excitation_rad": 2e-4,
    "estimator_torque_sensor": "hand",
    "estimator_link_inertia": [],
    "estimator_model_inertia": True,
    "estimator_min_conditioning": 0.02,
}


def test_defaults_and_a_joint_side_sensor_with_link_inertia_are_accepted():
    assert _check_parameters(BASE) is None
    joint = dict(BASE, estimator_torque_sensor="joint", estimator_link_inertia=[0.08, 0.03])
    assert _check_parameters(joint) is None
    estimator = _estimator_factory(joint)(2)
    np.testing.assert_array_equal(estimator.link_inertia, [0.08, 0.03])
    assert estimator.model_inertia and estimator.min_conditioning == 0.02
    assert estimator.band_hz == (4.8, 12.8)
    assert _estimator_factory(BASE)(2).link_inertia is None


@pytest.mark.parametrize(
    ("changes", "reason"),
    [
        ({"estimator_torque_sensor": "wrist"}, "estimator_torque_sensor must be hand or joint"),
        ({"estimator_link_inertia": [0.08, 0.03]}, r"estimator_link_inertia = \[0.08, 0.03\]"),
        ({"estimator_torque_sensor": "joint", "estimator_link_inertia": [0.08]},
         "one value per joint"),
        ({"estimator_torque_sensor": "joint", "estimator_link_inertia": [0.08, -1.0]},
         "0 to 100 kg"),
        ({"estimator_torque_sensor": "joint", "estimator_link_inertia": ["a", "b"]},
         "one value per joint"),
        ({"estimator_torque_sensor": "joint", "estimator_model_inertia": False},
         "needs estimator_link_inertia or model_inertia"),
    ],
)
def test_inconsistent_estimator_parameters_are_refused_with_a_reason(changes, reason):
    message = _check_parameters(dict(BASE, **changes))
    assert message is not None
    assert re.search(reason, message), message
