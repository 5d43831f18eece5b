"""Stiffness mechanisms: from (equilibrium, stiffness, damping) commands to torque on the link.

Each mechanism turns commands into actuator targets (clamping what it cannot realise and saying
so), hands the compiled step (:mod:`.step_kernel`, which moves the actuators towards the targets
with a first-order lag and a rate limit and puts the springs' torque on the link) its constants,
which also serve the compiled recording (:mod:`.observe_kernel`: spring energy, realised
stiffness, tensions and motor torques).
Arrays are laid out joint-major, ``(..., n_joints, n_scenarios)``, with per-joint parameters as
``(n_joints, 1)`` columns, so every operation broadcasts along the long scenario axis. The
antagonistic closed forms are public for tests and tools.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import cast

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams, IdealImpedanceParams
from compliant_demo.sim.step_kernel import ANTAGONISTIC, IDEAL

__all__ = [
    "antagonistic_motor_angles",
    "antagonistic_torque",
    "antagonistic_stiffness",
    "make_mechanism",
    "Mechanism",
    "IdealImpedance",
    "Antagonistic",
]

MechanismLike = IdealImpedanceParams | AntagonisticParams


def _column(records: Sequence[object], name: str) -> np.ndarray:
    return np.array([[float(getattr(r, name))] for r in records])


def _spring_tension(
    elongation: np.ndarray, k1: np.ndarray | float, k2: np.ndarray | float
) -> np.ndarray:
    taut = np.maximum(elongation, 0.0)
    return (k1 + k2 * taut) * taut


def antagonistic_motor_angles(
    params: AntagonisticParams, equilibrium: np.ndarray | float, stiffness: np.ndarray | float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Closed-form inverse map from (equilibrium, stiffness) to the two motor angles.

    Parameters
    ----------
    params : the mechanism
    equilibrium : array, rad; commanded link equilibrium
    stiffness : array (broadcastable), N*m/rad; commanded joint stiffness

    Returns
    -------
    theta1, theta2 : arrays, rad; motor angles within [motor_lower, motor_upper]
    equilibrium_clamped, stiffness_clamped : bool arrays; command changed to fit the ranges

    Notes
    -----
    With elongations phi1 = theta1 - q + d0 and phi2 = q - theta2 + d0, equal tensions at
    q = equilibrium need phi1 = phi2 = phi, and the joint stiffness is 2*k1 + 4*k2*phi
    (Migliore, Brown, DeWeerth, ICRA 2005). So phi = (K - 2*k1) / (4*k2),
    theta1 = equilibrium + phi - d0, theta2 = equilibrium - phi + d0. Stiffness is clamped to
    [stiffness_min, stiffness_max] and to what the motor range allows; then the equilibrium is
    clamped so both motors stay in range. At exactly 2*k1 (phi = 0) both springs sit at the
    slack threshold and any deflection engages only one of them (stiffness k1).
    """
    k = Antagonistic([params])
    eq = np.asarray(equilibrium, dtype=float)
    stiff = np.asarray(stiffness, dtype=float)
    shape = np.broadcast_shapes(eq.shape, stiff.shape)
    s1, s2, eq_flag, k_flag = k.motor_targets(
        np.broadcast_to(eq, shape).reshape(1, -1), np.broadcast_to(stiff, shape).reshape(1, -1)
    )
    d0 = params.pretension_offset
    return (
        (s1 - d0).reshape(shape),
        (s2 + d0).reshape(shape),
        eq_flag.reshape(shape),
        k_flag.reshape(shape),
    )


def antagonistic_torque(
    params: AntagonisticParams, q: np.ndarray | float, theta1: np.ndarray, theta2: np.ndarray
) -> np.ndarray:
    """Torque of the two tension-only springs on the link, N*m (positive pulls towards theta1)."""
    d0 = params.pretension_offset
    t1 = _spring_tension(np.asarray(theta1) - q + d0, params.k1, params.k2)
    t2 = _spring_tension(q - np.asarray(theta2) + d0, params.k1, params.k2)
    return t1 - t2


def antagonistic_stiffness(
    params: AntagonisticParams, q: np.ndarray | float, theta1: np.ndarray, theta2: np.ndarray
) -> np.ndarray:
    """Joint stiffness -d(torque)/dq at the state, N*m/rad; a slack spring adds nothing."""
    d0 = params.pretension_offset
    total = np.zeros(np.broadcast_shapes(np.shape(q), np.shape(theta1), np.shape(theta2)))
    for phi in (np.asarray(theta1) - q + d0, q - np.asarray(theta2) + d0):
        total = total + np.where(phi > 0, params.k1 + 2 * params.k2 * phi, 0.0)
    return total


class Mechanism:
    """Common interface of the batched mechanism kernels (internal to the simulator).

    Attributes
    ----------
    n_actuators : actuator state rows
    n_targets : target rows per step (actuator targets first)
    clamp_names : commands this mechanism may clamp (keys of ``SimResult.clamp_counts``)
    has_damping_input : whether a damping command means anything to it
    """

    n_actuators = 0
    n_targets = 0
    kind = -1  # the compiled step's code for it (step_kernel.IDEAL, ANTAGONISTIC)
    time_constant: np.ndarray  # (J, 1), s
    rate_limit: np.ndarray  # (n_actuators, J, 1), per second
    clamp_names: tuple[str, ...] = ()

    def __init__(self, records: Sequence[MechanismLike]) -> None:
        self.records = list(records)

    @property
    def has_damping_input(self) -> bool:
        """Whether a damping command means anything to it (a fact of its records' kind)."""
        return self.records[0].has_damping_input

    def step_constants(self) -> dict[str, np.ndarray]:
        """Per-joint constants of the compiled step (:mod:`.step_kernel`): the actuators' lag
        ``inv_time_constant_i`` (1/s) and rate limits ``rate_limit_i``, and the spring
        coefficients ``k1``, ``k2``; for the recording, the reflected ``motor_inertia``
        (kg*m^2) and ``motor_offset``, rad, from the internal actuator rows to the reported
        ones (all zero for a mechanism without springs and motors)."""
        n = len(self.records)
        constants = {name: np.zeros(n) for name in ("k1", "k2", "motor_inertia", "motor_offset")}
        for i in range(self.n_actuators):
            constants[f"inv_time_constant_{i}"] = 1.0 / self.time_constant[:, 0]
            constants[f"rate_limit_{i}"] = self.rate_limit[i, :, 0]
        return constants

    def command_targets(
        self, equilibrium: np.ndarray, stiffness: np.ndarray, damping: np.ndarray | None
    ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """Targets ``(C, n_targets, J, S)`` and clamp flags ``{name: (C, J, S) bool}``.

        Inputs are ``(C, J, S)`` (S may be 1 for commands shared by all scenarios).
        """
        raise NotImplementedError

    def equilibrium(self, act: np.ndarray, targets: np.ndarray) -> np.ndarray:
        """Link angle of zero spring torque the actuators are set to, rad."""
        raise NotImplementedError

    def highest_stiffness(self, torque_limit: np.ndarray) -> np.ndarray:
        """Stiffest realisable state per joint (n_joints,), N*m/rad, for the stability check."""
        raise NotImplementedError

    def load_limits(self) -> tuple[np.ndarray, np.ndarray]:
        """Spring-tension and motor-torque limits per joint (n_joints,), N*m (inf: none)."""
        unlimited = np.full(len(self.records), np.inf)
        return unlimited, unlimited

    def damping_range(self) -> tuple[np.ndarray, np.ndarray]:
        """Lowest and highest mechanism damping per joint, N*m*s/rad."""
        zeros = np.zeros(len(self.records))
        return zeros, zeros


class IdealImpedance(Mechanism):
    """Ideal variable impedance: realised stiffness and damping lag their clamped commands.

    Targets rows: stiffness, damping, equilibrium; actuator rows: stiffness, damping.
    """

    n_actuators = 2
    n_targets = 3
    clamp_names = ("stiffness", "damping")
    kind = IDEAL

    def __init__(self, records: Sequence[IdealImpedanceParams]) -> None:
        super().__init__(records)
        self.k_min = _column(records, "stiffness_min")
        self.k_max = _column(records, "stiffness_max")
        self.d_min = _column(records, "damping_min")
        self.d_max = _column(records, "damping_max")
        self.time_constant = _column(records, "time_constant")
        self.rate_limit = np.stack(
            [_column(records, "stiffness_rate_limit"), _column(records, "damping_rate_limit")]
        )

    def command_targets(self, equilibrium, stiffness, damping):
        if damping is None:
            damping = np.broadcast_to(self.d_min, stiffness.shape)
        k = np.clip(stiffness, self.k_min, self.k_max)
        d = np.clip(damping, self.d_min, self.d_max)
        shape = np.broadcast_shapes(k.shape, d.shape, equilibrium.shape)
        targets = np.empty((shape[0], 3, *shape[1:]))
        targets[:, 0], targets[:, 1], targets[:, 2] = k, d, equilibrium
        flags = {"stiffness": k != stiffness, "damping": d != damping}
        return targets, flags

    def equilibrium(self, act, targets):
        return np.broadcast_to(targets[2], act[0].shape).copy()

    def highest_stiffness(self, torque_limit):
        return self.k_max[:, 0]

    def damping_range(self):
        return self.d_min[:, 0], self.d_max[:, 0]


class Antagonistic(Mechanism):
    """Antagonistic pair of tension-only springs k1*phi + k2*phi^2 on two position-servoed motors.

    Internally the motor rows hold s1 = theta1 + d0 and s2 = theta2 - d0, so the elongations
    are s1 - q and q - s2 without extra operations in the integration loop.
    """

    n_actuators = 2
    n_targets = 2
    clamp_names = ("equilibrium", "stiffness")
    kind = ANTAGONISTIC

    def __init__(self, records: Sequence[AntagonisticParams]) -> None:
        super().__init__(records)
        self.k1 = _column(records, "k1")
        self.k2 = _column(records, "k2")
        self.d0 = _column(records, "pretension_offset")
        self.k_min = _column(records, "stiffness_min")
        self.k_max = _column(records, "stiffness_max")
        self.lower = _column(records, "motor_lower")
        self.upper = _column(records, "motor_upper")
        self.time_constant = _column(records, "motor_time_constant")
        speed = _column(records, "motor_speed_limit")
        self.rate_limit = np.stack([speed, speed])
        self.tension_limit = _column(records, "spring_tension_limit")
        self.motor_torque_limit = _column(records, "motor_torque_limit")
        self.motor_inertia = _column(records, "motor_inertia")

    def step_constants(self) -> dict[str, np.ndarray]:
        return {**super().step_constants(), "k1": self.k1[:, 0], "k2": self.k2[:, 0],
                "motor_inertia": self.motor_inertia[:, 0], "motor_offset": self.d0[:, 0]}

    def motor_targets(
        self, equilibrium: np.ndarray, stiffness: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Internal motor rows (s1, s2) and clamp flags for ``(..., J, S)`` commands."""
        k = np.clip(stiffness, self.k_min, self.k_max)
        phi = (k - 2 * self.k1) / (4 * self.k2)
        half_range = 0.5 * (self.upper - self.lower)
        phi_fit = np.clip(phi, self.d0 - half_range, self.d0 + half_range)
        stiffness_clamped = (k != stiffness) | (phi_fit != phi)
        excess = np.abs(phi_fit - self.d0)
        eq = np.clip(equilibrium, self.lower + excess, self.upper - excess)
        return eq + phi_fit, eq - phi_fit, eq != equilibrium, stiffness_clamped

    def command_targets(self, equilibrium, stiffness, damping):
        s1, s2, eq_flag, k_flag = self.motor_targets(equilibrium, stiffness)
        return np.stack([s1, s2], axis=1), {"equilibrium": eq_flag, "stiffness": k_flag}

    def equilibrium(self, act, targets):
        return 0.5 * (act[0] + act[1])

    def load_limits(self):
        return self.tension_limit[:, 0], self.motor_torque_limit[:, 0]

    def highest_stiffness(self, torque_limit):
        # beyond the taut range only one spring carries the load; its local stiffness at the
        # elongation that gives torque_limit bounds it while the link torque stays in the limit
        k1, k2 = self.k1[:, 0], self.k2[:, 0]
        phi_limit = (-k1 + np.sqrt(k1**2 + 4 * k2 * torque_limit)) / (2 * k2)
        return np.maximum(self.k_max[:, 0], k1 + 2 * k2 * phi_limit)


def make_mechanism(
    mechanism: MechanismLike | Sequence[MechanismLike], n_joints: int
) -> Mechanism:
    """Kernel for one mechanism record (shared by all joints) or one record per joint."""
    records = [mechanism] * n_joints if isinstance(mechanism, MechanismLike) else list(mechanism)
    if len(records) != n_joints:
        raise InvalidInputError(
            f"mechanism: got {len(records)} records for {n_joints} joints; "
            "give one shared record or one per joint"
        )
    kinds = {type(r) for r in records}
    if kinds == {IdealImpedanceParams}:
        return IdealImpedance(cast(list[IdealImpedanceParams], records))
    if kinds == {AntagonisticParams}:
        return Antagonistic(cast(list[AntagonisticParams], records))
    raise InvalidInputError(
        f"mechanism: expected IdealImpedanceParams or AntagonisticParams records of one kind, "
        f"got {sorted(k.__name__ for k in kinds)}"
    )
