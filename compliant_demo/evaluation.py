"""Checks of a skill's impedance schedule before replay, and outcome metrics after it.

:func:`check_schedule` looks along a :class:`~compliant_demo.primitives.Rollout` at what the
target joint and its mechanism will actually do: the damping ratio on the joint's own inertia and
stiffness, gravity's included (a teacher's stiffness copied onto a joint whose damping is not tied
to stiffness oscillates), where gravity outweighs the spring, the sufficient stability condition of
Kronander and Billard for varying stiffness and damping, the energy tank of Ferraguti, Secchi and
Fantuzzi (:mod:`compliant_demo.energy_tank`), and stiffness and damping rates and ranges against
the mechanism's limits. It returns a plain :class:`ScheduleReport` with per-sample arrays, flagged
stretches and a summary dict. :func:`outcome_metrics` takes plain arrays of a replay (so it does
not depend on the simulator's types) and returns goal error, deviation from the nominal path,
recovery after perturbations, interaction torque, energy and limit violations as a JSON-ready dict.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.arrays import finite_array, time_axis
from compliant_demo.energy_tank import (
    TANK_INITIAL_ENERGY_J,
    TANK_MAX_ENERGY_J,
    check_tank_bounds,
    replay_energy_metrics,
    tank_levels,
)
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.impedance_stability import common_alpha, damping_ratio, gravity_stiffness
from compliant_demo.models import (
    AntagonisticParams,
    ChainParams,
    IdealImpedanceParams,
    JointParams,
    MechanismParams,
)
from compliant_demo.primitives import Rollout
from compliant_demo.sim.feedforward import inverse_dynamics
from compliant_demo.sim.rigid_body import ChainKernel

__all__ = [
    "Stretch",
    "ScheduleReport",
    "check_schedule",
    "range_stretches",
    "outcome_metrics",
    "SETTLING_WINDOW_S",
    "SETTLING_TOLERANCE_RAD",
    "ACTUATOR_LOADS",
    "limit_excess",
    "first_limit_violation",
]

FLAG_KINDS = (
    "under_damped", "energy_tank_empty", "stiffness_range", "stiffness_rate", "damping_range",
    "damping_rate", "position_range", "torque_limit", "statically_unstable",
    "varying_impedance_unproven",
)


@dataclass(frozen=True)
class Stretch:
    """A contiguous run of samples where one check fails on one joint.

    Attributes
    ----------
    joint : joint name
    kind : one of ``FLAG_KINDS``
    t_start, t_end : first and last flagged sample time, s
    worst : most extreme value of the checked quantity inside the stretch, in ``unit``
    unit : unit of ``worst``
    """

    joint: str
    kind: str
    t_start: float
    t_end: float
    worst: float
    unit: str


@dataclass(frozen=True)
class ScheduleReport:
    """What the target joint will do along a schedule. Arrays are (n_samples, n_joints).

    Attributes
    ----------
    t : (n_samples,) s
    joints : joint names
    stiffness : realisable stiffness (command clamped to the mechanism's range), N*m/rad
    damping : damping acting on the link (realisable mechanism damping plus the joint's own
        viscous friction), N*m*s/rad
    damping_ratio : d / (2*sqrt((k + dtau_g/dq)*I)) on the target joint, 1; NaN where
        k + dtau_g/dq <= 0 (statically unstable)
    stiffness_rate : dK/dt of the commanded schedule, N*m/rad/s
    deflection : predicted spring deflection, rad: (|path torque| + interaction torque) / K plus
        the extra deflection (see :func:`check_schedule`)
    injection_power : 1/2 * dK/dt * deflection^2 with the realisable K, W (positive: energy put
        into the joint; the tank's outflow)
    tank_energy : energy tank level, J (starts at the initial energy, never above the upper
        bound; below zero where the tank would have run dry)
    stretches : flagged stretches, ordered by joint then time
    summary : JSON-ready dict of per-joint extremes, thresholds and counts
    gravity_stiffness : dtau_g/dq along the path, N*m/rad (positive: gravity pulls back)
    dissipation_power : D*dq^2 of the mechanism's damper on the path's velocity, W (the tank's
        inflow)
    stability_alpha : (n_joints,) 1/s; the alpha of Kronander and Billard's condition that holds
        at the most samples (NaN: at none)
    stability_excess : how far that alpha lies outside each sample's admissible interval, 1/s
        (<= 0 where the condition holds, on a non-empty interval)
    """

    t: NDArray[np.float64]
    joints: tuple[str, ...]
    stiffness: NDArray[np.float64]
    damping: NDArray[np.float64]
    damping_ratio: NDArray[np.float64]
    stiffness_rate: NDArray[np.float64]
    deflection: NDArray[np.float64]
    injection_power: NDArray[np.float64]
    tank_energy: NDArray[np.float64]
    stretches: list[Stretch]
    summary: dict[str, Any]
    gravity_stiffness: NDArray[np.float64]
    dissipation_power: NDArray[np.float64]
    stability_alpha: NDArray[np.float64]
    stability_excess: NDArray[np.float64]

    @property
    def ok(self) -> bool:
        """True when no check flagged any sample."""
        return not self.stretches


def _runs(mask: NDArray[np.bool_]) -> list[tuple[int, int]]:
    """(first, last) indices of each run of True in a 1-D mask."""
    edges = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    ends = np.flatnonzero(edges == -1) - 1
    return list(zip(starts.tolist(), ends.tolist(), strict=True))


def _stretches(
    t: NDArray[np.float64],
    joints: Sequence[str],
    kind: str,
    value: NDArray[np.float64],
    severity: NDArray[np.float64],
    unit: str,
) -> list[Stretch]:
    """Stretches where ``severity > 0``; ``worst`` is ``value`` where the severity peaks."""
    found = []
    for j, name in enumerate(joints):
        for first, last in _runs(severity[:, j] > 0):
            worst = value[first + int(np.argmax(severity[first:last + 1, j])), j]
            found.append(Stretch(name, kind, float(t[first]), float(t[last]), float(worst), unit))
    return found


def _outside(value: NDArray[np.float64], low: ArrayLike, high: ArrayLike) -> NDArray[np.float64]:
    """Distance beyond [low, high], positive outside, negative inside."""
    return np.maximum(np.asarray(low) - value, value - np.asarray(high))


def range_stretches(
    t: NDArray[np.float64],
    joints: Sequence[str],
    kind: str,
    value: NDArray[np.float64],
    low: ArrayLike,
    high: ArrayLike,
    unit: str,
) -> list[Stretch]:
    """Stretches where ``value`` (n_samples, n_joints) lies outside [low, high] per joint;
    ``worst`` is the value farthest outside, in ``unit``."""
    return _stretches(t, joints, kind, value, _outside(value, low, high), unit)


def _mechanism_limits(
    mechanisms: Sequence[IdealImpedanceParams | AntagonisticParams],
) -> dict[str, NDArray[np.float64]]:
    """Per-joint stiffness/damping ranges and rate limits; damping NaN where not controllable.

    The antagonistic stiffness 2*k1 + 2*k2*(theta1 - theta2 + 2*d0) (Migliore, Brown, DeWeerth,
    ICRA 2005) changes at most 2*k2*(|theta1'| + |theta2'|) <= 4*k2*motor_speed_limit.
    """
    rows = []
    for mech in mechanisms:
        if isinstance(mech, IdealImpedanceParams):
            rows.append((mech.stiffness_min, mech.stiffness_max, mech.stiffness_rate_limit,
                         mech.damping_min, mech.damping_max, mech.damping_rate_limit))
        else:
            rows.append((mech.stiffness_min, mech.stiffness_max,
                         4.0 * mech.k2 * mech.motor_speed_limit, np.nan, np.nan, np.nan))
    table = np.array(rows, dtype=float)
    names = ("k_min", "k_max", "k_rate", "d_min", "d_max", "d_rate")
    return {name: table[:, i] for i, name in enumerate(names)}


def _required_torque(joints: Sequence[JointParams], rollout: Rollout,
                     chain: ChainParams | None) -> NDArray[np.float64]:
    """Torque the spring must supply to move the link along the rollout, N*m.

    The path's inverse dynamics on the target (:func:`compliant_demo.sim.feedforward.
    inverse_dynamics`: I*q'' + b*q' + m*g*l*sin(q - q_g) per joint, or the coupled arm's
    M(q)q'' + C(q, q')q' + g(q) + b*q') plus the smoothed Coulomb friction c*tanh(q'/v_s).
    """
    coulomb = np.array([j.coulomb_friction for j in joints])
    smoothing = np.array([j.friction_smoothing_velocity for j in joints])
    dq = rollout.velocity
    return (inverse_dynamics(joints, rollout.position, dq, rollout.acceleration, chain=chain)
            + coulomb * np.tanh(dq / smoothing))


def check_schedule(
    rollout: Rollout,
    joints: Sequence[JointParams],
    mechanism: IdealImpedanceParams | AntagonisticParams
    | Sequence[IdealImpedanceParams | AntagonisticParams],
    *,
    min_damping_ratio: float = 0.5,
    extra_deflection: ArrayLike = 0.0,
    interaction_torque: ArrayLike = 0.0,
    energy_budget: float = TANK_INITIAL_ENERGY_J,
    tank_max_energy: float = TANK_MAX_ENERGY_J,
    chain: ChainParams | None = None,
) -> ScheduleReport:
    """Check a rollout's impedance schedule against the target joints and their mechanism.

    Parameters
    ----------
    rollout : the schedule (position rad, stiffness N*m/rad, damping N*m*s/rad per sample)
    joints : one JointParams per rollout joint, in column order (names must match)
    mechanism : one mechanism for all joints, or one per joint
    min_damping_ratio : damping ratio below which a sample is flagged under-damped, 1. The
        default 0.5 allows about 16 % overshoot, exp(-pi*zeta/sqrt(1 - zeta^2)) (common practice)
    extra_deflection : deflection the commands themselves impose on top of the predicted one, rad,
        scalar or (n_joints,); e.g. the depth an equilibrium is set into an obstacle. Default 0
    interaction_torque : the largest torque the surroundings may put on the link, N*m, scalar or
        (n_joints,), e.g. the criteria's interaction torque limit; it deflects the spring by
        interaction_torque / K on top of what the path needs. Default 0: free space
    energy_budget : the energy tank's initial level, J (default
        :data:`~compliant_demo.energy_tank.TANK_INITIAL_ENERGY_J`, 0.05 J)
    tank_max_energy : the energy tank's upper bound, J (default
        :data:`~compliant_demo.energy_tank.TANK_MAX_ENERGY_J`, 0.5 J); at least ``energy_budget``
    chain : the coupled arm of the joints, or None (independent joints)

    Returns
    -------
    ScheduleReport

    Notes
    -----
    Everything is evaluated on the deviation dynamics about the path, assuming the link follows
    it. Stiffness k is the realisable spring stiffness plus the gravity stiffness dtau_g/dq
    (:func:`compliant_demo.impedance_stability.gravity_stiffness`); where k <= 0 gravity
    outweighs the spring and the sample is flagged ``statically_unstable``. The damping ratio is
    zeta = d / (2*sqrt(k*I)) (common practice), d the realisable mechanism damping plus the
    joint's viscous friction; on a coupled arm I is the diagonal entry M_jj(q) of the mass matrix
    at each sample: the inertia joint j moves with the others held still, matched to the
    per-joint (diagonal) stiffness and damping being checked. ``varying_impedance_unproven``
    flags samples where Kronander and Billard's sufficient condition (IEEE T-RO 2016) fails for
    the joint's best constant alpha (:func:`compliant_demo.impedance_stability.common_alpha`):
    stability is not shown there, which is not the same as instability.

    Predicted deflection x = (|tau_path| + interaction_torque) / K + extra_deflection, with K the
    realisable spring stiffness and tau_path the torque the spring must supply to move the link
    along the rollout (:func:`_required_torque`: inverse dynamics plus smoothed Coulomb friction).
    It assumes the link tracks the path (tracking error adds deflection), the spring is linear
    about its equilibrium, and the interaction torque is at its bound and on the side that adds
    to the path torque at every sample: a bound, not a forecast.

    Energy tank (Ferraguti, Secchi, Fantuzzi, ICRA 2013; :mod:`compliant_demo.energy_tank`):
    raising K while deflected changes the spring energy 1/2*K*x^2 by 1/2*dK/dt*x^2 per second
    without any motion. The tank pays that power (and takes it back when K falls), is filled by
    what the mechanism's damper dissipates on the path, D*dq^2 (the joint's own friction is left
    out: a controller cannot meter it), starts at ``energy_budget`` and holds at most
    ``tank_max_energy``. Samples where it would be below zero are flagged ``energy_tank_empty``.
    """
    names = tuple(rollout.joints)
    params = list(joints)
    if len(params) != len(names):
        raise InvalidInputError(f"joints: {len(params)} JointParams for rollout joints "
                                f"{list(names)!r}")
    for name, joint in zip(names, params, strict=True):
        if joint.name != name:
            raise InvalidInputError(f"joints: JointParams name {joint.name!r} where the rollout "
                                    f"has {name!r}")
    mechanisms = (list(mechanism) if isinstance(mechanism, Sequence)
                  else [mechanism] * len(names))
    if len(mechanisms) != len(names):
        raise InvalidInputError(f"mechanism: {len(mechanisms)} mechanisms for {len(names)} "
                                "joints")
    if not 0 < min_damping_ratio:
        raise InvalidInputError(f"min_damping_ratio: must be positive, got {min_damping_ratio!r}")
    check_tank_bounds(energy_budget, tank_max_energy)
    extra = _per_joint(extra_deflection, "extra_deflection", "rad", len(names))
    pushing = _per_joint(interaction_torque, "interaction_torque", "N*m", len(names))

    t = rollout.t
    limits = _mechanism_limits(mechanisms)
    inertia = (np.array([j.inertia for j in params]) if chain is None
               else ChainKernel(chain).mass_matrix(rollout.position.T).diagonal(axis1=1, axis2=2))
    viscous = np.array([j.viscous_damping for j in params])
    controllable = ~np.isnan(limits["d_min"])
    stiffness = np.clip(rollout.stiffness, limits["k_min"], limits["k_max"])
    mech_damping = np.where(
        controllable,
        np.clip(rollout.damping, np.nan_to_num(limits["d_min"]), np.nan_to_num(limits["d_max"])),
        0.0,
    )
    damping = mech_damping + viscous
    gravity = gravity_stiffness(params, rollout.position, chain)
    effective = stiffness + gravity
    ratio = damping_ratio(damping, effective, inertia)
    alpha, lower, upper = common_alpha(t, inertia, effective, damping)
    alpha_excess = _outside(alpha, lower, upper)
    k_rate = np.gradient(rollout.stiffness, t, axis=0)
    d_rate = np.gradient(rollout.damping, t, axis=0)
    torque = _required_torque(params, rollout, chain)
    deflection = (np.abs(torque) + pushing) / stiffness + extra
    # The energy follows the stiffness the mechanism realises, not the command beyond its range.
    power = 0.5 * np.gradient(stiffness, t, axis=0) * deflection**2
    dissipation = mech_damping * rollout.velocity**2
    dt = np.diff(t, prepend=t[0])
    tank = tank_levels((dissipation - power) * dt[:, None], energy_budget, tank_max_energy)

    # (checked value, severity: positive where the check fails, unit) per kind.
    not_controllable = np.where(controllable, 0.0, -np.inf)
    no_interval = lower >= upper
    # how far the common alpha misses the interval; without one, how empty the interval is
    alpha_gap = np.where(np.isnan(alpha_excess), lower - upper, alpha_excess)
    checks = {
        "under_damped": (ratio, min_damping_ratio - ratio, "dimensionless (damping ratio)"),
        "energy_tank_empty": (tank, -tank, "J"),
        "stiffness_range": (rollout.stiffness,
                            _outside(rollout.stiffness, limits["k_min"], limits["k_max"]),
                            "N*m/rad"),
        "stiffness_rate": (np.abs(k_rate), np.abs(k_rate) - limits["k_rate"], "N*m/rad/s"),
        "damping_range": (rollout.damping,
                          _outside(rollout.damping, np.nan_to_num(limits["d_min"]),
                                   np.nan_to_num(limits["d_max"])) + not_controllable,
                          "N*m*s/rad"),
        "damping_rate": (np.abs(d_rate),
                         np.abs(d_rate) - np.nan_to_num(limits["d_rate"]) + not_controllable,
                         "N*m*s/rad/s"),
        "position_range": (rollout.position,
                           _outside(rollout.position, [j.lower_limit for j in params],
                                    [j.upper_limit for j in params]),
                           "rad"),
        "torque_limit": (np.abs(torque), np.abs(torque) - [j.torque_limit for j in params],
                         "N*m"),
        "statically_unstable": (effective, -effective,
                                "N*m/rad (spring plus gravity stiffness)"),
        "varying_impedance_unproven": (
            alpha_gap, np.where(no_interval, np.maximum(alpha_gap, _TINY), alpha_gap),
            "1/s (alpha outside the admissible interval)"),
    }
    stretches: list[Stretch] = []
    for kind, (value, severity, unit) in checks.items():
        stretches.extend(_stretches(t, names, kind, value, severity, unit))
    stretches.sort(key=lambda s: (names.index(s.joint), s.t_start, FLAG_KINDS.index(s.kind)))
    summary = {
        "ok": not stretches,
        "joints": list(names),
        "min_damping_ratio": [None if np.isnan(column).all() else float(np.nanmin(column))
                              for column in ratio.T],
        "under_damped_fraction": (ratio < min_damping_ratio).mean(axis=0).tolist(),
        "statically_unstable_fraction": (effective <= 0).mean(axis=0).tolist(),
        "min_effective_stiffness_Nm_per_rad": effective.min(axis=0).tolist(),
        "injected_energy_J": (np.maximum(power, 0.0) * dt[:, None]).sum(axis=0).tolist(),
        "dissipated_energy_J": (dissipation * dt[:, None]).sum(axis=0).tolist(),
        "tank_minimum_J": tank.min(axis=0).tolist(),
        "tank_deficit_J": np.maximum(-tank.min(axis=0), 0.0).tolist(),
        "stability_alpha_per_s": [None if np.isnan(a) else float(a) for a in alpha],
        "varying_impedance_unproven_fraction": (
            ~(alpha_excess < 0) | no_interval).mean(axis=0).tolist(),
        "max_stiffness_rate": np.abs(k_rate).max(axis=0).tolist(),
        "stiffness_rate_limit": limits["k_rate"].tolist(),
        "max_predicted_deflection_rad": deflection.max(axis=0).tolist(),
        "damping_controllable": controllable.tolist(),
        "thresholds": {"min_damping_ratio": min_damping_ratio, "energy_budget_J": energy_budget,
                       "tank_max_energy_J": tank_max_energy,
                       "extra_deflection_rad": extra.tolist(),
                       "interaction_torque_Nm": pushing.tolist()},
        "stretch_counts": {kind: sum(s.kind == kind for s in stretches) for kind in FLAG_KINDS},
    }
    return ScheduleReport(t, names, stiffness, damping, ratio, k_rate, deflection, power, tank,
                          stretches, summary, gravity, dissipation, alpha, alpha_excess)


# Severity of a sample whose admissible alpha interval is empty but touches the common alpha.
_TINY = float(np.finfo(float).tiny)


def _per_joint(value: ArrayLike, name: str, unit: str, n_joints: int) -> NDArray[np.float64]:
    """A non-negative scalar or (n_joints,) value broadcast to (n_joints,)."""
    array = finite_array(value, name)
    try:
        array = np.broadcast_to(array, (n_joints,))
    except ValueError:
        raise InvalidInputError(f"{name}: expected a scalar or {n_joints} values, got shape "
                                f"{array.shape}") from None
    if np.any(array < 0):
        raise InvalidInputError(f"{name}: must be >= 0 {unit}, got {array.tolist()}")
    return array


def _samples(value: ArrayLike, n_samples: int, n_joints: int | None, name: str) -> NDArray:
    array = finite_array(value, name)
    if array.ndim == 1:
        array = array[:, np.newaxis]
    if array.ndim != 2 or array.shape[0] != n_samples or (
            n_joints is not None and array.shape[1] != n_joints):
        expected = f"({n_samples}, {'n_joints' if n_joints is None else n_joints})"
        raise InvalidInputError(f"{name}: expected shape {expected}, got {array.shape}")
    return array


def _recovery(
    t: NDArray[np.float64],
    deviation: NDArray[np.float64],
    onsets: NDArray[np.float64],
    ends: NDArray[np.float64],
    band: float,
) -> list[float | None]:
    """Time from each perturbation's end until the deviation stays within ``band``, s.

    The window of a perturbation closes at the next onset (or the end of the run); None when the
    deviation is still outside the band at the window's last sample.
    """
    times: list[float | None] = []
    for i, end in enumerate(ends):
        window_end = onsets[i + 1] if i + 1 < onsets.size else np.inf
        index = np.flatnonzero((t >= end) & (t < max(window_end, end)))
        if index.size == 0:
            times.append(None)
            continue
        outside = index[deviation[index] > band]
        if outside.size == 0:
            times.append(0.0)
        elif outside[-1] == index[-1]:
            times.append(None)
        else:
            times.append(float(t[outside[-1] + 1] - end))
    return times


#: Default final window of a replay over which goal error is judged, s (the shipped readiness
#: criteria's ``settling_window``).
SETTLING_WINDOW_S = 0.5
#: Default peak-to-peak angle in that window up to which a joint counts as settled, rad (the
#: shipped readiness criteria's ``settling_tolerance``).
SETTLING_TOLERANCE_RAD = 0.005


def outcome_metrics(
    t: ArrayLike,
    q: ArrayLike,
    q_nominal: ArrayLike,
    tau_external: ArrayLike,
    tau_mechanism: ArrayLike,
    goal: ArrayLike,
    *,
    perturbation_onsets: ArrayLike = (),
    perturbation_ends: ArrayLike | None = None,
    energy: Mapping[str, Any] | None = None,
    joints: Sequence[JointParams] | None = None,
    recovery_band: float = 0.02,
    settling_window_s: float = SETTLING_WINDOW_S,
    settling_tolerance: float = SETTLING_TOLERANCE_RAD,
    energy_budget: float = TANK_INITIAL_ENERGY_J,
    tank_max_energy: float = TANK_MAX_ENERGY_J,
    perturbation_acted: Sequence[bool] | None = None,
) -> dict[str, Any]:
    """Outcome of one replay from plain arrays.

    Parameters
    ----------
    t : (n_samples,) s, strictly increasing
    q : (n_samples, n_joints) rad; measured or simulated link angle
    q_nominal : (n_samples, n_joints) rad; the unperturbed path (the rollout, or an unperturbed
        replay)
    tau_external : (n_samples, n_joints) N*m; interaction / perturbation torque on the link
    tau_mechanism : (n_samples, n_joints) N*m; torque the mechanism puts on the link
    goal : (n_joints,) rad
    perturbation_onsets, perturbation_ends : (n_perturbations,) s; ends default to the onsets
        (impulses)
    energy : energy terms, J, each (n_rows, n_joints) running from the start of the run (e.g.
        :func:`compliant_demo.energy_tank.scenario_energy`), or a final scalar or (n_joints,)
        value; ``energy_J`` reports each term's final value. The injected-energy and tank keys
        need the per-sample ``stiffness_injection`` (and ``damping_dissipated``, the tank's
        inflow, when the mechanism damps), else they are None
    joints : JointParams per column, for position and torque limit violations
    recovery_band : max over joints of |q - q_nominal| that counts as recovered, rad
    settling_window_s : the final stretch of the replay goal error is judged over, s (the whole
        replay when it is shorter)
    settling_tolerance : peak-to-peak of a joint's angle in the settling window up to which it
        counts as settled, rad
    energy_budget, tank_max_energy : the energy tank's initial level and upper bound, J (see
        :func:`check_schedule`)
    perturbation_acted : (n_perturbations,) bool, optional; False for a perturbation that never
        acted on the link (a wall it never touched): its recovery is not measured and it is
        never counted as recovered. Default: every perturbation acted.

    Returns
    -------
    dict with goal_error_rad (per joint, mean |q - goal| over the settling window),
    goal_error_max_rad (worst joint of it), goal_error_window_max_rad (per joint, max |q - goal|
    over the window), settling_window_s (as asked), settling_from_s and settling_to_s (the window
    taken), settling_peak_to_peak_rad
    (per joint), settling_tolerance_rad, settled (every joint within the tolerance),
    peak_deviation_rad (per joint),
    peak_deviation_time_s, recovery_band_rad, recovery_time_s (per perturbation, None when not
    recovered inside its window or it never acted), recovered (per perturbation),
    perturbation_status (per perturbation: "recovered", "not_recovered" or "untouched"),
    n_untouched, peak_interaction_torque_Nm,
    peak_mechanism_torque_Nm, energy_J (final value of each term), the energy keys of
    :func:`compliant_demo.energy_tank.replay_energy_metrics` (energy_injected_J: positive part
    of the injected power's integral, summed over joints; energy_injected_joint_J,
    energy_tank_minimum_joint_J, energy_tank_deficit_joint_J, energy_tank_deficit_J),
    limit_violations (per kind: samples, duration_s, worst excess per joint) and
    n_limit_violations.
    """
    times = time_axis(t)
    position = _samples(q, times.size, None, "q")
    n_joints = position.shape[1]
    nominal = _samples(q_nominal, times.size, n_joints, "q_nominal")
    external = _samples(tau_external, times.size, n_joints, "tau_external")
    mechanism = _samples(tau_mechanism, times.size, n_joints, "tau_mechanism")
    target = finite_array(goal, "goal").reshape(-1)
    if target.shape != (n_joints,):
        raise InvalidInputError(f"goal: expected shape ({n_joints},), got {target.shape}")
    if not recovery_band > 0:
        raise InvalidInputError(f"recovery_band: must be positive (rad), got {recovery_band!r}")
    if not settling_window_s > 0:
        raise InvalidInputError(f"settling_window_s: must be positive (s), got "
                                f"{settling_window_s!r}")
    if not settling_tolerance > 0:
        raise InvalidInputError(f"settling_tolerance: must be positive (rad), got "
                                f"{settling_tolerance!r}")
    onsets = finite_array(perturbation_onsets, "perturbation_onsets").reshape(-1)
    ends = onsets if perturbation_ends is None else finite_array(
        perturbation_ends, "perturbation_ends").reshape(-1)
    if ends.shape != onsets.shape or np.any(ends < onsets):
        raise InvalidInputError(f"perturbation_ends: need one end at or after each onset "
                                f"{onsets.tolist()}, got {ends.tolist()}")
    if onsets.size and np.any(np.diff(onsets) < 0):
        raise InvalidInputError(f"perturbation_onsets: must be sorted, got {onsets.tolist()}")
    acted = [True] * onsets.size if perturbation_acted is None else list(perturbation_acted)
    if len(acted) != onsets.size:
        raise InvalidInputError(f"perturbation_acted: need one flag per onset "
                                f"{onsets.tolist()}, got {acted}")

    deviation = np.abs(position - nominal)
    worst = deviation.max(axis=1)
    recovery = [r if on else None
                for r, on in zip(_recovery(times, worst, onsets, ends, recovery_band), acted,
                                 strict=True)]
    status = ["untouched" if not on else "not_recovered" if r is None else "recovered"
              for r, on in zip(recovery, acted, strict=True)]
    window = times >= times[-1] - settling_window_s
    error = np.abs(position[window] - target)
    goal_error = error.mean(axis=0)
    swing = np.ptp(position[window], axis=0)
    metrics: dict[str, Any] = {
        "goal_error_rad": goal_error.tolist(),
        "goal_error_max_rad": float(goal_error.max()),
        "goal_error_window_max_rad": error.max(axis=0).tolist(),
        "settling_window_s": float(settling_window_s),
        "settling_from_s": float(times[window][0]),
        "settling_to_s": float(times[-1]),
        "settling_peak_to_peak_rad": swing.tolist(),
        "settling_tolerance_rad": float(settling_tolerance),
        "settled": bool(np.all(swing <= settling_tolerance)),
        "peak_deviation_rad": deviation.max(axis=0).tolist(),
        "peak_deviation_time_s": float(times[int(np.argmax(worst))]),
        "recovery_band_rad": float(recovery_band),
        "recovery_time_s": recovery,
        "recovered": [r is not None for r in recovery],
        "perturbation_status": status,
        "n_untouched": status.count("untouched"),
        "peak_interaction_torque_Nm": np.abs(external).max(axis=0).tolist(),
        "peak_mechanism_torque_Nm": np.abs(mechanism).max(axis=0).tolist(),
    }
    metrics.update(_energy_outcome(energy or {}, energy_budget, tank_max_energy))
    violations = _limit_violations(times, position, mechanism, joints, n_joints)
    metrics["limit_violations"] = violations
    metrics["n_limit_violations"] = int(sum(sum(v["samples"]) for v in violations.values()))
    return metrics


_TANK_KEYS = ("energy_injected_J", "energy_injected_joint_J", "energy_tank_minimum_joint_J",
              "energy_tank_deficit_joint_J", "energy_tank_deficit_J")


def _energy_outcome(energy: Mapping[str, Any], initial: float, upper: float) -> dict[str, Any]:
    """``energy_J`` (final values) and the injected-energy and tank keys (None without traces)."""
    terms = {key: np.asarray(value, dtype=float) for key, value in energy.items()}
    outcome: dict[str, Any] = {"energy_J": {
        key: (value[-1] if value.ndim == 2 else value).tolist() for key, value in terms.items()}}
    injection = terms.get("stiffness_injection")
    if injection is None or injection.ndim != 2:
        check_tank_bounds(initial, upper)
        return {**outcome, **dict.fromkeys(_TANK_KEYS)}
    return {**outcome, **replay_energy_metrics(injection, terms.get("damping_dissipated"),
                                               initial_energy=initial, max_energy=upper)}


#: Actuator loads checked against the antagonistic mechanism's limits: (load, limit field).
ACTUATOR_LOADS = {"spring_tension": "spring_tension_limit", "motor_torque": "motor_torque_limit"}


def limit_excess(
    position: NDArray[np.float64], torque: NDArray[np.float64], joints: Sequence[JointParams],
    *, loads: Mapping[str, NDArray[np.float64]] | None = None,
    mechanisms: Sequence[MechanismParams] | None = None,
) -> dict[str, NDArray[np.float64]]:
    """How far each sample lies beyond a joint's limits (positive: beyond).

    Parameters
    ----------
    position : (n_samples, n_joints) rad
    torque : (n_samples, n_joints) N*m, the mechanism's torque on the link
    joints : JointParams per column
    loads : {"spring_tension" | "motor_torque": (n_samples, n_joints) N*m}, optional: the
        actuator loads the simulator records (:class:`compliant_demo.sim.SimResult`)
    mechanisms : mechanism record per column, whose limits the loads are checked against
        (a record without such a limit: none)

    Returns
    -------
    dict with ``"position"`` (distance outside [lower_limit, upper_limit], rad), ``"torque"``
    (|torque| - torque_limit, N*m) and each given load minus its limit (N*m), each
    (n_samples, n_joints).
    """
    lower = np.array([j.lower_limit for j in joints])
    upper = np.array([j.upper_limit for j in joints])
    limit = np.array([j.torque_limit for j in joints])
    excess = {
        "position": np.maximum(lower - position, position - upper),
        "torque": np.abs(torque) - limit,
    }
    for name, values in (loads or {}).items():
        field = ACTUATOR_LOADS[name]
        bound = np.array([getattr(m, field, np.inf) for m in mechanisms or ()])
        if bound.shape != (len(joints),):
            raise InvalidInputError(f"mechanisms: one record per joint needed to check {name}")
        excess[name] = np.asarray(values, dtype=float) - bound
    return excess


def first_limit_violation(
    t: ArrayLike,
    position: ArrayLike,
    torque: ArrayLike,
    joints: Sequence[JointParams],
    *,
    stiffness_rate: ArrayLike | None = None,
    max_stiffness_rate: float = float("inf"),
    loads: Mapping[str, NDArray[np.float64]] | None = None,
    mechanisms: Sequence[MechanismParams] | None = None,
) -> str | None:
    """The first sample beyond a joint's torque limit or range, or whose commanded stiffness
    changes faster than ``max_stiffness_rate``, described in one line; None when there is none.

    Parameters
    ----------
    t : (n_samples,) s
    position : (n_samples, n_joints) rad
    torque : (n_samples, n_joints) N*m, the mechanism's torque on the link
    joints : JointParams per column
    stiffness_rate : (n_samples, n_joints) N*m/rad/s, |rate| of the stiffness command in force
        at each sample, optional
    max_stiffness_rate : N*m/rad/s
    loads, mechanisms : actuator loads and the records with their limits (see
        :func:`limit_excess`)

    Notes
    -----
    Within the first offending sample the joints are taken in order, torque before range before
    spring tension before motor torque, and the stiffness rate last: the order a controller
    checking one period at a time meets them.
    """
    times = np.asarray(t, dtype=float).reshape(-1)
    q = np.asarray(position, dtype=float)
    tau = np.asarray(torque, dtype=float)
    excess = limit_excess(q, tau, joints, loads=loads, mechanisms=mechanisms)
    bad = np.logical_or.reduce([value > 0 for value in excess.values()])
    rate = None
    if stiffness_rate is not None and np.isfinite(max_stiffness_rate):
        rate = np.asarray(stiffness_rate, dtype=float)
        bad = bad | (rate > max_stiffness_rate)
    rows = np.flatnonzero(bad.any(axis=1))
    if rows.size == 0:
        return None
    k = int(rows[0])
    when = f"at t = {times[k]:.3f} s"
    for j, joint in enumerate(joints):
        if excess["torque"][k, j] > 0:
            reached, limit = _apart(abs(tau[k, j]), joint.torque_limit)
            sign = "-" if tau[k, j] < 0 else ""
            return (f"torque limit: {joint.name} mechanism torque {sign}{reached} N*m beyond the "
                    f"{limit} N*m limit {when}")
        if excess["position"][k, j] > 0:
            bound = joint.lower_limit if q[k, j] < joint.lower_limit else joint.upper_limit
            reached, _ = _apart(q[k, j], bound)
            return (f"joint range: {joint.name} at {reached} rad outside "
                    f"[{joint.lower_limit:.4g}, {joint.upper_limit:.4g}] rad {when}")
        for name, field in ACTUATOR_LOADS.items():
            if name in excess and excess[name][k, j] > 0:
                assert loads is not None and mechanisms is not None
                reached, limit = _apart(float(loads[name][k, j]), getattr(mechanisms[j], field))
                return (f"{name.replace('_', ' ')} limit: {joint.name} {reached} N*m beyond "
                        f"the {limit} N*m limit {when}")
    assert rate is not None
    j = int(np.argmax(rate[k]))
    reached, limit = _apart(rate[k, j], max_stiffness_rate)
    return (f"stiffness rate: {joints[j].name} commanded at {reached} N*m/rad/s beyond the "
            f"{limit} N*m/rad/s limit {when}")


def _apart(value: float, limit: float) -> tuple[str, str]:
    """``value`` and ``limit`` printed with the fewest significant digits (at least 3) that tell
    them apart, so a value just past its limit never reads as equal to it."""
    digits = 3
    while digits < 15 and f"{value:.{digits}g}" == f"{limit:.{digits}g}":
        digits += 1
    return f"{value:.{digits}g}", f"{limit:.{digits}g}"


def _limit_violations(
    t: NDArray[np.float64],
    position: NDArray[np.float64],
    torque: NDArray[np.float64],
    joints: Sequence[JointParams] | None,
    n_joints: int,
) -> dict[str, dict[str, list[float] | list[int]]]:
    """Samples, time and worst excess beyond each joint's end stops and torque limit."""
    if joints is None:
        return {}
    params = list(joints)
    if len(params) != n_joints:
        raise InvalidInputError(f"joints: {len(params)} JointParams for {n_joints} columns")
    dt = np.diff(t, prepend=t[0])[:, None]
    return {
        kind: {
            "samples": (value > 0).sum(axis=0).tolist(),
            "duration_s": ((value > 0) * dt).sum(axis=0).tolist(),
            "worst_excess": np.maximum(value.max(axis=0), 0.0).tolist(),
        }
        for kind, value in limit_excess(position, torque, params).items()
    }
