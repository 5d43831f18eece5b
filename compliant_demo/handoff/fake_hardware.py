"""The project's simulator behind a joint impedance controller's command interface, with faults.

:class:`FakeHardware` holds the latest equilibrium, stiffness and damping commands (as a forward
command controller does), advances the plant of :mod:`compliant_demo.plant` one step at a time
with :class:`compliant_demo.sim.Simulator`, and gives the joint-state samples a robot would
publish, through injectable faults (:class:`Faults`): feedback delay, dropped samples, frozen
feedback (the last sample sent again and again, stamp and values unchanged) and torque spikes on
the links. The fake hardware node serves it over ROS 2; the handoff benchmark runs it in-process.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, fields

import numpy as np
from numpy.typing import NDArray

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.generalisation import check_goal
from compliant_demo.plant import ReplayPlant
from compliant_demo.sim import Simulator

__all__ = ["Faults", "FakeHardware", "JointSample"]


@dataclass(frozen=True)
class Faults:
    """Faults injected between the simulated joint and its joint-state stream.

    Attributes
    ----------
    delay_s : float, s
        Every sample is given out this long after it was measured.
    drop_probability : float
        Chance that a sample is never given out (seeded, independent per sample).
    freeze_at_s, freeze_for_s : float, s
        From ``freeze_at_s`` on, for ``freeze_for_s``, the last sample before it is given out
        again in place of every new one (stamp and values unchanged); inf = never.
    spike_at_s, spike_for_s : float, s
        Window of an external torque spike on the links; inf = never.
    spike_torque : float, N*m
        Torque on every joint during the spike.
    seed : int
        Seed of the drops.
    """

    delay_s: float = 0.0
    drop_probability: float = 0.0
    freeze_at_s: float = math.inf
    freeze_for_s: float = math.inf
    spike_at_s: float = math.inf
    spike_for_s: float = 0.0
    spike_torque: float = 0.0
    seed: int = 0

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if item.name in ("spike_torque", "seed"):
                if not math.isfinite(value):
                    raise InvalidInputError(f"{item.name} = {value!r}: must be finite")
                continue
            if math.isnan(value) or value < 0:
                raise InvalidInputError(f"{item.name} = {value!r}: must be >= 0")
        if not math.isfinite(self.delay_s):
            raise InvalidInputError(f"delay_s = {self.delay_s!r}: must be finite")
        if self.drop_probability > 1:
            raise InvalidInputError(
                f"drop_probability = {self.drop_probability!r}: must lie in [0, 1]"
            )


@dataclass(frozen=True)
class JointSample:
    """One joint state as the robot would publish it: ``t`` (s, the simulated time it was
    measured), ``position`` (rad, through the encoder), ``velocity`` (rad/s) and ``effort``
    (N*m, the measured mechanism torque), each (n_joints,)."""

    t: float
    position: NDArray[np.float64]
    velocity: NDArray[np.float64]
    effort: NDArray[np.float64]


class FakeHardware:
    """A simulated joint impedance controller and robot, stepped one period at a time.

    Parameters
    ----------
    plant : ReplayPlant
    joints : names of the commanded joints, in command order (all of a coupled plant's)
    dt : float, s
        Simulation step and joint-state period.
    faults : Faults
    q0 : (n_joints,) array, rad, inside each joint's range, or None (the middle of the range)
    initial_stiffness : float, N*m/rad
        Stiffness held before the first stiffness command, equilibrium at ``q0``.
    seed : int
        Seed of the simulator's sensor noise.
    armed : bool
        Faults act from the start; False: only from :meth:`arm_faults` on, their times counted
        from then.
    """

    def __init__(self, plant: ReplayPlant, joints: list[str], dt: float, faults: Faults,
                 q0: NDArray[np.float64] | None = None, initial_stiffness: float = 20.0,
                 seed: int = 0, armed: bool = True) -> None:
        if len(set(joints)) != len(joints):
            raise InvalidInputError(f"joints = {list(joints)!r}: each joint may be named once")
        records = plant.for_joints(joints)
        if q0 is None:
            q0 = np.array([0.5 * (j.lower_limit + j.upper_limit) if math.isfinite(
                j.lower_limit + j.upper_limit) else 0.0 for j in records])
        else:  # a start beyond a limit would throw the joint off its stop at once
            check_goal(np.asarray(q0, dtype=float).ravel().tolist(), records, "q0")
        self.joints = list(joints)
        self.dt = float(dt)
        self.faults = faults
        self._simulator = Simulator(records, plant.mechanisms_for(joints), dt=dt, q0=q0,
                                    seed=int(seed), chain=plant.chain)
        n = len(joints)
        self.equilibrium = np.asarray(q0, dtype=float).copy()
        self.stiffness = np.full(n, float(initial_stiffness))
        self.damping: NDArray[np.float64] | None = None
        self._rng = np.random.default_rng(faults.seed)
        self._queue: deque[tuple[float, JointSample]] = deque()
        self._frozen: JointSample | None = None
        self._last_given: JointSample | None = None
        self.t = 0.0
        self.armed = bool(armed)
        self._fault_origin = 0.0
        self.true_q = self.equilibrium.copy()
        self.commands_taken = 0

    def command(self, equilibrium: NDArray[np.float64] | None = None,
                stiffness: NDArray[np.float64] | None = None,
                damping: NDArray[np.float64] | None = None) -> None:
        """Take the commands given (each (n_joints,), rad, N*m/rad, N*m*s/rad; stiffness and
        damping >= 0) and hold them."""
        n = len(self.joints)
        for name, value in (("equilibrium", equilibrium), ("stiffness", stiffness),
                            ("damping", damping)):
            if value is None:
                continue
            array = np.asarray(value, dtype=float)
            if array.shape != (n,) or not np.isfinite(array).all() or (
                name != "equilibrium" and (array < 0).any()
            ):
                rule = "finite values" if name == "equilibrium" else "finite values >= 0"
                raise InvalidInputError(
                    f"{name}: expected {n} {rule}, got {np.asarray(value).tolist()!r}"
                )
            setattr(self, name, array.copy())
        self.commands_taken += 1

    def arm_faults(self) -> None:
        """Let the faults act from now on, their times counted from now."""
        self.armed, self._fault_origin = True, self.t

    @property
    def frozen_sample(self) -> JointSample | None:
        """The sample given out again and again while the feedback is frozen, else None."""
        return self._frozen

    def step(self) -> list[JointSample]:
        """Advance one period under the held commands; the samples due now (after the faults)."""
        faults = self.faults if self.armed else _NO_FAULTS
        t0 = self.t - self._fault_origin
        spike = faults.spike_at_s <= t0 < faults.spike_at_s + faults.spike_for_s
        torque = np.full(len(self.joints), faults.spike_torque) if spike else None
        state = self._simulator.step(self.equilibrium, self.stiffness, self.damping,
                                     external_torque=torque)
        self.t = float(state.t)
        self.true_q = state.q[0].copy()
        sample = JointSample(self.t, state.q_measured[0].copy(), state.dq[0].copy(),
                             state.tau_measured[0].copy())
        if self._rng.random() >= faults.drop_probability:
            self._queue.append((self.t + faults.delay_s, sample))
        due: list[JointSample] = []
        while self._queue and self._queue[0][0] <= self.t + 1e-12:
            due.append(self._queue.popleft()[1])
        elapsed = self.t - self._fault_origin
        frozen = faults.freeze_at_s <= elapsed < faults.freeze_at_s + faults.freeze_for_s
        if frozen:
            if self._frozen is None:
                self._frozen = self._last_given
            return [] if self._frozen is None else [self._frozen]
        self._frozen = None
        if due:
            self._last_given = due[-1]
        return due


_NO_FAULTS = Faults()
