"""The safety envelope on a hardware command stream, independent of the skill it carries.

A :class:`SafetyEnvelope` turns a skill's command arrays (equilibrium, stiffness, damping per
control period) into the commands a joint impedance controller is sent, one control period at a
time, and stops on its own when something is wrong. It knows nothing of ROS: the replay node's
hardware mode feeds it measured joint angles with their arrival times and publishes what it
returns; the benchmark runs it against the simulator in-process.

Phases, in order: ``starting`` (soft start), ``running`` (the skill's commands, clamped),
``stopping`` (the stop ramp) and ``held`` (the stop's final command, held until the run ends).

Soft start: the first command is the measured pose as equilibrium at ``safe_stiffness`` (the
stiffness the controller is assumed to hold before the run; configure the controller to start
there) and zero change; over ``soft_start_s`` the command is blended with a raised-cosine weight
from that state to the skill's first command, then the skill runs from its first period. Every
command, also in the soft start, passes the clamps: stiffness within [``stiffness_min``,
``stiffness_max``], stiffness change at most ``max_stiffness_rate`` * dt, equilibrium change at
most ``max_equilibrium_rate`` * dt, damping within [0, ``damping_max``] (a clamped skill command
is counted, never an error).

Watchdogs, checked every period before the command is computed:

- ``interaction_torque``: the torque the joint's spring carries, estimated from the measured
  deflection as K * (q_eq - q) with the stiffness and equilibrium last commanded, exceeds
  ``max_interaction_torque`` on a joint. The estimate contains every static load the spring holds
  (gravity, the feedforward of the path), so the limit must lie above them.
- ``stale_feedback``: no fresh joint state (a sample with a newer stamp) has arrived for longer
  than ``feedback_timeout_s``. With the timeout at 1.5 control periods and feedback at the control
  rate, the stop is commanded at most two periods after the first sample that failed to arrive.

What a stop commands (every stop, whatever its reason, including ``requested`` through the stop
service and ``completed`` at the end of the skill):

1. The equilibrium goes to the last measured joint angles in one period and stays there. This one
   step is exempt from the equilibrium rate clamp: moving the equilibrium onto the link's measured
   angle removes the spring's estimated torque K * (q_eq - q) rather than adding to it.
2. The stiffness ramps from the last command to ``safe_stiffness`` at ``max_stiffness_rate``.
3. The damping command goes to ``safe_damping``.
4. Once the stiffness has reached ``safe_stiffness`` the phase is ``held``: the same command is
   sent every period until the run ends. A stop during a stop is recorded but changes nothing.

The envelope adds no safety function to the robot: the robot's own safety functions and a risk
assessment under the applicable standards (ISO 10218, ISO/TS 15066) decide what may run on it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields

import numpy as np
from numpy.typing import NDArray

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "PHASES",
    "STOP_REASONS",
    "EnvelopeCommand",
    "EnvelopeLimits",
    "SafetyEnvelope",
    "Stop",
    "envelope_violations",
]

#: Phases of a run, in the order they can follow each other.
PHASES: tuple[str, ...] = ("starting", "running", "stopping", "held")

#: Why a run stops.
STOP_REASONS: tuple[str, ...] = (
    "interaction_torque", "stale_feedback", "requested", "other_commander", "completed",
    "max_steps", "shutdown",
)

_RATE_TOLERANCE = 1e-9  # relative slack of the rate checks, for float rounding only


@dataclass(frozen=True)
class EnvelopeLimits:
    """Limits of the command stream, independent of any skill.

    Attributes
    ----------
    stiffness_min, stiffness_max : float, N*m/rad
        Range every stiffness command is clamped to.
    max_stiffness_rate : float, N*m/rad/s
        Largest change of a stiffness command per second.
    max_equilibrium_rate : float, rad/s
        Largest change of an equilibrium command per second (except the stop's one step).
    max_interaction_torque : float, N*m
        Estimated spring torque K * (q_eq - q) on any joint that stops the run.
    safe_stiffness : float, N*m/rad
        Stiffness of the soft start's first command and of a stop's hold; within the range.
    damping_max : float, N*m*s/rad
        Largest damping command.
    safe_damping : float, N*m*s/rad
        Damping command of the soft start's first command and of a stop's hold.
    soft_start_s : float, s
        Duration of the blend from the measured pose to the skill's first command.
    feedback_timeout_s : float, s
        Age of the last fresh joint state that stops the run.
    """

    stiffness_min: float
    stiffness_max: float
    max_stiffness_rate: float
    max_equilibrium_rate: float
    max_interaction_torque: float
    safe_stiffness: float
    damping_max: float
    safe_damping: float
    soft_start_s: float
    feedback_timeout_s: float

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if isinstance(value, bool) or not isinstance(value, int | float) or not (
                math.isfinite(value) and value >= 0
            ):
                raise InvalidInputError(
                    f"{item.name} = {value!r}: expected a finite, non-negative number"
                )
        for name in ("max_stiffness_rate", "max_equilibrium_rate", "max_interaction_torque",
                     "stiffness_max", "feedback_timeout_s"):
            if getattr(self, name) == 0:
                raise InvalidInputError(f"{name} = 0: must be positive")
        if self.stiffness_min > self.stiffness_max:
            raise InvalidInputError(
                f"stiffness_min = {self.stiffness_min} is above stiffness_max = "
                f"{self.stiffness_max}"
            )
        if not self.stiffness_min <= self.safe_stiffness <= self.stiffness_max:
            raise InvalidInputError(
                f"safe_stiffness = {self.safe_stiffness}: must lie within [{self.stiffness_min}, "
                f"{self.stiffness_max}] N*m/rad"
            )
        if self.safe_damping > self.damping_max:
            raise InvalidInputError(
                f"safe_damping = {self.safe_damping}: must not exceed damping_max = "
                f"{self.damping_max}"
            )


@dataclass(frozen=True)
class Stop:
    """One stop: ``reason`` (one of :data:`STOP_REASONS`), a one-line ``detail``, the run time
    ``t`` (s from the run's start) and the ``measured`` angles (rad) it held as equilibrium."""

    reason: str
    detail: str
    t: float
    measured: tuple[float, ...]

    def as_dict(self) -> dict[str, object]:
        """The stop as plain data (stored with the run and listed in diagnostics)."""
        return {"reason": self.reason, "detail": self.detail, "t_s": self.t,
                "measured_rad": list(self.measured)}


@dataclass(frozen=True)
class EnvelopeCommand:
    """What is sent in one control period: ``equilibrium`` (rad), ``stiffness`` (N*m/rad) and
    ``damping`` (N*m*s/rad, None when the skill commands none), each (n_joints,), the ``phase``,
    whether a clamp changed the skill's command (``clamped``) and the ``stop`` begun this period."""

    equilibrium: NDArray[np.float64]
    stiffness: NDArray[np.float64]
    damping: NDArray[np.float64] | None
    phase: str
    clamped: bool = False
    stop: Stop | None = None


@dataclass
class _Trace:
    t: list[float] = field(default_factory=list)
    equilibrium: list[NDArray[np.float64]] = field(default_factory=list)
    stiffness: list[NDArray[np.float64]] = field(default_factory=list)
    damping: list[NDArray[np.float64]] = field(default_factory=list)
    measured: list[NDArray[np.float64]] = field(default_factory=list)
    stop_entry: list[bool] = field(default_factory=list)


class SafetyEnvelope:
    """The skill's commands through the envelope, one control period per :meth:`tick`.

    Parameters
    ----------
    limits : EnvelopeLimits
    dt : float, s
        Control period.
    equilibrium, stiffness : (n_steps, n_joints) arrays, rad and N*m/rad
        The skill's commands, row k for period k of the running phase.
    damping : (n_steps, n_joints) array, N*m*s/rad, or None (the controller gets none)
    measured : (n_joints,) array, rad
        The joint angles measured when the run starts (the soft start's first equilibrium).
    max_steps : int
        Periods after which the run stops (reason ``max_steps``); bounds the recorded trace.
    """

    def __init__(
        self,
        limits: EnvelopeLimits,
        dt: float,
        equilibrium: NDArray[np.float64],
        stiffness: NDArray[np.float64],
        damping: NDArray[np.float64] | None,
        measured: NDArray[np.float64],
        *,
        max_steps: int = 10_000_000,
    ) -> None:
        if not (math.isfinite(dt) and dt > 0):
            raise InvalidInputError(f"dt = {dt!r}: expected a positive control period in s")
        self.limits, self.dt = limits, float(dt)
        self._equilibrium = _commands("equilibrium", equilibrium)
        n_steps, n_joints = self._equilibrium.shape
        self._stiffness = _commands("stiffness", stiffness, (n_steps, n_joints))
        self._damping = None if damping is None else _commands("damping", damping,
                                                               (n_steps, n_joints))
        start = _commands("measured", np.asarray(measured, dtype=float)[None, :],
                          (1, n_joints))[0]
        self.n_joints, self.n_steps = n_joints, n_steps
        self.max_steps = int(max_steps)
        self.phase = "starting"
        self.skill_step = 0
        self.periods = 0
        self.clamped_periods = 0
        self.stops: list[Stop] = []
        self._soft_periods = max(1, round(limits.soft_start_s / self.dt))
        self._start_equilibrium = start
        self._last_equilibrium = start.copy()
        self._last_stiffness = np.full(n_joints, limits.safe_stiffness)
        self._last_damping = np.full(n_joints, limits.safe_damping)
        self._last_measured = start.copy()
        self._pending: tuple[str, str] | None = None
        self._trace = _Trace()

    @property
    def finished(self) -> bool:
        """True once the stop's final command is held."""
        return self.phase == "held"

    def request_stop(self, reason: str, detail: str) -> None:
        """Stop at the next :meth:`tick` (the stop service, another commander, shutdown)."""
        if reason not in STOP_REASONS:
            raise InvalidInputError(f"reason = {reason!r}: expected one of {STOP_REASONS}")
        if self._pending is None:
            self._pending = (reason, detail)

    def tick(self, now_s: float, measured: NDArray[np.float64] | None,
             fresh_at_s: float | None) -> EnvelopeCommand:
        """The command of the next control period.

        Parameters
        ----------
        now_s : float, s
            Time of this period on the clock ``fresh_at_s`` uses (from the run's start).
        measured : (n_joints,) array, rad, or None
            The latest measured joint angles (None: none since the start). Another shape or a
            non-finite angle stops the run (``stale_feedback``) on the last usable angles.
        fresh_at_s : float or None, s
            When the latest fresh joint state (newer stamp than the one before) arrived.
        """
        if measured is not None:
            sample = np.asarray(measured, dtype=float)
            if sample.shape == (self.n_joints,) and np.isfinite(sample).all():
                self._last_measured = sample.copy()
            else:  # never a command from it: stop on the last usable pose
                self.request_stop("stale_feedback", f"unusable joint state: shape {sample.shape}"
                                  f", finite: {bool(np.isfinite(sample).all())}")
        stop = self._watch(now_s, fresh_at_s)
        if stop is not None:
            command = self._begin_stop(stop)
        elif self.phase in ("stopping", "held"):
            command = self._ramp_stop()
        else:
            command = self._next_skill_command(now_s)
        self.periods += 1
        self.clamped_periods += int(command.clamped)
        self._remember(now_s, command)
        return command

    def trace(self) -> dict[str, NDArray[np.float64]]:
        """Every command sent: ``t`` (s), ``equilibrium``, ``stiffness``, ``damping`` (when
        commanded), the ``measured`` angles each was computed from (rad) and ``stop_entry`` (1.0
        on the first period of a stop), each (n_periods,) or (n_periods, n_joints)."""
        trace = self._trace
        arrays = {
            "t": np.asarray(trace.t, dtype=float),
            "equilibrium": np.asarray(trace.equilibrium, dtype=float).reshape(-1, self.n_joints),
            "stiffness": np.asarray(trace.stiffness, dtype=float).reshape(-1, self.n_joints),
            "measured": np.asarray(trace.measured, dtype=float).reshape(-1, self.n_joints),
            "stop_entry": np.asarray(trace.stop_entry, dtype=float),
        }
        if self._damping is not None:
            arrays["damping"] = np.asarray(trace.damping, dtype=float).reshape(-1, self.n_joints)
        return arrays

    # -- the phases ---------------------------------------------------------------------------

    def _watch(self, now_s: float, fresh_at_s: float | None) -> Stop | None:
        """The stop that begins this period, or None (a stop during a stop is only recorded)."""
        reason: tuple[str, str] | None = None
        if self._pending is not None:
            reason, self._pending = self._pending, None
        elif self.phase in ("starting", "running"):
            reason = self._watchdogs(now_s, fresh_at_s)
            if reason is None and self.periods >= self.max_steps:
                reason = ("max_steps", f"{self.max_steps} periods sent")
        if reason is None:
            return None
        stop = Stop(reason[0], reason[1], float(now_s),
                    tuple(float(v) for v in self._last_measured))
        self.stops.append(stop)
        return stop if self.phase in ("starting", "running") else None

    def _watchdogs(self, now_s: float, fresh_at_s: float | None) -> tuple[str, str] | None:
        limits = self.limits
        age = math.inf if fresh_at_s is None else now_s - fresh_at_s
        if age > limits.feedback_timeout_s:
            return ("stale_feedback", f"no fresh joint state for {age * 1e3:.3g} ms (timeout "
                                      f"{limits.feedback_timeout_s * 1e3:.3g} ms)")
        torque = self._last_stiffness * (self._last_equilibrium - self._last_measured)
        worst = int(np.argmax(np.abs(torque)))
        if abs(torque[worst]) > limits.max_interaction_torque:
            return ("interaction_torque", f"joint {worst}: K*(q_eq - q) = {torque[worst]:.4g} "
                                          f"N*m beyond {limits.max_interaction_torque:g} N*m")
        return None

    def _next_skill_command(self, now_s: float) -> EnvelopeCommand:
        if self.phase == "starting" and self.periods >= self._soft_periods:
            self.phase = "running"
        if self.phase == "running" and self.skill_step >= self.n_steps:
            stop = Stop("completed", f"all {self.n_steps} skill periods sent", float(now_s),
                        tuple(float(v) for v in self._last_measured))
            self.stops.append(stop)
            return self._begin_stop(stop)
        if self.phase == "starting":
            weight = 0.5 * (1.0 - math.cos(math.pi * (self.periods + 1) / self._soft_periods))
            equilibrium = self._start_equilibrium + weight * (
                self._equilibrium[0] - self._start_equilibrium)
            stiffness = self.limits.safe_stiffness + weight * (
                self._stiffness[0] - self.limits.safe_stiffness)
            damping = None if self._damping is None else self.limits.safe_damping + weight * (
                self._damping[0] - self.limits.safe_damping)
        else:
            k = self.skill_step
            equilibrium, stiffness = self._equilibrium[k], self._stiffness[k]
            damping = None if self._damping is None else self._damping[k]
            self.skill_step += 1
        return self._clamped(equilibrium, stiffness, damping)

    def _clamped(self, equilibrium: NDArray[np.float64], stiffness: NDArray[np.float64],
                 damping: NDArray[np.float64] | None) -> EnvelopeCommand:
        limits, dt = self.limits, self.dt
        k_step = limits.max_stiffness_rate * dt
        q_step = limits.max_equilibrium_rate * dt
        new_stiffness = np.clip(stiffness, limits.stiffness_min, limits.stiffness_max)
        new_stiffness = np.clip(new_stiffness, self._last_stiffness - k_step,
                                self._last_stiffness + k_step)
        new_equilibrium = np.clip(equilibrium, self._last_equilibrium - q_step,
                                  self._last_equilibrium + q_step)
        new_damping = None if damping is None else np.clip(damping, 0.0, limits.damping_max)
        clamped = bool(
            np.any(new_stiffness != stiffness) or np.any(new_equilibrium != equilibrium)
            or (damping is not None and np.any(new_damping != damping))
        )
        return EnvelopeCommand(new_equilibrium, new_stiffness, new_damping, self.phase, clamped)

    def _begin_stop(self, stop: Stop) -> EnvelopeCommand:
        self.phase = "stopping"
        self._last_equilibrium = self._last_measured.copy()
        command = self._ramp_stop()
        return EnvelopeCommand(command.equilibrium, command.stiffness, command.damping,
                               command.phase, stop=stop)

    def _ramp_stop(self) -> EnvelopeCommand:
        limits = self.limits
        k_step = limits.max_stiffness_rate * self.dt
        stiffness = np.clip(np.full(self.n_joints, limits.safe_stiffness),
                            self._last_stiffness - k_step, self._last_stiffness + k_step)
        if np.all(stiffness == limits.safe_stiffness):
            self.phase = "held"
        damping = None if self._damping is None else np.full(self.n_joints, limits.safe_damping)
        return EnvelopeCommand(self._last_equilibrium.copy(), stiffness, damping, self.phase)

    def _remember(self, now_s: float, command: EnvelopeCommand) -> None:
        self._last_equilibrium = command.equilibrium
        self._last_stiffness = command.stiffness
        if command.damping is not None:
            self._last_damping = command.damping
        trace = self._trace
        trace.t.append(float(now_s))
        trace.equilibrium.append(command.equilibrium)
        trace.stiffness.append(command.stiffness)
        trace.damping.append(self._last_damping)
        trace.measured.append(self._last_measured.copy())
        trace.stop_entry.append(command.stop is not None)


def _commands(name: str, value: object, shape: tuple[int, int] | None = None
              ) -> NDArray[np.float64]:
    array = np.asarray(value, dtype=float)
    if array.ndim != 2 or array.shape[0] < 1 or array.shape[1] < 1 or (
        shape is not None and array.shape != shape
    ):
        expected = "(n_steps, n_joints)" if shape is None else str(shape)
        raise InvalidInputError(f"{name}: shape {array.shape}, expected {expected}")
    if not np.isfinite(array).all():
        raise InvalidInputError(f"{name}: values must be finite")
    return array


def envelope_violations(trace: dict[str, NDArray[np.float64]], limits: EnvelopeLimits,
                        dt: float) -> list[str]:
    """Every command of ``trace`` (see :meth:`SafetyEnvelope.trace`) outside ``limits``, as one
    line each; empty when the stream kept to the envelope.

    Checked independently of how the commands were made: stiffness within its range, stiffness
    and equilibrium changes per period within their rates (the first period of a stop may move
    the equilibrium onto the measured angles, nowhere else), damping within [0, damping_max], and
    after a stop's first period an unchanged equilibrium.
    """
    problems: list[str] = []
    stiffness, equilibrium = trace["stiffness"], trace["equilibrium"]
    measured, entry = trace["measured"], trace["stop_entry"].astype(bool)
    slack = 1.0 + _RATE_TOLERANCE
    out = (stiffness < limits.stiffness_min / slack) | (stiffness > limits.stiffness_max * slack)
    problems += [f"period {k}: stiffness outside [{limits.stiffness_min}, "
                 f"{limits.stiffness_max}] N*m/rad" for k in np.flatnonzero(out.any(axis=1))]
    k_steps = np.abs(np.diff(stiffness, axis=0))
    fast = k_steps > limits.max_stiffness_rate * dt * slack
    problems += [f"period {k + 1}: stiffness rate above {limits.max_stiffness_rate} N*m/rad/s"
                 for k in np.flatnonzero(fast.any(axis=1))]
    q_steps = np.abs(np.diff(equilibrium, axis=0))
    onto_measured = np.all(np.abs(equilibrium[1:] - measured[1:]) <= 1e-12, axis=1)
    exempt = entry[1:] & onto_measured
    too_fast = (q_steps > limits.max_equilibrium_rate * dt * slack).any(axis=1) & ~exempt
    problems += [f"period {k + 1}: equilibrium rate above {limits.max_equilibrium_rate} rad/s"
                 for k in np.flatnonzero(too_fast)]
    stopped = np.cumsum(entry) > 0
    moved = stopped[1:] & ~entry[1:] & (q_steps > 0).any(axis=1)
    problems += [f"period {k + 1}: equilibrium moved after the stop"
                 for k in np.flatnonzero(moved)]
    if "damping" in trace:
        damping = trace["damping"]
        bad = (damping < 0) | (damping > limits.damping_max * slack)
        problems += [f"period {k}: damping outside [0, {limits.damping_max}] N*m*s/rad"
                     for k in np.flatnonzero(bad.any(axis=1))]
    return problems
