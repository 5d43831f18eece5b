"""Checks of a skill's impedance schedule before replay, and outcome metrics after it.

:func:`check_schedule` looks along a :class:`~compliant_demo.primitives.Rollout` at what the
target joint and its mechanism will actually do: the damping ratio on the joint's own inertia and
the damping it can realise (a teacher's stiffness copied onto a joint whose damping is not tied to
stiffness oscillates), the energy that raising stiffness while deflected injects (passivity), and
stiffness and damping rates and ranges against the mechanism's limits. It returns a plain
:class:`ScheduleReport` with per-sample arrays, flagged stretches and a summary dict.
:func:`outcome_metrics` takes plain arrays of a replay (so it does not depend on the simulator's
types) and returns goal error, deviation from the nominal path, recovery after perturbations,
interaction torque, energy and limit violations as a JSON-ready dict.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.arrays import finite_array, time_axis
from compliant_demo.exceptions import InvalidInputError
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
    "outcome_metrics",
    "ACTUATOR_LOADS",
    "limit_excess",
    "first_limit_violation",
]

FLAG_KINDS = (
    "under_damped", "energy_tank_empty", "stiffness_range", "stiffness_rate", "damping_range",
    "damping_rate", "position_range", "torque_limit",
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
    damping_ratio : d / (2*sqrt(k*I)) on the target joint, 1
    stiffness_rate : dK/dt of the commanded schedule, N*m/rad/s
    deflection : predicted spring deflection, rad (inverse dynamics along the path plus the
        assumed extra deflection)
    injection_power : 1/2 * dK/dt * deflection^2 with the realisable K, W (positive: energy put
        into the joint)
    tank_energy : energy tank level, J (starts at the budget, never above it)
    stretches : flagged stretches, ordered by joint then time
    summary : JSON-ready dict of per-joint extremes, thresholds and counts
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
    energy_budget: float = 0.05,
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
    extra_deflection : deflection assumed on top of the predicted one, rad, scalar or (n_joints,);
        e.g. the press depth of a contact phase
    energy_budget : energy tank capacity per joint, J
    chain : the coupled arm of the joints, or None (independent joints)

    Returns
    -------
    ScheduleReport

    Notes
    -----
    Damping ratio zeta = d / (2*sqrt(k*I)) of the joint's second-order dynamics. On a coupled
    arm I is the diagonal entry M_jj(q) of the mass matrix at each sample of the path: the
    inertia joint j moves with the others held still, matched to the per-joint (diagonal)
    stiffness and damping being checked; the eigen-decomposition of M would mix joints whose
    stiffness and damping differ. The deflection is
    the spring torque the joint needs along the path (:func:`_required_torque`) divided by the
    stiffness, plus ``extra_deflection``. Raising stiffness K while deflected by x changes the
    spring energy 1/2*K*x^2 by 1/2*dK/dt*x^2 per second without any motion, which breaks
    passivity; following Ferraguti, Secchi, Fantuzzi (ICRA 2013) that power is drawn from an
    energy tank of capacity ``energy_budget`` that lowering stiffness refills, and the samples
    where the tank would be empty are flagged.
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
    if not energy_budget >= 0:
        raise InvalidInputError(f"energy_budget: must be >= 0 J, got {energy_budget!r}")
    extra = np.broadcast_to(finite_array(extra_deflection, "extra_deflection"), (len(names),))
    if np.any(extra < 0):
        raise InvalidInputError(f"extra_deflection: must be >= 0 rad, got {extra.tolist()}")

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
    ratio = damping / (2.0 * np.sqrt(stiffness * inertia))
    k_rate = np.gradient(rollout.stiffness, t, axis=0)
    d_rate = np.gradient(rollout.damping, t, axis=0)
    torque = _required_torque(params, rollout, chain)
    deflection = np.abs(torque) / stiffness + extra
    # The energy follows the stiffness the mechanism realises, not the command beyond its range.
    power = 0.5 * np.gradient(stiffness, t, axis=0) * deflection**2
    tank = _tank(t, power, energy_budget)

    # (checked value, severity: positive where the check fails, unit) per kind.
    not_controllable = np.where(controllable, 0.0, -np.inf)
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
    }
    stretches: list[Stretch] = []
    for kind, (value, severity, unit) in checks.items():
        stretches.extend(_stretches(t, names, kind, value, severity, unit))
    stretches.sort(key=lambda s: (names.index(s.joint), s.t_start, FLAG_KINDS.index(s.kind)))
    dt = np.diff(t, prepend=t[0])
    summary = {
        "ok": not stretches,
        "joints": list(names),
        "min_damping_ratio": ratio.min(axis=0).tolist(),
        "under_damped_fraction": (ratio < min_damping_ratio).mean(axis=0).tolist(),
        "injected_energy_J": (np.maximum(power, 0.0) * dt[:, None]).sum(axis=0).tolist(),
        "tank_minimum_J": tank.min(axis=0).tolist(),
        "max_stiffness_rate": np.abs(k_rate).max(axis=0).tolist(),
        "stiffness_rate_limit": limits["k_rate"].tolist(),
        "max_predicted_deflection_rad": deflection.max(axis=0).tolist(),
        "damping_controllable": controllable.tolist(),
        "thresholds": {"min_damping_ratio": min_damping_ratio, "energy_budget_J": energy_budget,
                       "extra_deflection_rad": extra.tolist()},
        "stretch_counts": {kind: sum(s.kind == kind for s in stretches) for kind in FLAG_KINDS},
    }
    return ScheduleReport(t, names, stiffness, damping, ratio, k_rate, deflection, power, tank,
                          stretches, summary)


def _tank(t: NDArray[np.float64], power: NDArray[np.float64], budget: float) -> NDArray:
    """Tank level per sample, J: starts full, drained by injection, refilled up to capacity.

    The deficit D_k = max(0, D_{k-1} + p_k*dt_k) is Lindley's recursion, whose closed form is
    S_k - min(0, min_{i<=k} S_i) with S the running sum of p*dt (common practice).
    """
    dt = np.diff(t, prepend=t[0])[:, None]
    drained = np.cumsum(power * dt, axis=0)
    deficit = drained - np.minimum(np.minimum.accumulate(drained, axis=0), 0.0)
    return budget - deficit


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
    energy : energy terms, J, each a scalar or (n_joints,) (e.g. ``SimResult.energy.final()``
        for one scenario); ``stiffness_injection`` is reported as ``energy_injected_J``
    joints : JointParams per column, for position and torque limit violations
    recovery_band : max over joints of |q - q_nominal| that counts as recovered, rad
    perturbation_acted : (n_perturbations,) bool, optional; False for a perturbation that never
        acted on the link (a wall it never touched): its recovery is not measured and it is
        never counted as recovered. Default: every perturbation acted.

    Returns
    -------
    dict with goal_error_rad (per joint), goal_error_max_rad, peak_deviation_rad (per joint),
    peak_deviation_time_s, recovery_band_rad, recovery_time_s (per perturbation, None when not
    recovered inside its window or it never acted), recovered (per perturbation),
    perturbation_status (per perturbation: "recovered", "not_recovered" or "untouched"),
    n_untouched, peak_interaction_torque_Nm,
    peak_mechanism_torque_Nm, energy_J (terms as given), energy_injected_J, limit_violations
    (per kind: samples, duration_s, worst excess per joint) and n_limit_violations.
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
    goal_error = np.abs(position[-1] - target)
    metrics: dict[str, Any] = {
        "goal_error_rad": goal_error.tolist(),
        "goal_error_max_rad": float(goal_error.max()),
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
    terms = {key: np.asarray(value, dtype=float).tolist() for key, value in (energy or {}).items()}
    metrics["energy_J"] = terms
    injected = terms.get("stiffness_injection")
    metrics["energy_injected_J"] = None if injected is None else float(np.sum(injected))
    violations = _limit_violations(times, position, mechanism, joints, n_joints)
    metrics["limit_violations"] = violations
    metrics["n_limit_violations"] = int(sum(sum(v["samples"]) for v in violations.values()))
    return metrics


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
