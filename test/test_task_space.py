"""The task-space view: end-effector kinematics against Pinocchio, the Cartesian stiffness
K_x = J^-T K_q J^-1 against the closed form of a planar two-link arm, singular configurations,
the report's figure and its place in the report of a URDF plant."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest
from campaign_support import JOINTS, cork_seat_records, cork_seat_skill

from compliant_demo.app.report_content import collect_report_content
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.learning import save_skill
from compliant_demo.plant import load_plant
from compliant_demo.report import plot_task_space
from compliant_demo.sim.task_space import (
    cartesian_stiffness,
    end_effector,
    motion_plane,
    task_space_view,
)
from compliant_demo.sim.urdf import pinocchio_model
from compliant_demo.store import DemoStore

ROOT = Path(__file__).resolve().parent.parent
ARMS = ("arm_cork_seat", "arm7_example")
L1, L2 = 0.3, 0.25  # shoulder-elbow and elbow-tool lengths of arm_cork_seat.urdf, m


@pytest.mark.parametrize("name", ARMS)
def test_end_effector_matches_pinocchio_frame_placement_and_jacobian(name):
    # reference library: Pinocchio's frame placement (oMf) and frame Jacobian in the
    # LOCAL_WORLD_ALIGNED convention (linear rows), at the URDF's last frame on the last link
    chain = load_plant(ROOT / "config" / f"{name}.yaml").chain
    model = pinocchio_model(ROOT / "compliant_demo" / "data" / f"{name}.urdf")
    data = model.createData()
    frame = [i for i, f in enumerate(model.frames) if f.parentJoint == model.njoints - 1][-1]
    rng = np.random.default_rng(13)
    q = rng.uniform(-1.5, 1.5, (20, model.nq))
    position, jacobian = end_effector(chain, q)
    for s in range(len(q)):
        pin.forwardKinematics(model, data, q[s])
        pin.updateFramePlacements(model, data)
        reference = pin.computeFrameJacobian(model, data, q[s], frame,
                                             pin.ReferenceFrame.LOCAL_WORLD_ALIGNED)[:3]
        np.testing.assert_allclose(position[s], data.oMf[frame].translation, atol=1e-12)
        np.testing.assert_allclose(jacobian[s], reference, atol=1e-12)


def _planar_closed_form(q1, q2, k1, k2):
    """Two-link planar arm hanging along -z, turning about y: tip x = -l1 sin q1 - l2 sin q12,
    z = -l1 cos q1 - l2 cos q12; K_x = J^-T diag(k1, k2) J^-1 (Siciliano et al., Robotics:
    Modelling, Planning and Control, the compliance/stiffness mapping; from memory)."""
    c1, s1 = np.cos(q1), np.sin(q1)
    c12, s12 = np.cos(q1 + q2), np.sin(q1 + q2)
    jac = np.array([[-L1 * c1 - L2 * c12, -L2 * c12], [L1 * s1 + L2 * s12, L2 * s12]])
    inverse = np.linalg.inv(jac)
    return inverse.T @ np.diag([k1, k2]) @ inverse


def test_two_link_stiffness_is_the_closed_form():
    chain = load_plant(ROOT / "config" / "arm_cork_seat.yaml").chain
    rng = np.random.default_rng(5)
    q = np.column_stack([rng.uniform(-1.0, 1.5, 30), rng.uniform(0.2, 1.5, 30)])
    k = rng.uniform(15.0, 180.0, (30, 2))
    _, jacobian = end_effector(chain, q)
    plane = motion_plane(chain, np.zeros((1, 3)))
    np.testing.assert_array_equal(plane, [[1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    k_x, singular = cartesian_stiffness(jacobian, k, plane)
    assert not singular.any()
    for s in range(len(q)):
        expected = _planar_closed_form(q[s, 0], q[s, 1], k[s, 0], k[s, 1])
        np.testing.assert_allclose(k_x[s], expected, rtol=1e-9)


def test_stretched_arm_is_singular_without_error():
    # elbow straight: the tip cannot move along the arm, J^-1 does not exist (det J =
    # l1*l2*sin q2 = 0 for the planar two-link arm, common practice)
    chain = load_plant(ROOT / "config" / "arm_cork_seat.yaml").chain
    q = np.array([[0.4, 0.0], [0.4, 1e-6], [0.4, 0.5]])
    view = task_space_view(chain, q, np.full(q.shape, 50.0), n_ellipses=3)
    assert view.singular.tolist() == [True, True, False]
    assert np.isnan(view.stiffness[:2]).all() and np.isfinite(view.stiffness[2]).all()
    figure = plot_task_space(view.path, view.sample_index, view.stiffness, view.singular,
                             axis_names=view.axis_names)
    labels = [line.get_label() for line in figure.axes[0].get_lines()]
    assert "singular: J^-1 does not exist, no ellipse" in labels
    assert len(figure.axes[0].patches) == 1  # one ellipse, at the regular sample
    everything_singular = plot_task_space(view.path, view.sample_index[:2],
                                          view.stiffness[:2], view.singular[:2])
    assert not everything_singular.axes[0].patches


def test_seven_joint_arm_draws_in_the_plane_of_its_path():
    chain = load_plant(ROOT / "config" / "arm7_example.yaml").chain
    t = np.linspace(0.0, 1.0, 60)[:, None]
    q = 0.4 * np.sin(2 * np.pi * t + np.arange(7) * 0.5)
    view = task_space_view(chain, q, np.full(q.shape, 80.0), n_ellipses=6)
    np.testing.assert_allclose(view.plane @ view.plane.T, np.eye(2), atol=1e-12)
    assert view.path.shape == (60, 2) and view.stiffness.shape == (6, 2, 2)
    regular = view.stiffness[~view.singular]
    np.testing.assert_allclose(regular, regular.transpose(0, 2, 1), rtol=1e-9)
    assert (np.linalg.eigvalsh(regular) > 0).all()


def test_task_space_errors_name_the_argument():
    chain = load_plant(ROOT / "config" / "arm_cork_seat.yaml").chain
    with pytest.raises(InvalidInputError, match=r"q: shape \(4,\), expected \(n_samples, 2\)"):
        end_effector(chain, np.zeros(4))
    with pytest.raises(InvalidInputError, match="q: values must be finite"):
        end_effector(chain, np.full((2, 2), np.nan))
    _, jacobian = end_effector(chain, np.full((2, 2), 0.3))
    with pytest.raises(InvalidInputError, match="stiffness: values must be finite and > 0"):
        cartesian_stiffness(jacobian, np.zeros((2, 2)), np.eye(3)[[0, 2]])
    with pytest.raises(InvalidInputError, match=r"stiffness: shape \(3, 2\), expected \(2, 2\)"):
        cartesian_stiffness(jacobian, np.ones((3, 2)), np.eye(3)[[0, 2]])
    with pytest.raises(InvalidInputError, match="n_ellipses = 0"):
        task_space_view(chain, np.full((2, 2), 0.3), np.ones((2, 2)), n_ellipses=0)
    with pytest.raises(InvalidInputError, match=r"path: expected \(n_samples, 2\)"):
        plot_task_space(np.zeros((3, 3)), np.array([0]), np.eye(2)[None], np.array([False]))
    with pytest.raises(InvalidInputError, match=r"expected \(1, 2, 2\) and \(1,\)"):
        plot_task_space(np.zeros((3, 2)), np.array([0]), np.eye(2), np.array([False]))


def test_report_of_a_urdf_plant_shows_the_task_space(tmp_path):
    with DemoStore(tmp_path / "store.sqlite", durable=False) as store:
        ids = [store.add_demonstration(
            skill="cork_seat", operator="operator_a", joints=list(JOINTS), t=r.t,
            position=r.position, velocity=r.velocity, torque=r.torque, source="simulated")
            for r in cork_seat_records()]
        skill = cork_seat_skill().model_copy(deep=True)
        skill.provenance.demonstration_ids = ids
        save_skill(store, skill)
        arm = collect_report_content(store, "cork_seat",
                                     plant=load_plant(ROOT / "config" / "arm_cork_seat.yaml"))
        default = collect_report_content(store, "cork_seat")
    stems = [f.stem for f in arm.figures]
    assert stems[-1] == "task_space"
    assert "task_space" not in [f.stem for f in default.figures]  # no chain, no view
    task = arm.figures[-1]
    assert "K_x = J^-T K_q J^-1" in task.caption
    assert [a.get_xlabel() for a in task.figure.axes] == ["base x [m]"]
