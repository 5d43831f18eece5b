"""The chain kernel's turned joint frames (every joint about its own z) on arms of any geometry.

Reference library: Pinocchio (``pin`` on PyPI, 4.x): ``pin.aba`` (forward dynamics),
``pin.rnea`` (inverse dynamics), ``pin.crba`` (mass matrix), ``pin.computeKineticEnergy`` and
``pin.computePotentialEnergy``, on the model Pinocchio builds from the same URDF. The arms are
invented here at random (seeded): oblique and opposite axes, placements turned about every axis,
link inertias given in turned inertial frames. That a rotation about an axis leaves the axis in
place, so joints whose placement turns about a shared axis stay parallel, is common practice.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from compliant_demo.sim.rigid_body import ChainKernel, z_axis_model
from compliant_demo.sim.urdf import pinocchio_model, read_urdf

ARM_CORK_SEAT = Path(__file__).resolve().parent.parent / "compliant_demo" / "data" / (
    "arm_cork_seat.urdf")


def _vector(values) -> str:
    return " ".join(f"{float(v):.17g}" for v in values)


def _random_arm(path: Path, seed: int, n: int, axes: list | None = None,
                rpy: list | None = None) -> Path:
    """A serial arm of n revolute joints with random placements, axes and links (invented)."""
    rng = np.random.default_rng(seed)
    parts = ['<?xml version="1.0"?>', '<robot name="random_arm">', '<link name="link0"/>']
    for i in range(n):
        axis = rng.normal(size=3) if axes is None else np.asarray(axes[i], dtype=float)
        turn = rng.uniform(-math.pi, math.pi, 3) if rpy is None else rpy[i]
        principal = rng.uniform(0.002, 0.05, 3)
        # a valid inertia tensor: principal moments obeying the triangle inequality
        principal[2] = min(principal[2], 0.9 * (principal[0] + principal[1]))
        parts += [
            f'<joint name="j{i}" type="revolute">',
            f'  <parent link="link{i}"/><child link="link{i + 1}"/>',
            f'  <origin xyz="{_vector(rng.uniform(-0.3, 0.3, 3))}" rpy="{_vector(turn)}"/>',
            f'  <axis xyz="{_vector(axis / np.linalg.norm(axis))}"/>',
            '  <limit lower="-3" upper="3" effort="20" velocity="5"/>',
            '</joint>',
            f'<link name="link{i + 1}"><inertial>',
            f'  <origin xyz="{_vector(rng.uniform(-0.2, 0.2, 3))}" '
            f'rpy="{_vector(rng.uniform(-math.pi, math.pi, 3))}"/>',
            f'  <mass value="{rng.uniform(0.2, 2.0):.17g}"/>',
            f'  <inertia ixx="{principal[0]:.17g}" ixy="0" ixz="0" iyy="{principal[1]:.17g}" '
            f'iyz="0" izz="{principal[2]:.17g}"/>',
            '</inertial></link>',
        ]
    path.write_text("\n".join([*parts, "</robot>"]))
    return path


def _states(n: int, n_scen: int, seed: int) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    return tuple(rng.uniform(-lim, lim, (n, n_scen)) for lim in (math.pi, 4.0, 6.0))


ARMS = {
    "oblique": {"n": 5},
    "opposite_axes": {"n": 4, "axes": [(0, 1, 0), (0, -1, 0), (1, 0, 0), (0, 0, -1)]},
    "parallel_turned_placements": {
        "n": 3, "axes": [(1, 0, 0)] * 3,
        "rpy": [(0.0, 0.0, 0.0), (0.7, 0.0, 0.0), (-2.1, 0.0, 0.0)]},
}


@pytest.mark.parametrize("name", sorted(ARMS))
def test_kernel_on_random_arms_equals_pinocchio(name, tmp_path):
    spec = ARMS[name]
    path = _random_arm(tmp_path / f"{name}.urdf", seed=len(name), n=spec["n"],
                       axes=spec.get("axes"), rpy=spec.get("rpy"))
    model = pinocchio_model(path)
    data = model.createData()
    kernel = ChainKernel(read_urdf(path)[0])
    n, n_scen = model.nv, 300  # more than one block of scenarios
    q, dq, tau = _states(n, n_scen, seed=21)
    accel = np.zeros((n, n_scen))
    kernel.forward(q, dq, tau, np.ones((n, n_scen)), accel)
    ref = np.array([pin.aba(model, data, q[:, s], dq[:, s], tau[:, s])
                    for s in range(n_scen)]).T
    assert np.max(np.abs(accel - ref) / np.abs(ref)) <= 1e-10
    torque = kernel.inverse(q, dq, tau)
    ref = np.array([pin.rnea(model, data, q[:, s], dq[:, s], tau[:, s])
                    for s in range(n_scen)]).T
    assert np.max(np.abs(torque - ref)) <= 1e-10 * np.max(np.abs(ref))
    mass = kernel.mass_matrix(q)
    kinetic, potential = np.empty_like(q), np.empty_like(q)
    kernel.energies(q, dq, kinetic, potential)
    rest = pin.computePotentialEnergy(model, data, np.zeros(model.nq))
    for s in range(0, n_scen, 7):
        upper = pin.crba(model, data, q[:, s])
        full = np.triu(upper) + np.triu(upper, 1).T  # crba fills the upper triangle
        np.testing.assert_allclose(mass[s], full, rtol=0, atol=1e-12 * np.abs(full).max())
        total = pin.computeKineticEnergy(model, data, q[:, s], dq[:, s])
        assert kinetic[:, s].sum() == pytest.approx(total, rel=1e-12, abs=1e-14)
        height = pin.computePotentialEnergy(model, data, q[:, s]) - rest
        assert potential[:, s].sum() == pytest.approx(height, rel=1e-12, abs=1e-12)


def test_parallel_axes_need_no_placement_rotation(tmp_path):
    """Joints about one shared axis, placed turned about it, and the planar bench arm: every
    joint's placement in the turned frames is the identity (the kernels skip it)."""
    spec = ARMS["parallel_turned_placements"]
    for path in (_random_arm(tmp_path / "parallel.urdf", seed=3, n=3, axes=spec["axes"],
                             rpy=spec["rpy"]), ARM_CORK_SEAT):
        place, _, turned, *_ = ChainKernel(read_urdf(path)[0]).model
        assert not turned.any()
        assert np.array_equal(place, np.broadcast_to(np.eye(3), place.shape))
    opposite = ARMS["opposite_axes"]
    path = _random_arm(tmp_path / "opposite.urdf", seed=3, n=4, axes=opposite["axes"],
                       rpy=[(0.0, 0.0, 0.0)] * 4)
    assert ChainKernel(read_urdf(path)[0]).model[2].tolist() == [False, True, True, True]


def test_turned_frames_keep_each_joint_about_its_axis():
    """The frame rotation C_i the model implies is a proper rotation whose third column is
    joint i's axis, which is what makes Rot(axis_i, q) C_i = C_i Rz(q): a turn about z in the
    turned frame is the joint's turn about its axis (Rodrigues' rotation formula; common
    practice). C_i^T is read off the turned centres of mass of links whose com is e_0, e_1, e_2
    in turn."""
    rng = np.random.default_rng(5)
    n = 4
    axis = rng.normal(size=(n, 3))
    axis /= np.linalg.norm(axis, axis=1, keepdims=True)
    place = np.array([np.linalg.qr(rng.normal(size=(3, 3)))[0] for _ in range(n)])
    place *= np.sign(np.linalg.det(place))[:, None, None]  # proper rotations
    inertia = np.array([np.diag(rng.uniform(0.01, 0.05, 3)) for _ in range(n)])
    frames = []
    for probe in np.eye(3):  # C_i^T e_k for k = 0, 1, 2: the columns of C_i^T
        model = z_axis_model(place, np.zeros((n, 3)), axis, np.ones(n),
                             np.tile(probe, (n, 1)), inertia, np.array([0.0, 0.0, -9.8]))
        frames.append(model[4])
    for i in range(n):
        turn_back = np.column_stack([frames[k][i] for k in range(3)])  # C_i^T
        c = turn_back.T
        np.testing.assert_allclose(c.T @ c, np.eye(3), atol=1e-14)
        assert np.linalg.det(c) == pytest.approx(1.0, abs=1e-14)
        np.testing.assert_allclose(c[:, 2], axis[i], atol=1e-14)
