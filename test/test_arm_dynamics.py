"""Coupled arms read from URDF files: our compiled dynamics against Pinocchio, energy, plants.

Reference library: Pinocchio (``pin`` on PyPI, 4.x): ``pin.aba`` (forward dynamics),
``pin.rnea`` (inverse dynamics) and ``pin.crba`` (mass matrix) on the model Pinocchio builds from
the same URDF. The URDF files themselves are read a second time with ElementTree to check what
the loader copied. Energy conservation of the undamped arm is a law of mechanics (common
practice); the classical RK4 method's global error is O(h^4) (Hairer, Norsett, Wanner, Solving
ODEs I, sec. II.3, from memory).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import IdealImpedanceParams, JointParams
from compliant_demo.perturbation import Hold, Impulse, PerturbationSchedule
from compliant_demo.plant import ReplayPlant, load_plant, plant_from_urdf
from compliant_demo.sim import GRAVITY, Simulator, simulate
from compliant_demo.sim.rigid_body import ChainKernel
from compliant_demo.sim.urdf import pinocchio_model, read_urdf

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "compliant_demo" / "data"
ARMS = {"arm_cork_seat": DATA / "arm_cork_seat.urdf", "arm7_example": DATA / "arm7_example.urdf"}
ARM_PLANT = ROOT / "config" / "arm_cork_seat.yaml"


def _random_states(n: int, n_scen: int, seed: int) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    return tuple(rng.uniform(-lim, lim, (n, n_scen)) for lim in (math.pi, 4.0, 6.0))


def _arm(name: str, n_scen: int, seed: int) -> tuple:
    """Our kernel and Pinocchio's model and data of a shipped arm, and random states."""
    model = pinocchio_model(ARMS[name])
    return (ChainKernel(read_urdf(ARMS[name])[0]), model, model.createData(),
            *_random_states(model.nv, n_scen, seed))


@pytest.mark.parametrize("name", sorted(ARMS))
def test_forward_dynamics_equal_pinocchio_aba(name):
    kernel, model, data, q, dq, tau = _arm(name, 200, seed=11)
    n = model.nv
    out = np.zeros((n, 200))
    kernel.forward(q, dq, tau, np.ones((n, 200)), out)
    ref = np.array([pin.aba(model, data, q[:, s], dq[:, s], tau[:, s]) for s in range(200)]).T
    assert np.max(np.abs(out - ref) / np.abs(ref)) <= 1e-10


@pytest.mark.parametrize("name", sorted(ARMS))
def test_inverse_dynamics_and_mass_matrix_equal_pinocchio(name):
    kernel, model, data, q, dq, ddq = _arm(name, 50, seed=12)
    torque = kernel.inverse(q, dq, ddq)
    ref = np.array([pin.rnea(model, data, q[:, s], dq[:, s], ddq[:, s]) for s in range(50)]).T
    assert np.max(np.abs(torque - ref)) <= 1e-10 * np.max(np.abs(ref))
    mass = kernel.mass_matrix(q)
    for s in range(50):
        upper = pin.crba(model, data, q[:, s])
        full = np.triu(upper) + np.triu(upper, 1).T  # crba fills the upper triangle
        np.testing.assert_allclose(mass[s], full, rtol=0, atol=1e-12 * np.abs(full).max())
    # gravity alone: rnea at rest is pin.computeGeneralizedGravity
    gravity = kernel.inverse(q, np.zeros_like(q), np.zeros_like(q))
    ref = np.array([pin.computeGeneralizedGravity(model, data, q[:, s]) for s in range(50)]).T
    np.testing.assert_allclose(gravity, ref, rtol=0, atol=1e-10 * np.abs(ref).max())


@pytest.mark.parametrize("name", sorted(ARMS))
def test_energies_sum_to_pinocchio_kinetic_and_potential_energy(name):
    # pin.computeKineticEnergy: 1/2 v^T M v; pin.computePotentialEnergy: -sum m_i g . c_i
    kernel, model, data, q, dq, _ = _arm(name, 50, seed=14)
    kinetic, potential = np.empty_like(q), np.empty_like(q)
    kernel.energies(q, dq, kinetic, potential)
    rest = pin.computePotentialEnergy(model, data, np.zeros(model.nq))
    for s in range(50):
        total = pin.computeKineticEnergy(model, data, q[:, s], dq[:, s])
        assert kinetic[:, s].sum() == pytest.approx(total, rel=1e-12, abs=1e-14)
        height = pin.computePotentialEnergy(model, data, q[:, s]) - rest
        assert potential[:, s].sum() == pytest.approx(height, rel=1e-12, abs=1e-12)
    np.testing.assert_allclose(kinetic, 0.5 * dq * kernel.inverse(q, 0 * dq, dq, gravity=False),
                               rtol=0, atol=1e-15)


def test_locked_joints_solve_the_reduced_system():
    kernel, model, data, q, dq, tau = _arm("arm7_example", 20, seed=13)
    free = np.ones((7, 20))
    free[[1, 4], :10] = 0.0
    free[6, 10:] = 0.0
    out = np.zeros((7, 20))
    kernel.forward(q, dq, tau, free, out)
    for s in range(20):
        mass = pin.crba(model, data, q[:, s])
        mass = np.triu(mass) + np.triu(mass, 1).T
        bias = pin.nonLinearEffects(model, data, q[:, s], dq[:, s])
        keep = free[:, s] == 1
        expected = np.zeros(7)
        expected[keep] = np.linalg.solve(mass[np.ix_(keep, keep)], (tau[:, s] - bias)[keep])
        np.testing.assert_allclose(out[:, s], expected, rtol=1e-10, atol=1e-12)


def _free_arm() -> tuple[list[JointParams], IdealImpedanceParams, object]:
    plant = load_plant(ARM_PLANT)
    joints = [j.model_copy(update={"viscous_damping": 0.0, "coulomb_friction": 0.0,
                                   "lower_limit": -10.0, "upper_limit": 10.0,
                                   "torque_noise_std": 0.0, "encoder_resolution": 0.0})
              for j in plant.joints]
    return joints, IdealImpedanceParams(stiffness_min=1e-6, damping_min=0.0), plant.chain


def test_free_coupled_arm_conserves_energy_to_rk4_order():
    joints, springs, chain = _free_arm()
    drift = {}
    for dt in (2e-3, 1e-3):
        n = int(round(2.0 / dt))
        run = simulate(joints, springs, np.zeros((n, 2)), np.full((n, 2), 1e-6),
                       np.zeros((n, 2)), q0=[1.2, -0.8], dt=dt, chain=chain)
        total = run.energy.total().sum(axis=2)[:, 0]
        drift[dt] = float(np.max(np.abs(total - total[0])))
        # released 1.2 rad up: m1*g*c1*(1 - cos 1.2) plus the forearm's height, J
        assert total[0] > 0.5
    assert drift[1e-3] <= 1e-10 * 1.0
    # RK4: halving the step divides the error by about 2^4
    assert 8.0 <= drift[2e-3] / drift[1e-3] <= 32.0


def test_shoulder_held_elbow_swings_as_a_pendulum():
    """With the shoulder held at 0 the forearm is a compound pendulum about the elbow:
    omega^2 = (K + m*g*c) / I for small swings (common practice), m = 0.25 kg, c = 0.12 m,
    I = 0.03 kg*m^2 from the URDF's comment."""
    joints, springs, chain = _free_arm()
    stiffness, n = 2.0, 4000
    schedule = PerturbationSchedule(name="held", perturbations=[
        Hold(joint=0, onset_s=0.0, duration_s=10.0)])
    run = simulate(joints, IdealImpedanceParams(stiffness_min=1.0, damping_min=0.0),
                   np.zeros((n, 2)), np.full((n, 2), stiffness), np.zeros((n, 2)),
                   q0=[0.0, 0.01], schedules=[schedule], chain=chain)
    elbow = run.q[:, 0, 1]
    crossings = np.nonzero((elbow[:-1] > 0) & (elbow[1:] <= 0))[0]
    period = float(np.mean(np.diff(crossings))) * 1e-3
    omega = math.sqrt((stiffness + 0.25 * GRAVITY * 0.12) / 0.03)
    assert period == pytest.approx(2 * math.pi / omega, rel=2e-3)
    assert np.all(run.q[:, 0, 0] == 0.0)
    assert springs.damping_min == 0.0


def test_impulse_on_coupled_arm_jumps_velocities_by_inverse_mass_matrix():
    joints, springs, chain = _free_arm()
    model = pinocchio_model(ARMS["arm_cork_seat"])
    schedule = PerturbationSchedule(name="kick", perturbations=[
        Impulse(joint=1, onset_s=0.0, magnitude=0.02)])
    sim = Simulator(joints, springs, dt=1e-3, q0=[0.3, 0.5], schedules=[schedule], chain=chain)
    state = sim.step([0.3, 0.5], [1e-6, 1e-6], [0.0, 0.0])
    mass = pin.crba(model, model.createData(), np.array([0.3, 0.5]))
    mass = np.triu(mass) + np.triu(mass, 1).T
    jump = np.linalg.solve(mass, [0.0, 0.02])
    # one step later the velocities have moved on by about dt * acceleration
    np.testing.assert_allclose(state.dq[0], jump, atol=2e-2 * np.abs(jump).max() + 2e-3)


def _urdf_xml(path: Path) -> dict[str, dict[str, float]]:
    joints = {}
    for joint in ET.parse(path).getroot().iter("joint"):
        if joint.get("type") == "fixed":  # a tool frame, not a moving joint
            continue
        limit, dynamics = joint.find("limit"), joint.find("dynamics")
        assert limit is not None and dynamics is not None
        joints[joint.get("name")] = {
            "lower": float(limit.get("lower")), "upper": float(limit.get("upper")),
            "effort": float(limit.get("effort")), "velocity": float(limit.get("velocity")),
            "damping": float(dynamics.get("damping")), "friction": float(dynamics.get("friction")),
        }
    return joints


@pytest.mark.parametrize("name", sorted(ARMS))
def test_read_urdf_copies_limits_damping_and_friction(name):
    chain, joints = read_urdf(ARMS[name])
    expected = _urdf_xml(ARMS[name])
    assert [j.name for j in joints] == list(expected) == list(chain.joint_names)
    for joint, body in zip(joints, chain.bodies, strict=True):
        e = expected[joint.name]
        assert (joint.lower_limit, joint.upper_limit) == (e["lower"], e["upper"])
        assert (joint.effort_limit, joint.velocity_limit) == (e["effort"], e["velocity"])
        assert (joint.damping, joint.friction) == (e["damping"], e["friction"])
        assert body.velocity_limit == e["velocity"]


def test_shipped_arm_plant_matches_the_bench_arm():
    plant = load_plant(ARM_PLANT)
    shoulder, elbow = plant.joints
    # elbow inertia about its axis 0.0264 + 0.25*0.12^2 = 0.03 kg*m^2; the shoulder at zero
    # angles carries both links: 0.0665 + 0.6*0.15^2 + 0.0264 + 0.25*(0.3 + 0.12)^2
    assert elbow.inertia == pytest.approx(0.03, rel=1e-12)
    assert shoulder.inertia == pytest.approx(0.0665 + 0.6 * 0.15**2 + 0.0264 + 0.25 * 0.42**2,
                                             rel=1e-12)
    assert (shoulder.torque_limit, shoulder.viscous_damping, shoulder.coulomb_friction) == (
        15.0, 0.04, 0.03)
    assert plant.mechanism.kind == "antagonistic" and plant.mechanisms is not None
    assert ReplayPlant.model_validate(plant.model_dump(mode="json")) == plant
    assert "coupled arm arm_cork_seat.urdf" in plant.describe()
    seven = load_plant(ROOT / "config" / "arm7_example.yaml")
    assert len(seven.joints) == 7 and seven.chain is not None


def test_plant_without_chain_serialises_as_before():
    plant = load_plant()
    assert set(plant.model_dump(mode="json")) == {"joints", "mechanism"}
    assert plant.mechanisms_for(["elbow"]) == [plant.mechanism]


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


_LINK = ('<inertial><mass value="{m}"/><inertia ixx="0.01" ixy="0" ixz="0" iyy="0.01" '
         'iyz="0" izz="0.01"/></inertial>')


def _robot(joints: str, links: str) -> str:
    return f'<robot name="bad"><link name="base"/>{links}{joints}</robot>'


def _joint(name: str, parent: str, child: str, kind: str = "revolute") -> str:
    return (f'<joint name="{name}" type="{kind}"><parent link="{parent}"/>'
            f'<child link="{child}"/><axis xyz="0 1 0"/>'
            '<limit lower="-1" upper="1" effort="5" velocity="3"/></joint>')


def test_urdf_errors_name_the_problem(tmp_path):
    with pytest.raises(InvalidInputError, match="no such file"):
        read_urdf(tmp_path / "none.urdf")
    with pytest.raises(InvalidInputError, match="not a readable URDF"):
        read_urdf(_write(tmp_path, "broken.urdf", "<robot"))
    links = "".join(f'<link name="{n}">{_LINK.format(m=1.0)}</link>' for n in "abc")
    branched = _robot(_joint("j1", "base", "a") + _joint("j2", "a", "b")
                      + _joint("j3", "a", "c"), links)
    with pytest.raises(InvalidInputError, match="'j3' hangs from joint 'j1'"):
        read_urdf(_write(tmp_path, "branched.urdf", branched))
    one = '<link name="a">' + _LINK.format(m=1.0) + "</link>"
    sliding = _robot(_joint("j1", "base", "a", "prismatic"), one)
    with pytest.raises(InvalidInputError, match="joint 'j1' is JointModelP"):
        read_urdf(_write(tmp_path, "sliding.urdf", sliding))
    massless = _robot(_joint("j1", "base", "a"), '<link name="a"/>')
    with pytest.raises(InvalidInputError, match="has mass 0.0"):
        read_urdf(_write(tmp_path, "massless.urdf", massless))
    with pytest.raises(InvalidInputError, match="a directory, not a file"):
        read_urdf(tmp_path)
    # a chain whose links close a loop: Pinocchio takes the tree from the root and dropped the
    # rest without a word, so an actuator file naming only the kept joints passed
    looped = _robot(_joint("j1", "base", "a") + _joint("j2", "c", "b")
                    + _joint("j3", "b", "c", "fixed"), links)
    with pytest.raises(InvalidInputError, match=r"joint\(s\) \['j2'\] do not hang from the "
                                                r"root link's tree \(a loop of links"):
        read_urdf(_write(tmp_path, "looped.urdf", looped))
    closed = _robot(_joint("j1", "base", "a") + _joint("j2", "a", "b")
                    + _joint("j3", "b", "base", "fixed"), links)
    with pytest.raises(InvalidInputError, match=r"\['j1', 'j2'\] do not hang from the root"):
        read_urdf(_write(tmp_path, "closed.urdf", closed))


def test_plant_file_errors_name_the_field(tmp_path):
    urdf = ARMS["arm_cork_seat"]
    with pytest.raises(InvalidInputError, match=r"missing \['elbow'\]"):
        plant_from_urdf(urdf, {"shoulder": {"mechanism": {"kind": "ideal"}}})
    with pytest.raises(InvalidInputError, match=r"unknown \['wrist'\]"):
        plant_from_urdf(urdf, {"shoulder": {"mechanism": {"kind": "ideal"}},
                               "elbow": {"mechanism": {"kind": "ideal"}},
                               "wrist": {"mechanism": {"kind": "ideal"}}})
    with pytest.raises(InvalidInputError, match="limit_stiffness"):
        plant_from_urdf(urdf, {"shoulder": {"mechanism": {"kind": "ideal"}},
                               "elbow": {"mechanism": {"kind": "ideal"},
                                         "limit_stiffness": -1}})
    with pytest.raises(InvalidInputError, match="all must be 'ideal'"):
        plant_from_urdf(urdf, {"shoulder": {"mechanism": {"kind": "ideal"}},
                               "elbow": {"mechanism": {"kind": "antagonistic"}}})
    plant_file = _write(tmp_path, "arm.yaml", f"urdf: {urdf}\nlinks: 2\n")
    with pytest.raises(InvalidInputError, match=r"unknown field\(s\) \['links'\]"):
        load_plant(plant_file)
    with pytest.raises(InvalidInputError, match="field 'urdf' = 3"):
        load_plant(_write(tmp_path, "arm3.yaml", "urdf: 3\n"))


def test_simulator_refuses_a_chain_of_other_joints():
    plant = load_plant(ARM_PLANT)
    joints = list(plant.joints)
    with pytest.raises(InvalidInputError, match="chain: joints"):
        Simulator(joints[::-1], plant.mechanism, chain=plant.chain)
    loaded = [joints[0].model_copy(update={"gravity_mass": 1.0, "com_distance": 0.1}), joints[1]]
    with pytest.raises(InvalidInputError, match="gravity_mass and com_distance must be 0"):
        Simulator(loaded, plant.mechanism, chain=plant.chain)
    with pytest.raises(InvalidInputError, match="replays skills over all its joints"):
        plant.for_joints(["elbow"])


def test_coupled_simulation_equals_an_rk4_loop_on_pinocchio_aba():
    """The batched simulator on the coupled arm (antagonistic springs, friction, end stops, a
    torque window and a wall) against an independent per-scenario RK4 loop whose accelerations
    come from Pinocchio's aba at every stage (same step, same stage times)."""
    from compliant_demo.perturbation import TorqueWindow, Wall
    from compliant_demo.sim.reference import reference_solve

    plant = load_plant(ARM_PLANT)
    model = pinocchio_model(ARMS["arm_cork_seat"])
    data = model.createData()
    n = 1500
    t = np.arange(n) * 1e-3
    equilibrium = np.stack([0.6 * np.sin(2 * t), 0.4 + 0.3 * np.sin(3 * t)], axis=1)
    stiffness = np.stack([40 + 30 * np.sin(t), 30 + 20 * np.cos(2 * t)], axis=1)
    schedules = [
        PerturbationSchedule(name="push", perturbations=[
            TorqueWindow(joint=1, onset_s=0.2, duration_s=0.3, magnitude=1.5, ramp_s=0.05)]),
        PerturbationSchedule(name="wall", perturbations=[
            Wall(joint=0, onset_s=0.1, duration_s=1.0, position=0.3, magnitude=400.0,
                 damping=2.0)]),
    ]
    run = simulate(plant.joints, plant.mechanism, equilibrium, stiffness, schedules=schedules,
                   chain=plant.chain, seed=5)
    for s in range(2):
        q_ref, _ = reference_solve(
            plant.joints, plant.mechanism, equilibrium, stiffness, schedules=schedules,
            scenario=s, seed=5, method="RK4",
            forward_dynamics=lambda q, dq, tau: pin.aba(model, data, q, dq, tau))
        assert np.abs(q_ref).max() > 0.2
        np.testing.assert_allclose(run.q[:, s], q_ref, rtol=0, atol=1e-9)
    assert run.in_contact[:, 1, 0].any()
    held = [PerturbationSchedule(name="held", perturbations=[
        Hold(joint=0, onset_s=0.1, duration_s=0.2)])]
    with pytest.raises(InvalidInputError, match="impulses and holds are not in the coupled"):
        reference_solve(plant.joints, plant.mechanism, equilibrium, stiffness, schedules=held,
                        method="RK4", forward_dynamics=lambda q, dq, tau: tau)


def test_schedule_check_on_the_coupled_arm_uses_the_mass_matrix_diagonal():
    """Damping ratio d / (2*sqrt((K + dg_j/dq_j)*M_jj(q))) along the path and deflection from
    the arm's inverse dynamics plus smoothed Coulomb friction, M, dg/dq and tau from Pinocchio
    (pin.crba, pin.computeGeneralizedGravityDerivatives, pin.rnea)."""
    from compliant_demo.evaluation import check_schedule
    from compliant_demo.primitives import Rollout

    plant = load_plant(ARM_PLANT)
    model = pinocchio_model(ARMS["arm_cork_seat"])
    data = model.createData()
    t = np.linspace(0.0, 1.0, 201)
    position = np.stack([0.5 * np.sin(2 * t), 0.3 + 0.4 * t], axis=1)
    velocity = np.stack([np.cos(2 * t), 0.4 + 0 * t], axis=1)
    acceleration = np.stack([-2 * np.sin(2 * t), 0 * t], axis=1)
    stiffness = np.full((201, 2), 60.0)
    rollout = Rollout(t=t, position=position, velocity=velocity, acceleration=acceleration,
                      stiffness=stiffness, damping=np.zeros((201, 2)),
                      joints=("shoulder", "elbow"), duration_s=1.0)
    report = check_schedule(rollout, plant.joints, list(plant.mechanisms or ()),
                            chain=plant.chain)
    diagonal = np.array([pin.crba(model, data, q).diagonal() for q in position])
    slope = np.array([pin.computeGeneralizedGravityDerivatives(model, data, q).diagonal()
                      for q in position])
    # central differences with a 1e-5 rad step: error ~ h^2 times the third derivative / 6
    np.testing.assert_allclose(report.gravity_stiffness, slope, rtol=0, atol=1e-7)
    viscous = np.array([j.viscous_damping for j in plant.joints])
    np.testing.assert_allclose(report.damping_ratio,
                               viscous / (2 * np.sqrt((60.0 + slope) * diagonal)), rtol=1e-8)
    torque = np.array([pin.rnea(model, data, q, dq, ddq)
                       for q, dq, ddq in zip(position, velocity, acceleration, strict=True)])
    coulomb = np.array([j.coulomb_friction for j in plant.joints])
    smoothing = np.array([j.friction_smoothing_velocity for j in plant.joints])
    torque += viscous * velocity + coulomb * np.tanh(velocity / smoothing)
    np.testing.assert_allclose(report.deflection, np.abs(torque) / 60.0, rtol=1e-10)
    independent = check_schedule(rollout, plant.joints, list(plant.mechanisms or ()))
    inertia = np.array([j.inertia for j in plant.joints])
    np.testing.assert_allclose(
        independent.damping_ratio[0],
        viscous / (2 * np.sqrt((60.0 + independent.gravity_stiffness[0]) * inertia)), rtol=1e-12)


def test_vectorisable_sine_and_cosine_match_libm():
    """The kernel's own sin/cos (Cody-Waite reduction, fdlibm polynomials) against the C
    library's, over +-20 rad (several turns past any joint range): within 2e-15."""
    from compliant_demo.sim.rigid_body import _sincos

    angles = np.random.default_rng(3).uniform(-20.0, 20.0, 20000)
    values = np.array([_sincos(x) for x in angles])
    assert np.max(np.abs(values[:, 0] - np.sin(angles))) <= 2e-15
    assert np.max(np.abs(values[:, 1] - np.cos(angles))) <= 2e-15


def _child_forward(q: np.ndarray) -> float:
    kernel = ChainKernel(read_urdf(ARMS["arm_cork_seat"])[0])
    out = np.zeros_like(q)
    kernel.forward(q, np.zeros_like(q), np.zeros_like(q), np.ones_like(q), out)
    return float(out.sum())


def test_serial_kernel_leaves_forked_workers_working():
    """Campaign workers are forked: the default (serial) kernel must not start a threading
    runtime that a forked child cannot use (GNU OpenMP aborts such a child)."""
    import multiprocessing

    q = np.full((2, 100), 0.3)
    expected = _child_forward(q)
    with multiprocessing.get_context("fork").Pool(2) as pool:
        assert pool.map_async(_child_forward, [q, q]).get(timeout=120) == [expected, expected]


def _prints_equal_in_a_child(script: str) -> None:
    """Run ``script`` in a separate interpreter (a parallel kernel starts numba's threads in its
    process) and check it printed ``equal``."""
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          timeout=600, check=False)
    assert done.returncode == 0 and done.stdout.strip() == "equal", done.stderr[-2000:]


def test_parallel_kernel_equals_the_serial_one():
    """In a separate interpreter (a parallel kernel starts numba's threads in its process)."""
    script = (
        "import numpy as np\n"
        "from compliant_demo.plant import load_plant\n"
        "from compliant_demo.sim.rigid_body import ChainKernel\n"
        f"plant = load_plant({str(ROOT / 'config' / 'arm7_example.yaml')!r})\n"
        "rng = np.random.default_rng(4)\n"
        "q, dq, tau = (rng.uniform(-2, 2, (7, 300)) for _ in range(3))\n"
        "free = np.ones((7, 300)); free[2, :50] = 0\n"
        "a, b = np.zeros((7, 300)), np.zeros((7, 300))\n"
        "ChainKernel(plant.chain).forward(q, dq, tau, free, a)\n"
        "ChainKernel(plant.chain, parallel=True).forward(q, dq, tau, free, b)\n"
        "assert np.array_equal(a, b), np.abs(a - b).max()\n"
        "print('equal')\n"
    )
    _prints_equal_in_a_child(script)


def test_parallel_simulation_equals_the_serial_one():
    """simulate(..., parallel=True) runs each step's blocks over numba's threads: the same
    numbers as on one thread, with perturbations of every kind (separate interpreter, as
    above)."""
    script = (
        "import numpy as np\n"
        "from compliant_demo.perturbation import (Hold, Impulse, PerturbationSchedule,\n"
        "                                         TorqueStep, Wall)\n"
        "from compliant_demo.plant import load_plant\n"
        "from compliant_demo.sim import simulate\n"
        f"plant = load_plant({str(ARM_PLANT)!r})\n"
        "kinds = [Impulse(onset_s=0.05, magnitude=0.02), TorqueStep(onset_s=0.1, magnitude=1.0,\n"
        "         duration_s=0.1), Wall(onset_s=0.02, position=0.01, magnitude=300.0,\n"
        "         duration_s=0.2), Hold(onset_s=0.15, duration_s=0.05, joint=1)]\n"
        "schedules = [PerturbationSchedule(perturbations=[kinds[s % 4]]) for s in range(300)]\n"
        "eq = np.tile([[0.2, 0.4]], (300, 1)); k = np.full((300, 2), 60.0)\n"
        "runs = [simulate(plant.joints, plant.mechanism, eq, k, schedules=schedules,\n"
        "                 decimation=7, seed=2, chain=plant.chain, parallel=p)\n"
        "        for p in (False, True)]\n"
        "for name in ('q', 'dq', 'tau_external', 'motor_torque'):\n"
        "    assert np.array_equal(getattr(runs[0], name), getattr(runs[1], name)), name\n"
        "assert np.array_equal(runs[0].energy.dissipated, runs[1].energy.dissipated)\n"
        "print('equal')\n"
    )
    _prints_equal_in_a_child(script)
