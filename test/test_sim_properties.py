"""Property tests (hypothesis) of the antagonistic inverse map over random mechanisms."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from compliant_demo.models import AntagonisticParams
from compliant_demo.sim import (
    antagonistic_motor_angles,
    antagonistic_stiffness,
    antagonistic_torque,
)

_positive = st.floats(min_value=0.5, max_value=50.0)


@settings(max_examples=150, deadline=None, derandomize=True)
@given(
    k1=_positive,
    k2=st.floats(min_value=1.0, max_value=300.0),
    d0=st.floats(min_value=0.0, max_value=0.2),
    span=st.floats(min_value=0.5, max_value=4.0),
    equilibrium=st.floats(min_value=-5.0, max_value=5.0),
    fraction=st.floats(min_value=-0.2, max_value=1.2),
)
def test_inverse_map_is_exact_or_clamped_into_range(k1, k2, d0, span, equilibrium, fraction):
    # above 2*k1 both springs are taut at equilibrium (at exactly 2*k1 both sit at the slack
    # threshold and any deflection engages only one)
    params = AntagonisticParams(k1=k1, k2=k2, pretension_offset=d0, stiffness_min=2 * k1 + 1,
                                stiffness_max=2 * k1 + 101.0, motor_lower=-span,
                                motor_upper=span)
    stiffness = 2 * k1 + 1 + fraction * 100.0
    theta1, theta2, eq_clamped, k_clamped = antagonistic_motor_angles(params, equilibrium,
                                                                      stiffness)
    # the motors always stay in range
    assert -span - 1e-12 <= theta1 <= span + 1e-12 and -span - 1e-12 <= theta2 <= span + 1e-12
    # Migliore et al., ICRA 2005: zero torque at the realised equilibrium (motor midpoint) and
    # stiffness 2*k1 + 2*k2*(theta1 - theta2 + 2*d0) there
    realised = 0.5 * (theta1 + theta2)
    k_realised = antagonistic_stiffness(params, realised, theta1, theta2)
    assert abs(antagonistic_torque(params, realised, theta1, theta2)) <= 1e-9 * (1 + k_realised)
    assert np.isclose(k_realised, 2 * k1 + 2 * k2 * (theta1 - theta2 + 2 * d0), rtol=1e-9)
    # unclamped commands come back exactly; clamped ones are flagged
    if not eq_clamped:
        assert np.isclose(realised, equilibrium, rtol=0, atol=1e-12)
    if not k_clamped:
        assert np.isclose(k_realised, stiffness, rtol=1e-9)
    else:
        assert k_realised <= params.stiffness_max + 1e-9
