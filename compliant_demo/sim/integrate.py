"""Batched fixed-step simulation of variable-stiffness joints with energy bookkeeping.

All scenarios and joints advance together: the state is one ``(rows, n_joints, n_scenarios)``
array (angle, velocity, actuator states, then three work integrals), and each step is one call
of the compiled step (:mod:`.step_kernel`), with no Python loop over scenarios; events, commands
and recording stay here. Commands are
held constant over a step (zero-order hold, as a digital controller applies them). Work
integrals are integrated by the same method as the state, so the energy balance closes to the
method's accuracy; :class:`Simulator` steps one command at a time for a real-time replay node,
:func:`simulate` runs whole command arrays and records at a decimation.

Without a chain each joint is an independent pendulum; with a :class:`ChainParams` the joint
torques go through the coupled arm's compiled forward dynamics (:mod:`.rigid_body`).
"""

from __future__ import annotations

import bisect
import math
import mmap
import warnings
from collections.abc import Sequence

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import ChainParams, JointParams
from compliant_demo.perturbation import PerturbationSchedule
from compliant_demo.sim.mechanisms import MechanismLike, make_mechanism
from compliant_demo.sim.observe_kernel import BOOL_CHANNELS, FLOAT_CHANNELS, observe_batch
from compliant_demo.sim.results import EnergyTraces, SimResult, StepState
from compliant_demo.sim.rigid_body import apparent_inertia, block_workspace, chain_kernel
from compliant_demo.sim.schedule import compile_schedules
from compliant_demo.sim.stability import METHODS, check_step_stability
from compliant_demo.sim.step_kernel import (
    CONTACT_DAMPING_DEPTH,
    METHOD_CODES,
    N_PARAMS,
    PARAM_ROWS,
    rhs_batch,
    step_batch,
)

__all__ = [
    "GRAVITY",
    "CONTACT_DAMPING_DEPTH",
    "Simulator",
    "simulate",
]

GRAVITY = 9.80665  # standard gravity, m/s^2 (ISO 80000-3)
_CHUNK_STEPS = 256
# rows of the three work integrals after the dynamic rows, and of the torque groups they
# integrate: mechanism springs, passive (friction, mechanism damping, end stops), perturbations
_N_WORK = 3
# recorded channels the Python side completes (see observe_kernel)
_TAU_MEASURED, _TAU_EXTERNAL, _KINETIC, _GRAVITY_POTENTIAL = (
    FLOAT_CHANNELS.index(name)
    for name in ("tau_measured", "tau_external", "kinetic", "gravity_potential"))
_CLAMPED = BOOL_CHANNELS.index("commands_clamped")


def _record_zeros(shape: tuple[int, ...], dtype: type = float) -> np.ndarray:
    """A zeroed array for a run's record, in an anonymous memory map of its own.

    numpy asks the kernel to back arrays of 4 MiB and more with huge pages; where the kernel
    honours that by compacting memory at the first touch (transparent huge pages with defrag
    "madvise", a common default), a 1,000-scenario record cost about 0.4 s of system time
    per run here. An anonymous map gets ordinary pages, zeroed by the kernel as calloc's are.
    """
    count = math.prod(shape)
    buffer = mmap.mmap(-1, max(count * np.dtype(dtype).itemsize, 1))
    return np.frombuffer(buffer, dtype=dtype, count=count).reshape(shape)


def _column(joints: Sequence[JointParams], value) -> np.ndarray:
    return np.array([[float(value(j))] for j in joints])


def _per_scenario(
    name: str, value, n_scen: int, n_joints: int, minimum: float | None = None
) -> np.ndarray:
    """(J, S) array from None, a scalar, (n_joints,) or (n_scen, n_joints)."""
    arr = np.asarray(0.0 if value is None else value, dtype=float)
    if arr.ndim == 0 or arr.shape == (n_joints,):
        arr = np.broadcast_to(arr, (n_scen, n_joints))
    if arr.shape != (n_scen, n_joints):
        raise InvalidInputError(
            f"{name}: shape {arr.shape}, expected ({n_joints},) or ({n_scen}, {n_joints})"
        )
    _check_finite(name, arr, minimum)
    return np.ascontiguousarray(arr.T)


def _check_finite(name: str, arr: np.ndarray, minimum: float | None = None) -> None:
    bad = ~np.isfinite(arr)
    if bad.any():
        index = tuple(int(i) for i in np.argwhere(bad)[0])
        raise InvalidInputError(f"{name}[{index}] = {arr[index]}: values must be finite")
    if minimum is not None and (arr < minimum).any():
        index = tuple(int(i) for i in np.argwhere(arr < minimum)[0])
        raise InvalidInputError(f"{name}[{index}] = {arr[index]}: must be >= {minimum}")


def _commands(name: str, value, n_joints: int, minimum: float | None = None) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name}: not a numeric array") from None
    if arr.ndim not in (2, 3) or arr.shape[-1] != n_joints or arr.shape[0] < 1:
        raise InvalidInputError(
            f"{name}: shape {arr.shape}, expected (n_steps, {n_joints}) or "
            f"(n_steps, n_scenarios, {n_joints}) with n_steps >= 1"
        )
    _check_finite(name, arr, minimum)
    return arr


def _chunk_commands(arr: np.ndarray | None, k0: int, k1: int) -> np.ndarray | None:
    """(C, J, S') view of steps [k0, k1) from (n, J) or (n, S, J) commands."""
    if arr is None:
        return None
    part = arr[k0:k1]
    return part[:, :, None] if part.ndim == 2 else part.transpose(0, 2, 1)


class Simulator:
    """A batch of scenarios of the same joints and mechanism, advanced one step at a time.

    Parameters
    ----------
    joints : joint parameters, one per joint
    mechanism : mechanism record shared by the joints, or one per joint (same kind)
    n_scenarios : scenarios in the batch
    dt : integration step, s
    method : "rk4" (default), "symplectic_euler" (fast) or "explicit_euler" (comparison only)
    q0, dq0 : initial angle, rad, and velocity, rad/s: None (angle: the equilibrium of the
        first command; velocity: 0), a scalar, (n_joints,) or (n_scenarios, n_joints)
    schedules : one perturbation schedule per scenario, or None
    seed : seeds torque-sensor noise and random torques without their own seed
    check_stability : refuse a step above the largest stable one (UnstableStepError)
    horizon_steps : steps the run will last, if known; a perturbation that would start at or
        after it is reported with a warning (it can never act)
    chain : the coupled rigid-body model of the joints (same names, same order), or None for
        independent joints; the joints then carry no gravity load of their own
    parallel : run the chain's dynamics on all of numba's threads (default: one)

    Notes
    -----
    Actuator states start at the targets of the first command, so a run starts in steady state.
    With a chain, an impulse on a joint changes every free joint's velocity by
    ``M(q)^-1 * impulse``, a hold stops its joint alone; ``kinetic`` is split per joint as
    ``1/2 * dq_j * (M dq)_j`` and ``gravity_potential`` per link, so only their sum over joints
    balances the work done (energy flows between joints through the coupling).
    """

    def __init__(
        self,
        joints: Sequence[JointParams],
        mechanism: MechanismLike | Sequence[MechanismLike],
        n_scenarios: int = 1,
        dt: float = 1e-3,
        method: str = "rk4",
        q0=None,
        dq0=None,
        schedules: Sequence[PerturbationSchedule] | None = None,
        seed: int | None = None,
        check_stability: bool = True,
        horizon_steps: int | None = None,
        chain: ChainParams | None = None,
        parallel: bool = False,
    ) -> None:
        joints = list(joints)
        if not joints or not all(isinstance(j, JointParams) for j in joints):
            raise InvalidInputError("joints: expected a non-empty sequence of JointParams")
        self._chain = None if chain is None else chain_kernel(chain, joints, parallel)
        self._parallel = bool(parallel)
        if method not in METHODS:
            raise InvalidInputError(f"method = {method!r}: expected one of {', '.join(METHODS)}")
        if not isinstance(n_scenarios, int) or n_scenarios < 1:
            raise InvalidInputError(f"n_scenarios = {n_scenarios!r}: expected an integer >= 1")
        if schedules is not None and len(schedules) != n_scenarios:
            raise InvalidInputError(
                f"schedules: {len(schedules)} given for n_scenarios = {n_scenarios}"
            )
        if not (isinstance(dt, float | int) and math.isfinite(dt) and dt > 0):
            raise InvalidInputError(f"dt = {dt!r}: expected a positive, finite step in s")
        self.joints = joints
        self.dt = float(dt)
        self.method = method
        self.n_scenarios = n_scenarios
        n_joints = len(joints)
        self._kernel = make_mechanism(mechanism, n_joints)
        self._perturb = compile_schedules(
            schedules,
            n_scenarios,
            [j.inertia for j in joints],
            self.dt,
            seed,
        )
        self._horizon_steps = horizon_steps
        late = [] if horizon_steps is None else self._perturb.starts_at_or_after(horizon_steps)
        if late:
            shown = ", ".join(late[:3]) + (", ..." if len(late) > 3 else "")
            warnings.warn(
                f"{len(late)} perturbation(s) start after the run's {horizon_steps} steps and "
                f"never act: {shown}",
                stacklevel=2,
            )
        if check_stability:
            wall_k, wall_b = self._perturb.wall_stiffness()
            checked = joints if self._chain is None else apparent_inertia(joints, self._chain)
            check_step_stability(checked, mechanism, self.dt, method, wall_k, wall_b)
        # sensor noise of the sample at step k comes from its own stream (seed, k), so a run
        # stepped one command at a time measures exactly what a whole-array run does
        self._noise_seed = (
            seed if seed is not None else int(np.random.SeedSequence().generate_state(1)[0])
        )
        self._setup_joints(joints)
        self._setup_state(n_joints, n_scenarios, q0, dq0)
        self._setup_events()

    # ----------------------------------------------------------------- set-up
    def _setup_joints(self, joints: Sequence[JointParams]) -> None:
        self._inertia = _column(joints, lambda j: j.inertia)
        self._noise = _column(joints, lambda j: j.torque_noise_std)
        rows = {
            "neg_viscous": [-j.viscous_damping for j in joints],
            "neg_coulomb": [-j.coulomb_friction for j in joints],
            "inv_smoothing": [1.0 / j.friction_smoothing_velocity for j in joints],
            "neg_mgl": [-j.gravity_mass * GRAVITY * j.com_distance for j in joints],
            "gravity_offset": [j.gravity_offset for j in joints],
            "lower": [j.lower_limit for j in joints],
            "upper": [j.upper_limit for j in joints],
            "stop_stiffness": [j.limit_stiffness for j in joints],
            "stop_damping": [j.limit_damping for j in joints],
            "inertia": self._inertia[:, 0],
            "encoder_resolution": [j.encoder_resolution for j in joints],
            **self._kernel.step_constants(),
        }
        # the compiled step's per-joint constants, one row each (step_kernel.PARAM_ROWS)
        self._params = np.array([rows[name] for name in PARAM_ROWS], dtype=float)
        assert self._params.shape == (N_PARAMS, len(joints))

    def _setup_state(self, n_joints: int, n_scen: int, q0, dq0) -> None:
        n_act = self._kernel.n_actuators
        self._n_dyn = 2 + n_act
        rows = self._n_dyn + _N_WORK
        shape = (n_joints, n_scen)
        self._inv_inertia_full = np.broadcast_to(1.0 / self._inertia, shape).copy()
        self._accel_scale = self._inv_inertia_full.copy()
        self._y = np.zeros((rows, *shape))
        self._q0 = None if q0 is None else _per_scenario("q0", q0, n_scen, n_joints)
        self._y[1] = _per_scenario("dq0", dq0, n_scen, n_joints)
        self._stages = np.zeros((4, rows, *shape))
        self._stage_state = np.zeros((self._n_dyn, *shape))
        self._acc = np.zeros((rows, *shape))
        self._torques = np.zeros((_N_WORK, *shape))
        self._mech_damping = np.zeros(shape)
        self._gravity_torque = np.zeros(shape)  # independent joints only
        self._deflection = np.zeros(shape)
        self._zero = np.zeros(shape)
        self._no_external = np.zeros((3, 1, 1))
        self._free = np.ones(shape)
        self._jumps = np.zeros(shape)  # perturbation work done in jumps (impulses, hold onsets)
        self._injection = np.zeros(shape)
        self._potential0 = np.zeros((2, *shape))  # spring and end-stop potential at the start
        self._step_index = 0
        self._events_applied = -1
        self._started = False
        if self._chain is not None:
            model = self._chain.model
        else:  # arrays of the chain's types that the compiled step never reads
            model = (np.zeros((0, 3, 3)), np.zeros((0, 3)), np.zeros(0, dtype=bool),
                     np.zeros(0), np.zeros((0, 3)), np.zeros((0, 3, 3)), np.zeros((0, 10)),
                     np.zeros(3))
        self._model = model
        self._workspace = block_workspace(n_joints, n_scen if self._chain is not None else 0,
                                          self._parallel)

    def _setup_events(self) -> None:
        events: dict[int, list[tuple]] = {}
        for s, j, step, impulse in self._perturb.impulses:
            events.setdefault(step, []).append((1, "impulse", j, s, impulse))
        for s, j, start, stop in self._perturb.holds:
            events.setdefault(start, []).append((2, "hold_on", j, s))
            events.setdefault(stop, []).append((0, "hold_off", j, s))
        for w in self._perturb.walls:
            events.setdefault(w.start, []).append((2, "wall_on", w))
            events.setdefault(w.stop, []).append((0, "wall_off", w))
        # releases first, then impulses, then new holds and walls
        self._events = {k: sorted(v, key=lambda e: e[0]) for k, v in events.items()}
        self._event_steps = sorted(self._events)
        # active walls per layer, joint and scenario: (position, side, stiffness, damping); an
        # inactive slot has side 1 and no stiffness or damping, so it pushes with zero force
        layers = (self._perturb.n_wall_layers, *self._y.shape[1:])
        self._walls = np.zeros((4, *layers))
        self._walls[1] = 1.0
        self._wall_on = np.zeros(layers, dtype=bool)

    def _start(self, targets: np.ndarray) -> None:
        """Put actuators at the first targets and the link at rest there (or at q0)."""
        act = self._y[2 : self._n_dyn]
        act[...] = np.broadcast_to(targets[: self._kernel.n_actuators], act.shape)
        equilibrium = self._kernel.equilibrium(act, targets)
        self._y[0] = equilibrium if self._q0 is None else self._q0
        start = self._observe(targets, None, False)
        self._potential0[0] = start["spring_potential"]
        self._potential0[1] = start["end_stop_potential"]
        self._initial_total = (
            start["kinetic"]
            + start["spring_potential"]
            + start["gravity_potential"]
            + start["end_stop_potential"]
        )
        self._started = True

    # ----------------------------------------------------------------- model
    def _kinetic(self, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
        if self._chain is not None:
            return self._chain.kinetic_split(q, dq)
        return 0.5 * self._inertia * dq * dq

    def _compiled_arguments(self) -> tuple:
        """What the compiled step reads after the targets and external torques, in its order."""
        return (self._params, self._walls, self._kernel.kind, self._chain is not None,
                self._free, self._accel_scale, self._model, self._workspace, self._zero)

    def _rhs(
        self, y: np.ndarray, targets: np.ndarray, ext: np.ndarray | None, f: np.ndarray
    ) -> None:
        """State derivative ``f`` at ``y`` (rows: q, dq, actuators, three work rates); leaves
        the torques in ``_torques``, ``_mech_damping`` and ``_gravity_torque``."""
        external = self._no_external if ext is None else np.ascontiguousarray(ext)[None]
        rhs_batch(y, targets, external, ext is not None,
                  *self._compiled_arguments(), self._torques, self._mech_damping,
                  self._gravity_torque, f)

    # ----------------------------------------------------------------- stepping
    def _advance(self, targets: np.ndarray, ext: np.ndarray | None, c0: int, c1: int) -> None:
        """Steps c0 .. c1 - 1 of a chunk of the chosen method in one compiled call; ``targets``
        is (C, n_targets, J, S) and contiguous, ``ext`` (C, 3, J, S) stage torques or None."""
        step_batch[self._parallel](
            METHOD_CODES[self.method], self.dt, self._y, targets,
            self._no_external[None] if ext is None else ext, ext is not None, c0, c1,
            *self._compiled_arguments(), self._stages, self._stage_state, self._acc,
            self._torques, self._mech_damping, self._gravity_torque, self._deflection,
            self._injection)
        self._step_index += c1 - c0

    def _next_event(self, step: int) -> int:
        """The first step after ``step`` at which an event happens (a large number if none)."""
        following = bisect.bisect_right(self._event_steps, step)
        return self._event_steps[following] if following < len(self._event_steps) else 2**62

    def _apply_events(self, step: int) -> None:
        if step == self._events_applied:
            return
        self._events_applied = step
        y = self._y
        for event in self._events.get(step, ()):
            name = event[1]
            if name == "impulse" and self._chain is not None:
                self._chain_impulse(*event[2:])
            elif name == "impulse":
                _, _, j, s, impulse = event
                if self._free[j, s]:
                    before = y[1, j, s]
                    y[1, j, s] += impulse / self._inertia[j, 0]
                    self._jumps[j, s] += 0.5 * self._inertia[j, 0] * (y[1, j, s] ** 2 - before**2)
            elif name == "hold_on":
                _, _, j, s = event
                before = self._kinetic(y[0, :, s : s + 1], y[1, :, s : s + 1]).sum()
                y[1, j, s] = 0.0
                after = self._kinetic(y[0, :, s : s + 1], y[1, :, s : s + 1]).sum()
                self._jumps[j, s] += after - before
                self._free[j, s] = 0.0
            elif name == "hold_off":
                self._free[event[2], event[3]] = 1.0
            else:
                wall = event[2]
                slot = (slice(None), wall.layer, wall.joint, wall.scenario)
                on = name == "wall_on"
                if on:
                    here = y[0, wall.joint, wall.scenario] if wall.relative else 0.0
                    self._walls[slot] = (wall.position + here, wall.side, wall.stiffness,
                                         wall.damping)
                else:
                    self._walls[slot] = (0.0, 1.0, 0.0, 0.0)
                self._wall_on[slot[1:]] = on
        np.multiply(self._inv_inertia_full, self._free, out=self._accel_scale)

    def _chain_impulse(self, j: int, s: int, impulse: float) -> None:
        """Velocity jump M^-1 * impulse on the free joints of scenario s (none if j is held)."""
        if not self._free[j, s]:
            return
        assert self._chain is not None
        q, dq = self._y[0, :, s : s + 1], self._y[1, :, s : s + 1]
        free = self._free[:, s] != 0
        mass = self._chain.mass_matrix(q)[0][np.ix_(free, free)]
        kick = np.zeros(int(free.sum()))
        kick[int(free[:j].sum())] = impulse
        before = float(dq[j, 0])
        dq[free, 0] += np.linalg.solve(mass, kick)
        # kinetic energy gained, 1/2 (v + dv)^T M (v + dv) - 1/2 v^T M v with M dv the impulse
        # on joint j alone: impulse * (v_j before + v_j after) / 2
        self._jumps[j, s] += impulse * 0.5 * (before + dq[j, 0])

    # ----------------------------------------------------------------- observation
    def _observe(
        self, targets: np.ndarray, ext: np.ndarray | None, clamped
    ) -> dict[str, np.ndarray]:
        """Everything recorded at the current state, (J, S) arrays."""
        shape = self._y.shape[1:]
        floats = np.zeros((len(FLOAT_CHANNELS), 1, *shape))
        bools = np.zeros((len(BOOL_CHANNELS), 1, *shape), dtype=bool)
        actuators = np.zeros((1, self._kernel.n_actuators, *shape))
        self._observe_into(floats, bools, actuators, 0, targets, ext, clamped)
        return {**{name: floats[i, 0] for i, name in enumerate(FLOAT_CHANNELS)},
                **{name: bools[i, 0] for i, name in enumerate(BOOL_CHANNELS)}}

    def _observe_into(self, floats, bools, actuators, row, targets, ext, clamped) -> None:
        """Record row ``row`` of ``(channels, n_rec, J, S)`` records and ``(n_rec, n_actuators,
        J, S)`` actuator outputs at the current state; leaves stage 0 in place."""
        y = self._y
        self._rhs(y, targets, ext, self._stages[0])
        observe_batch(y, targets, self._stages[0], self._torques, self._mech_damping,
                      self._params, self._kernel.kind, self._chain is not None, self._walls,
                      self._wall_on, self._free, self._potential0, self._jumps, self._injection,
                      floats, bools, actuators, row)
        bools[_CLAMPED, row] = clamped
        q, dq = y[0], y[1]
        if self._chain is not None:
            self._chain.energies(q, dq, floats[_KINETIC, row], floats[_GRAVITY_POTENTIAL, row])
        if not self._free.all():  # a hold's reaction cancels every other torque on the still link
            net = self._torques.sum(axis=0)
            if self._chain is not None:
                net -= self._chain.inverse(q, dq, self._stages[0][1])
            else:
                net += self._gravity_torque
            floats[_TAU_EXTERNAL, row] -= np.where(self._free == 0.0, net, 0.0)
        if self._noise.any():
            stream = np.random.default_rng([self._noise_seed, self._step_index])
            floats[_TAU_MEASURED, row] += self._noise * stream.standard_normal(q.shape)

    # ----------------------------------------------------------------- public API
    @property
    def t(self) -> float:
        """Simulated time, s."""
        return self._step_index * self.dt

    def _targets(self, equilibrium, stiffness, damping):
        if damping is not None and not self._kernel.has_damping_input:
            warnings.warn(
                "damping commands are ignored: the antagonistic mechanism has no damping input",
                stacklevel=3,
            )
            damping = None
        return self._kernel.command_targets(equilibrium, stiffness, damping)

    def step(self, equilibrium, stiffness, damping=None, external_torque=None) -> StepState:
        """Advance one step under the given commands.

        Parameters
        ----------
        equilibrium : (n_scen, n_joints) or (n_joints,) array, rad
        stiffness : same shape, N*m/rad
        damping : same shape, N*m*s/rad, or None (the mechanism's lowest; ignored, with a
            warning, by mechanisms without a damping input)
        external_torque : (n_scen, n_joints) or (n_joints,) array, N*m, held over the step, or None

        Returns
        -------
        StepState
            The state at the end of the step.
        """
        n_joints, n_scen = self._y.shape[1:]
        cmd = [
            None if v is None else _per_scenario(name, v, n_scen, n_joints, minimum)[None]
            for name, v, minimum in (
                ("equilibrium", equilibrium, None),
                ("stiffness", stiffness, 0.0),
                ("damping", damping, 0.0),
            )
        ]
        targets, flags = self._targets(*cmd)
        targets = np.ascontiguousarray(np.broadcast_to(targets, (*targets.shape[:3], n_scen)))
        clamped = np.logical_or.reduce(list(flags.values()))[0]
        live = (None if external_torque is None
                else _per_scenario("external_torque", external_torque, n_scen, n_joints))
        ext = np.zeros((1, 3, n_joints, n_scen))
        touched = self._perturb.fill_torque(ext, self._step_index)
        if live is not None:
            ext += live
            touched = True
        if not self._started:
            self._start(targets[0])
        self._apply_events(self._step_index)
        self._advance(targets, ext if touched else None, 0, 1)
        self._apply_events(self._step_index)
        observed = ext[0, 2] if touched else None
        if self._step_index != self._horizon_steps:
            # Record the external torque as :meth:`run` records a sample: as it acts at the start
            # of the next step, so a torque that jumps on the grid shows its new value at the
            # sample where it starts (the last sample of a known horizon keeps the step's end).
            # A live torque is held until the next command replaces it.
            following = np.zeros((1, 3, n_joints, n_scen))
            scheduled = self._perturb.fill_torque(following, self._step_index)
            if live is not None:
                following[0, 0] += live
            observed = following[0, 0] if scheduled or live is not None else None
        obs = self._observe(targets[0], observed, clamped)
        return StepState(
            t=self.t, **{k: np.array(obs[k].T) for k in StepState.__dataclass_fields__ if k != "t"}
        )

    def run(
        self,
        equilibrium,
        stiffness,
        damping=None,
        decimation: int = 1,
    ) -> SimResult:
        """Run whole command arrays from the current state (see :func:`simulate`)."""
        n_joints, n_scen = self._y.shape[1:]
        if not isinstance(decimation, int) or isinstance(decimation, bool) or decimation < 1:
            raise InvalidInputError(f"decimation = {decimation!r}: expected an integer >= 1")
        eq_arr = _commands("equilibrium", equilibrium, n_joints)
        commands: list[np.ndarray | None] = [
            eq_arr,
            _commands("stiffness", stiffness, n_joints, 0.0),
            None if damping is None else _commands("damping", damping, n_joints, 0.0),
        ]
        n_steps = eq_arr.shape[0]
        for name, arr in zip(("equilibrium", "stiffness", "damping"), commands, strict=True):
            if arr is None:
                continue
            if arr.shape[0] != n_steps or (arr.ndim == 3 and arr.shape[1] != n_scen):
                raise InvalidInputError(
                    f"{name}: shape {arr.shape} does not match {n_steps} steps and "
                    f"{n_scen} scenarios"
                )
        n_rec = n_steps // decimation + 1
        # recorded joint-major like the state; turned to (n_rec, n_scen, n_joints) at the end
        floats = _record_zeros((len(FLOAT_CHANNELS), n_rec, n_joints, n_scen))
        bools = _record_zeros((len(BOOL_CHANNELS), n_rec, n_joints, n_scen), dtype=bool)
        actuators = _record_zeros((n_rec, self._kernel.n_actuators, n_joints, n_scen))
        counts = {name: np.zeros((n_scen, n_joints), dtype=np.int64)
                  for name in self._kernel.clamp_names}
        ext_chunk = np.zeros((_CHUNK_STEPS, 3, n_joints, n_scen))
        first = self._step_index
        targets = ext = clamped = None
        for k0 in range(0, n_steps, _CHUNK_STEPS):
            k1 = min(k0 + _CHUNK_STEPS, n_steps)
            chunk_targets, flags = self._targets(
                *(_chunk_commands(arr, k0, k1) for arr in commands)
            )
            # targets for every scenario, contiguous: what the compiled step reads
            chunk_targets = np.ascontiguousarray(
                np.broadcast_to(chunk_targets, (*chunk_targets.shape[:3], n_scen)))
            any_clamped = np.logical_or.reduce(list(flags.values()))
            for name, flag in flags.items():
                counts[name] += np.broadcast_to(flag.sum(axis=0), (n_joints, n_scen)).T
            ext_chunk.fill(0.0)
            touched = self._perturb.fill_torque(ext_chunk[: k1 - k0], first + k0)
            if not self._started:
                self._start(chunk_targets[0])
            c, n_chunk = 0, k1 - k0
            while c < n_chunk:  # runs of steps without an event or a sample in one call
                k = k0 + c
                self._apply_events(first + k)
                if k % decimation == 0:
                    stage = ext_chunk[c, 0] if touched else None
                    self._observe_into(floats, bools, actuators, k // decimation,
                                       chunk_targets[c], stage, any_clamped[c])
                stop = min(n_chunk, c + decimation - k % decimation,
                           self._next_event(first + k) - first - k0)
                self._advance(chunk_targets, ext_chunk if touched else None, c, stop)
                c = stop
            targets, clamped = chunk_targets[n_chunk - 1], any_clamped[n_chunk - 1]
            ext = ext_chunk[n_chunk - 1] if touched else None
        if n_steps % decimation == 0:
            self._apply_events(first + n_steps)
            stage = None if ext is None else ext[2]
            self._observe_into(floats, bools, actuators, n_rec - 1, targets, stage, clamped)
        # transposed views: a copy would cost more than the run's recording itself
        record = {**{name: floats[i].transpose(0, 2, 1) for i, name in enumerate(FLOAT_CHANNELS)},
                  **{name: bools[i].transpose(0, 2, 1) for i, name in enumerate(BOOL_CHANNELS)}}
        actuators = actuators.transpose(0, 1, 3, 2)
        energy = EnergyTraces(
            **{name: record[name] for name in EnergyTraces.__dataclass_fields__
               if name != "initial_total"},
            initial_total=np.array(self._initial_total.T),
        )
        return SimResult(
            t=(first + np.arange(n_rec) * decimation) * self.dt,
            **{name: record[name] for name in SimResult.__dataclass_fields__ if name in record},
            actuators=actuators,
            clamp_counts=counts,
            energy=energy,
            dt=self.dt,
            decimation=decimation,
            method=self.method,
            joint_names=tuple(j.name for j in self.joints),
        )


def simulate(
    joints: Sequence[JointParams],
    mechanism: MechanismLike | Sequence[MechanismLike],
    equilibrium,
    stiffness,
    damping=None,
    schedules: Sequence[PerturbationSchedule] | None = None,
    q0=None,
    dq0=None,
    dt: float = 1e-3,
    method: str = "rk4",
    decimation: int = 1,
    seed: int | None = None,
    check_stability: bool = True,
    chain: ChainParams | None = None,
    parallel: bool = False,
) -> SimResult:
    """Simulate a batch of perturbed scenarios under zero-order-held commands.

    Parameters
    ----------
    joints : joint parameters, one per joint
    mechanism : mechanism record shared by the joints, or one per joint
    equilibrium : (n_steps, n_joints) shared or (n_steps, n_scen, n_joints) array, rad;
        row k is held over [k*dt, (k+1)*dt)
    stiffness : same layout, N*m/rad (>= 0; clamped to the mechanism's range and reported)
    damping : same layout, N*m*s/rad, or None (ideal mechanism: its lowest damping)
    schedules : one :class:`PerturbationSchedule` per scenario; n_scen = len(schedules), else
        the scenario axis of 3-D commands, else 1
    q0, dq0 : initial angle, rad, and velocity, rad/s (see :class:`Simulator`)
    dt : step, s; method : "rk4" | "symplectic_euler" | "explicit_euler"
    decimation : record every ``decimation`` steps (n_rec = n_steps // decimation + 1)
    seed : seeds sensor noise and unseeded random torques
    check_stability : raise UnstableStepError when ``dt`` is above the largest stable step
    chain : coupled rigid-body model of the joints, or None (see :class:`Simulator`)
    parallel : run the chain's dynamics on all of numba's threads

    Returns
    -------
    SimResult
    """
    n_scen = 1
    for arr in (equilibrium, stiffness, damping):
        if arr is not None and np.ndim(arr) == 3:
            n_scen = np.shape(arr)[1]
    if schedules is not None:
        schedules = list(schedules)
        n_scen = len(schedules)
        if n_scen == 0:
            raise InvalidInputError("schedules: empty; give one schedule per scenario or None")
    sim = Simulator(
        joints, mechanism, n_scenarios=n_scen, dt=dt, method=method, q0=q0, dq0=dq0,
        schedules=schedules, seed=seed, check_stability=check_stability,
        horizon_steps=np.shape(equilibrium)[0] if np.ndim(equilibrium) >= 1 else None,
        chain=chain, parallel=parallel,
    )
    return sim.run(equilibrium, stiffness, damping, decimation=decimation)
