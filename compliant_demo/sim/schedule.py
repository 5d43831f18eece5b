"""Perturbation schedules compiled onto the integration grid of a batch of scenarios.

Torque kinds become :class:`TorqueTerm` objects (a profile over a span of steps that fills
chunks of the stage-time torque array); walls, holds and instantaneous impulses become events at
step indexes. The reference integrator reads the same compiled terms, so both see identical
perturbations.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.perturbation import (
    Impulse,
    PerturbationSchedule,
    RandomTorque,
    Sinusoid,
    TorqueStep,
    TorqueWindow,
    Wall,
    raised_cosine_edges,
    random_torque_coefficients,
    random_torque_value,
    step_span,
)

__all__ = ["TorqueTerm", "WallSpec", "CompiledSchedules", "compile_schedules", "STAGE_OFFSETS"]

# stage times of one step as fractions of the step, shared by all methods (RK4 needs all three)
STAGE_OFFSETS = np.array([0.0, 0.5, 1.0])
_PROFILE_STEPS = 2048  # steps of a term's torques evaluated at once (see CompiledSchedules)
_NO_VALUES = np.zeros((0, len(STAGE_OFFSETS)))


@dataclass(frozen=True)
class TorqueTerm:
    """A time-dependent torque on one joint of one scenario during steps [start, stop).

    ``profile(t)`` gives the torque, N*m, at times ``t`` since the (snapped) onset, s.
    """

    scenario: int
    joint: int
    start: int
    stop: int
    profile: Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class WallSpec:
    """A wall on one joint of one scenario during steps [start, stop).

    With ``relative`` the surface is ``position`` from the link angle at the start step.
    """

    scenario: int
    joint: int
    start: int
    stop: int
    position: float
    side: int
    stiffness: float
    damping: float
    layer: int
    relative: bool = False


@dataclass
class CompiledSchedules:
    """Everything a batch of schedules does, on the grid of step ``dt``.

    Attributes
    ----------
    terms : time-dependent torques
    walls : wall contacts, each in a layer so no two walls of a layer share a joint
    holds : (scenario, joint, start, stop) tuples
    impulses : (scenario, joint, step, angular impulse N*m*s) velocity jumps
    """

    dt: float
    n_scenarios: int
    n_joints: int
    terms: list[TorqueTerm] = field(default_factory=list)
    walls: list[WallSpec] = field(default_factory=list)
    holds: list[tuple[int, int, int, int]] = field(default_factory=list)
    impulses: list[tuple[int, int, int, float]] = field(default_factory=list)
    starts: list[tuple[int, int, int]] = field(default_factory=list)
    # [start, stop) of every term, for picking those a chunk overlaps
    _spans: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), dtype=np.int64),
                               repr=False, compare=False)
    # a term's torques (steps, stages) from its first step in a chunk over up to
    # _PROFILE_STEPS steps (a term may last indefinitely), kept until a chunk goes past them
    # or the term ends: its profile is evaluated once for several chunks
    _profiles: dict[int, tuple[int, np.ndarray]] = field(default_factory=dict, repr=False,
                                                         compare=False)

    def starts_at_or_after(self, step: int) -> list[str]:
        """Names ``schedules[s].perturbations[i]`` of those starting at or after ``step``."""
        return [
            f"schedules[{s}].perturbations[{i}]" for s, i, start in self.starts if start >= step
        ]

    @property
    def n_wall_layers(self) -> int:
        return 1 + max((w.layer for w in self.walls), default=-1)

    def wall_stiffness(self) -> tuple[np.ndarray, np.ndarray]:
        """Stiffest wall per joint and the damping of the most damped one, (n_joints,) each."""
        k = np.zeros(self.n_joints)
        b = np.zeros(self.n_joints)
        for w in self.walls:
            k[w.joint] = max(k[w.joint], w.stiffness)
            b[w.joint] = max(b[w.joint], w.damping)
        return k, b

    def fill_torque(self, out: np.ndarray, first_step: int) -> bool:
        """Add term torques at stage times into ``out`` ``(C, 3, n_joints, n_scenarios)``.

        Returns False (leaving ``out`` untouched) when no term overlaps the chunk.
        """
        n_chunk = out.shape[0]
        last = first_step + n_chunk
        if len(self._spans) != len(self.terms):
            self._spans = np.array([(term.start, term.stop) for term in self.terms],
                                   dtype=np.int64).reshape(-1, 2)
        touched = False
        overlapping = (self._spans[:, 0] < last) & (self._spans[:, 1] > first_step)
        for index in np.flatnonzero(overlapping).tolist():
            term = self.terms[index]
            a, b = max(term.start, first_step), min(term.stop, last)
            first, values = self._profiles.get(index, (a, _NO_VALUES))
            if not first <= a <= b <= first + len(values):
                first, end = a, min(term.stop, a + max(b - a, _PROFILE_STEPS))
                t = (np.arange(first, end)[:, None] - term.start + STAGE_OFFSETS) * self.dt
                values = term.profile(t)
                self._profiles[index] = (first, values)
            out[a - first_step : b - first_step, :, term.joint, term.scenario] += (
                values[a - first : b - first])
            if b == term.stop:
                del self._profiles[index]
            touched = True
        return touched

    def torque_at(self, scenario: int, t: float, step: int) -> np.ndarray:
        """Term torques (n_joints,) of one scenario at time ``t`` inside step ``step``, N*m."""
        total = np.zeros(self.n_joints)
        for term in self.terms:
            if term.scenario == scenario and term.start <= step < term.stop:
                total[term.joint] += float(term.profile(np.array(t - term.start * self.dt)))
        return total


def _constant(value: float) -> Callable[[np.ndarray], np.ndarray]:
    return lambda t: np.full(np.shape(t), value)


def _window(value: float, ramp: float, length: float) -> Callable[[np.ndarray], np.ndarray]:
    return lambda t: raised_cosine_edges(t, length, ramp, value)


def _sine(amplitude: float, frequency: float, phase: float) -> Callable[[np.ndarray], np.ndarray]:
    return lambda t: amplitude * np.sin(2 * np.pi * frequency * t + phase)


def _tapered_series(
    frequencies: np.ndarray, coefficients: np.ndarray, ramp: float, length: float
) -> Callable[[np.ndarray], np.ndarray]:
    return lambda t: (random_torque_value(frequencies, coefficients, t)
                      * raised_cosine_edges(t, length, ramp))


def _below_nyquist(frequency_hz: float, name: str, dt: float) -> None:
    if frequency_hz >= 0.5 / dt:
        raise InvalidInputError(
            f"{name} = {frequency_hz}: at or above the Nyquist frequency {0.5 / dt} Hz of the step"
        )


def compile_schedules(
    schedules: Sequence[PerturbationSchedule] | None,
    n_scenarios: int,
    joint_inertia: Sequence[float],
    dt: float,
    seed: int | None,
) -> CompiledSchedules:
    """Compile one schedule per scenario (or none) onto the grid of steps of ``dt``.

    Random torques without their own seed draw from ``seed`` and the scenario and position
    indexes, so each scenario's draw does not depend on the batch it runs in.
    """
    n_joints = len(joint_inertia)
    compiled = CompiledSchedules(dt=dt, n_scenarios=n_scenarios, n_joints=n_joints)
    if schedules is None:
        return compiled
    base_seed = seed if seed is not None else int(np.random.SeedSequence().generate_state(1)[0])
    layer_count: dict[tuple[int, int], int] = {}
    for s, schedule in enumerate(schedules):
        for i, p in enumerate(schedule.perturbations):
            if p.joint >= n_joints:
                raise InvalidInputError(
                    f"schedules[{s}].perturbations[{i}].joint = {p.joint}: only {n_joints} "
                    "joint(s) are simulated"
                )
            start, stop = step_span(p, dt)
            compiled.starts.append((s, i, start))
            if isinstance(p, Impulse):
                signed = p.sign * p.magnitude
                if start == stop:
                    compiled.impulses.append((s, p.joint, start, signed))
                else:
                    height = signed / ((stop - start) * dt)
                    compiled.terms.append(TorqueTerm(s, p.joint, start, stop, _constant(height)))
            elif isinstance(p, TorqueStep):
                profile = _constant(p.sign * p.magnitude)
                compiled.terms.append(TorqueTerm(s, p.joint, start, stop, profile))
            elif isinstance(p, TorqueWindow):
                length = (stop - start) * dt
                ramp = min(p.ramp_s, 0.5 * length)
                profile = _window(p.sign * p.magnitude, ramp, length)
                compiled.terms.append(TorqueTerm(s, p.joint, start, stop, profile))
            elif isinstance(p, Sinusoid):
                where = f"schedules[{s}].perturbations[{i}]"
                _below_nyquist(p.frequency_hz, f"{where}.frequency_hz", dt)
                profile = _sine(p.sign * p.magnitude, p.frequency_hz, p.phase_rad)
                compiled.terms.append(TorqueTerm(s, p.joint, start, stop, profile))
            elif isinstance(p, RandomTorque):
                where = f"schedules[{s}].perturbations[{i}]"
                _below_nyquist(p.bandwidth_hz, f"{where}.bandwidth_hz", dt)
                if stop == start:
                    continue
                rng = np.random.default_rng(p.seed if p.seed is not None else [base_seed, s, i])
                length = (stop - start) * dt
                freqs, coefs = random_torque_coefficients(p, length, rng)
                profile = _tapered_series(freqs, coefs, 0.5 * p.taper_fraction * length, length)
                compiled.terms.append(TorqueTerm(s, p.joint, start, stop, profile))
            elif isinstance(p, Wall):
                layer = layer_count.get((s, p.joint), 0)
                layer_count[(s, p.joint)] = layer + 1
                compiled.walls.append(
                    WallSpec(s, p.joint, start, stop, p.position, p.sign, p.magnitude, p.damping,
                             layer, p.relative)
                )
            elif stop > start:  # a hold; a zero-length one does nothing
                compiled.holds.append((s, p.joint, start, stop))
    return compiled
