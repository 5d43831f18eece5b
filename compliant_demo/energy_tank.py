"""The passivity energy tank of a variable-stiffness joint, along a schedule or over a replay.

Raising a spring's stiffness K while it is deflected by x adds 1/2*dK/dt*x^2 of energy per second
without any motion: the one term that can make a joint with varying impedance active. Following
Ferraguti, Secchi and Fantuzzi ("A tank-based approach to impedance control with variable
stiffness", ICRA 2013), that power is paid from an energy tank which the impedance's damper fills
with the power it dissipates, D*dq^2; the tank starts at a stated level and never holds more than a
stated upper bound. Where the tank would run dry, the schedule asks for more energy than the joint
has dissipated and been given: a passive implementation would have to refuse that stiffening.
The paper could not be consulted here: the tank's structure (damping inflow, initial level, upper
bound, no outflow when empty) is from memory, and, as remembered, it books the varying part of
the stiffness as a port with power -x*K_var(t)*dx/dt against a constant-stiffness storage. This
module books 1/2*dK/dt*x^2 instead, the one non-passive term of the storage 1/2*I*dq^2 +
1/2*K(t)*x^2 (d/dt of 1/2*K*x^2 is K*x*dx/dt + 1/2*dK/dt*x^2): the same passivity accounting with
the whole spring in the storage, and the term the simulator records as ``stiffness_injection``.
:func:`tank_levels` runs the tank on energy increments; :func:`replay_energy_metrics` scores a
simulated replay from its cumulative energy traces (:func:`scenario_energy` takes them from a
simulation).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.arrays import finite_array
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.sim.results import SimResult

__all__ = [
    "TANK_INITIAL_ENERGY_J",
    "TANK_MAX_ENERGY_J",
    "check_tank_bounds",
    "tank_levels",
    "replay_energy_metrics",
    "scenario_energy",
]

#: Default tank level at the start, J: what a 10 N*m/rad spring stores at 0.1 rad deflection
#: (1/2 * 10 * 0.1^2; an invented default for the demo plant, to be set by the criteria).
TANK_INITIAL_ENERGY_J = 0.05
#: Default upper bound of the tank, J: ten times the initial level, so a long damped motion cannot
#: bank an unbounded budget for a later stiffening (the reason the tank is bounded; an invented
#: default, to be set by the criteria).
TANK_MAX_ENERGY_J = 0.5


def check_tank_bounds(initial_energy: float, max_energy: float) -> None:
    """Refuse a negative initial level or one above the upper bound (both J)."""
    if not (np.isfinite(initial_energy) and initial_energy >= 0):
        raise InvalidInputError(f"energy_budget: must be >= 0 J, got {initial_energy!r}")
    if not (np.isfinite(max_energy) and max_energy >= initial_energy):
        raise InvalidInputError(f"tank_max_energy: must be finite and >= the initial energy "
                                f"{initial_energy!r} J, got {max_energy!r}")


def tank_levels(
    increments: NDArray[np.float64], initial_energy: float, max_energy: float
) -> NDArray[np.float64]:
    """Tank level after each energy increment, J.

    Parameters
    ----------
    increments : (n_samples, n_joints) J; energy into the tank in each sample (dissipated by the
        damper minus paid for stiffness variation; negative: drawn)
    initial_energy : level before the first increment, J
    max_energy : upper bound, J; inflow beyond it is lost, as the tank's valve closes when full

    Returns
    -------
    (n_samples, n_joints) array, J. The level may go below zero: that is the energy the schedule
    asks for beyond what the tank holds (a real tank stops paying at zero).

    Notes
    -----
    The recursion level_k = min(max_energy, level_{k-1} + increment_k) is a walk reflected at an
    upper barrier; its closed form is S_k - max(0, max_{i<=k} (S_i - max_energy)) with S the
    initial level plus the running sum of increments (Skorokhod reflection, common practice).
    """
    check_tank_bounds(initial_energy, max_energy)
    running = initial_energy + np.cumsum(increments, axis=0)
    overflow = np.maximum(np.maximum.accumulate(running - max_energy, axis=0), 0.0)
    return np.asarray(running - overflow)


def replay_energy_metrics(
    stiffness_injection: ArrayLike,
    damping_dissipated: ArrayLike | None = None,
    *,
    initial_energy: float = TANK_INITIAL_ENERGY_J,
    max_energy: float = TANK_MAX_ENERGY_J,
) -> dict[str, Any]:
    """Injected energy and the tank's deficit over a replay, from cumulative energy traces.

    Parameters
    ----------
    stiffness_injection : (n_samples, n_joints) J; running integral of 1/2*dK/dt*x^2 since the
        start (``SimResult.energy.stiffness_injection`` of one scenario)
    damping_dissipated : (n_samples, n_joints) J; running integral of the mechanism damper's
        dissipated power D*dq^2, or None (a mechanism without damping: no inflow)
    initial_energy, max_energy : the tank's initial level and upper bound, J

    Returns
    -------
    dict with ``energy_injected_J`` (sum over joints of the positive part of the injected power's
    integral: stiffening while deflected counts, softening does not cancel it), its per-joint
    list ``energy_injected_joint_J``, ``energy_tank_minimum_joint_J`` (lowest tank level per joint),
    ``energy_tank_deficit_joint_J`` (how far each joint's tank goes below zero, >= 0) and
    ``energy_tank_deficit_J`` (the largest of them), all J.

    Notes
    -----
    The positive part is taken per recorded sample: between two samples only the net increment is
    known, so a stiffening and a softening inside one sample interval still cancel there.
    """
    injection = finite_array(stiffness_injection, "stiffness_injection")
    if injection.ndim != 2:
        raise InvalidInputError(f"stiffness_injection: expected (n_samples, n_joints), got shape "
                                f"{injection.shape}")
    dissipated = (np.zeros_like(injection) if damping_dissipated is None
                  else finite_array(damping_dissipated, "damping_dissipated"))
    if dissipated.shape != injection.shape:
        raise InvalidInputError(f"damping_dissipated: expected shape {injection.shape}, got "
                                f"{dissipated.shape}")
    paid = np.diff(injection, axis=0, prepend=injection[:1])
    gained = np.diff(dissipated, axis=0, prepend=dissipated[:1])
    levels = tank_levels(gained - paid, initial_energy, max_energy)
    injected = np.maximum(paid, 0.0).sum(axis=0)
    deficit = np.maximum(-levels.min(axis=0), 0.0)
    return {
        "energy_injected_J": float(injected.sum()),
        "energy_injected_joint_J": injected.tolist(),
        "energy_tank_minimum_joint_J": levels.min(axis=0).tolist(),
        "energy_tank_deficit_joint_J": deficit.tolist(),
        "energy_tank_deficit_J": float(deficit.max()),
    }


def scenario_energy(result: SimResult, column: int, rows: slice = slice(None)
                    ) -> dict[str, NDArray[np.float64]]:
    """Cumulative energy traces of one scenario of a simulation, ``(n_rows, n_joints)`` J each.

    Parameters
    ----------
    result : a simulation (:class:`compliant_demo.sim.SimResult`)
    column : the scenario
    rows : the recorded samples to keep

    Returns
    -------
    dict with every :class:`~compliant_demo.sim.results.EnergyTraces` term and
    ``damping_dissipated``: the running integral of the mechanism damper's power
    D_realised*dq^2 over the recorded samples (trapezoidal rule; exact to the sample spacing).
    """
    energy = result.energy
    traces = {name: np.asarray(getattr(energy, name)[:, column, :]) for name in energy.at(0)}
    power = result.damping_realised[:, column, :] * result.dq[:, column, :] ** 2
    steps = np.diff(result.t)[:, None] * 0.5 * (power[1:] + power[:-1])
    traces["damping_dissipated"] = np.vstack([np.zeros((1, power.shape[1])),
                                              np.cumsum(steps, axis=0)])
    return {name: value[rows] for name, value in traces.items()}
