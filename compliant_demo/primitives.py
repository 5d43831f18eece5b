"""Discrete dynamic movement primitives with stiffness profiles: fit, roll out, generalise.

A :class:`DMP` encodes each joint's motion as a critically damped point attractor shaped by a
learned forcing term on a Gaussian phase basis (Ijspeert, Nakanishi, Hoffmann, Pastor, Schaal,
Neural Computation 25(2), 2013), in the classic form or the goal-robust form of Hoffmann, Pastor,
Park and Schaal (ICRA 2009). A :class:`Skill` adds a stiffness profile learned on the same phase
basis in log space (so it stays positive and stretches with the duration), a damping policy, and
provenance; it is a pydantic model that serialises to JSON. :func:`fit_skill` learns one from
time-aligned arrays; :meth:`Skill.rollout` produces a :class:`Rollout` for a new start, goal and
duration.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from pydantic import BaseModel, ConfigDict, Field, model_validator
from scipy.signal import lfilter

from compliant_demo.arrays import (
    as_demo_stack,
    channel_stack,
    derivatives,
    finite_array,
    per_joint,
    ranges,
    time_axis,
    uniform_step,
)
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import model_from_mapping
from compliant_demo.phase_basis import (
    FitMethod,
    PhaseBasis,
    euler_filter,
    normalise_activations,
    on_basis,
    solve_weights,
)
from compliant_demo.skill_provenance import ClampedStretch, Provenance

__all__ = [
    "DMP",
    "ClampedStretch",
    "DampingPolicy",
    "FitMethod",
    "Formulation",
    "MAX_ROLLOUT_SAMPLES",
    "Provenance",
    "Rollout",
    "Skill",
    "fit_skill",
]

Formulation = Literal["classic", "goal_robust"]

ALPHA_Z = 25.0
BETA_Z = ALPHA_Z / 4.0
# Phase decays to exp(-alpha_z/3) ~ 2.4e-4 at t = tau, so the forcing term has died out by the
# end of the demonstrated duration and the attractor alone settles on the goal.
ALPHA_X = ALPHA_Z / 3.0
# Amplitude |g - y0| below this fraction of a joint's range of motion makes the classic scaling
# x*(g - y0) meaningless; the joint is then fitted and rolled out without amplitude scaling.
_DEGENERATE_AMPLITUDE = 1e-3

MAX_ROLLOUT_SAMPLES = 10_000_000
"""Most samples one rollout takes (about 2.8 h at 1 kHz; a rollout holds about a dozen channels
of this length per joint, so more would exhaust memory before it finished)."""


@dataclass(frozen=True)
class Rollout:
    """A movement and its impedance schedule, sampled at a fixed step.

    Attributes
    ----------
    t : (n_samples,) array, s, from 0
    position : (n_samples, n_joints) array, rad
    velocity : (n_samples, n_joints) array, rad/s
    acceleration : (n_samples, n_joints) array, rad/s^2
    stiffness : (n_samples, n_joints) array, N*m/rad
    damping : (n_samples, n_joints) array, N*m*s/rad
    joints : joint names, in column order
    duration_s : movement duration tau used for the phase, s (may be shorter than t[-1])
    """

    t: NDArray[np.float64]
    position: NDArray[np.float64]
    velocity: NDArray[np.float64]
    acceleration: NDArray[np.float64]
    stiffness: NDArray[np.float64]
    damping: NDArray[np.float64]
    joints: tuple[str, ...]
    duration_s: float


class DMP:
    """Discrete movement primitive for several joints sharing one phase.

    Parameters
    ----------
    n_basis : number of Gaussian basis functions (>= 2)
    formulation : "classic" (forcing scaled by x*(g - y0)) or "goal_robust" (Hoffmann et al. 2009),
        for every joint, or a sequence of them, one per joint in column order
    alpha_z, beta_z : transformation-system gains, 1; beta_z = alpha_z/4 is critically damped
    alpha_x : canonical-system decay, 1

    Notes
    -----
    Canonical system tau*x' = -alpha_x*x, integrated in closed form x = exp(-alpha_x*t/tau).
    Transformation system, with z = tau*y' (Ijspeert et al. 2013, eq. 2.1-2.3):

    classic:      tau*z' = alpha_z*(beta_z*(g - y) - z) + f(x),  f = x*a*sum(psi*w)/sum(psi)
    goal_robust:  tau*z' = K*(g - y) - D*z - K*(g - y0)*x + K*f(x),  f = x*sum(psi*w)/sum(psi)

    with K = alpha_z*beta_z, D = alpha_z and a = (g - y0)/(g_d - y0_d) the amplitude ratio to the
    demonstration (the demonstration's amplitude is folded into the weights, as in Ijspeert's
    x*(g - y0) scaling). The rollout integrates with semi-implicit Euler at the step dt, written as
    a second-order linear recurrence and evaluated by ``scipy.signal.lfilter`` vectorised over
    joints, since the forcing depends on the phase only and is computed in advance.
    """

    def __init__(
        self,
        n_basis: int,
        formulation: Formulation | Sequence[Formulation] = "classic",
        *,
        alpha_z: float = ALPHA_Z,
        beta_z: float | None = None,
        alpha_x: float = ALPHA_X,
    ) -> None:
        if isinstance(n_basis, bool) or not isinstance(n_basis, int | np.integer) or n_basis < 2:
            raise InvalidInputError(f"n_basis: need an integer of at least 2, got {n_basis!r}")
        forms = (formulation,) if isinstance(formulation, str) else tuple(formulation)
        if not forms or any(form not in ("classic", "goal_robust") for form in forms):
            raise InvalidInputError(f"formulation: expected 'classic' or 'goal_robust' (or one "
                                    f"of them per joint), got {formulation!r}")
        self.n_basis = int(n_basis)
        self.formulation: Formulation | list[Formulation] = (
            forms[0] if isinstance(formulation, str) else list(forms))
        self.alpha_z = float(alpha_z)
        self.beta_z = float(alpha_z / 4.0 if beta_z is None else beta_z)
        self.alpha_x = float(alpha_x)
        self.basis = PhaseBasis(self.n_basis, self.alpha_x)
        self.weights: NDArray[np.float64] | None = None
        self.amplitude: NDArray[np.float64] | None = None

    def goal_robust(self, n_joints: int) -> NDArray[np.bool_]:
        """(n_joints,) True where a joint uses the goal-robust form."""
        forms = [self.formulation] if isinstance(self.formulation, str) else self.formulation
        if len(forms) not in (1, n_joints):
            raise InvalidInputError(f"formulation: {len(forms)} forms {forms!r} for "
                                    f"{n_joints} joints")
        return np.broadcast_to(np.array([form == "goal_robust" for form in forms]), n_joints)

    def fit(
        self,
        t: ArrayLike,
        position: ArrayLike,
        *,
        method: FitMethod = "lwr",
        regularisation: float = 1e-8,
        smoothing_window: int | None = None,
    ) -> DMP:
        """Learn the forcing weights from time-aligned demonstrations.

        Parameters
        ----------
        t : (n_samples,) array, s, strictly increasing, shared by all demonstrations
        position : (n_samples, n_joints) or (n_demos, n_samples, n_joints) array, rad
        method : "lwr" (locally weighted regression) or "ridge" (regularised global least squares)
        regularisation : ridge factor relative to the mean diagonal of the Gram matrix, 1
        smoothing_window : odd sample count of a cubic Savitzky-Golay filter for the velocity and
            acceleration targets (uniform t only); None for central differences

        Returns
        -------
        self, with ``weights`` (n_joints, n_basis) and ``amplitude`` (n_joints,) rad set
        """
        times, demos, x = self._prepare(t, position, method)
        self._fit_on_basis(times, demos, x, method, regularisation, smoothing_window)
        return self

    def _prepare(
        self, t: ArrayLike, position: ArrayLike, method: str
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """Validate fit inputs; return times, (d, n, j) demos and the phase."""
        times = time_axis(t)
        if times.size < self.n_basis:
            raise InvalidInputError(
                f"t: {times.size} samples are fewer than n_basis = {self.n_basis}"
            )
        demos = as_demo_stack(position, times.size, "position")
        if method not in ("lwr", "ridge"):
            raise InvalidInputError(f"method: expected 'lwr' or 'ridge', got {method!r}")
        x = self.basis.phase((times - times[0]) / (times[-1] - times[0]))
        return times, demos, x

    def _fit_on_basis(
        self,
        times: NDArray[np.float64],
        demos: NDArray[np.float64],
        x: NDArray[np.float64],
        method: FitMethod,
        regularisation: float,
        smoothing_window: int | None = None,
    ) -> None:
        tau = times[-1] - times[0]
        start, goal = demos[:, 0, :], demos[:, -1, :]
        k_gain, d_gain = self.alpha_z * self.beta_z, self.alpha_z
        robust = self.goal_robust(demos.shape[2])
        span = demos.max(axis=(0, 1)) - demos.min(axis=(0, 1))
        amplitude = (goal - start).mean(axis=0)
        degenerate = ~robust & (np.abs(amplitude) <= _DEGENERATE_AMPLITUDE
                                * np.maximum(span, 1e-12))
        if np.any(degenerate):
            warnings.warn(
                f"joints {np.flatnonzero(degenerate).tolist()} end where they start "
                "(g - y0 ~ 0); the classic form cannot scale them, fitted unscaled. "
                "Use formulation='goal_robust' for such motions.",
                stacklevel=2,
            )
        # Amplitude 0 marks a classic joint whose forcing is applied unscaled at rollout; the
        # goal-robust form folds no amplitude into its weights (1).
        amplitude = np.where(robust, 1.0, np.where(degenerate, 0.0, amplitude))
        # The demonstrations are averaged, not each rescaled by its own (g_d - y0_d) / amplitude:
        # teaching demonstrations of one skill differ by offsets and timing rather than by a
        # scaling about their start, and where the range of motion is several times |g - y0|
        # (cork_seat: 0.6 rad against 0.15 rad) such factors varied by +-30 % and pulled the
        # primitive ~0.01 rad off the demonstrations' mean. Scaling to new goals at rollout is
        # unchanged. The targets are linear in the positions (differentiation and
        # Savitzky-Golay filtering included), so the sum of the demonstrations is differentiated
        # once instead of every demonstration.
        summed = demos.sum(axis=0)
        velocity, acceleration = (d[0] for d in derivatives(times, summed[None],
                                                             smoothing_window))
        inertial = tau * tau * acceleration + d_gain * tau * velocity
        to_goal = goal.sum(axis=0) - summed
        target_sum = np.where(
            robust,
            inertial / k_gain - to_goal + (goal - start).sum(axis=0) * x[:, np.newaxis],
            inertial - k_gain * to_goal,
        )
        self.weights = solve_weights(self.basis, x, x, demos.shape[0], target_sum, method,
                                      regularisation)
        self.amplitude = amplitude

    def forcing(
        self,
        psi_normalised: NDArray[np.float64],
        x: NDArray[np.float64],
        start: NDArray[np.float64],
        goal: NDArray[np.float64],
    ) -> NDArray[np.float64]:
        """Input u of the transformation system (everything but the spring-damper).

        Parameters
        ----------
        psi_normalised : (n_samples, n_basis) normalised activations
        x : (n_samples,) phase
        start, goal : (n_joints,) or (n_sets, n_joints) array, rad

        Returns
        -------
        (n_samples, n_joints) or (n_samples, n_sets * n_joints) array, rad, set-major columns
        """
        return self._forcing_from_shape(self._shape(psi_normalised, x), x, (start, goal))

    def _forcing_from_shape(self, shape: NDArray, x: NDArray, ends: tuple[NDArray, NDArray]
                            ) -> NDArray[np.float64]:
        """:meth:`forcing` from the learned shape (n_samples, n_joints) at the phases ``x``
        for ``ends`` = (start, goal)."""
        start, goal = ends
        gain_shaped, gain_decaying = self._input_gains(np.atleast_2d(start), np.atleast_2d(goal))
        forcing = (shape[:, np.newaxis, :] * gain_shaped
                   + x[:, np.newaxis, np.newaxis] * gain_decaying)
        return forcing.reshape(x.size, -1)

    def _shape(self, psi_normalised: NDArray[np.float64], x: NDArray[np.float64]) -> NDArray:
        """Learned shape x*sum(psi*w)/sum(psi), (n_samples, n_joints)."""
        if self.weights is None or self.amplitude is None:
            raise InvalidInputError("DMP: weights are not set; call fit() first")
        return (psi_normalised @ self.weights.T) * x[:, np.newaxis]

    def _input_gains(
        self, start: NDArray[np.float64], goal: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Gains (n_sets, n_joints) of the input u = a*shape + b*x for each start/goal set."""
        assert self.amplitude is not None
        span = goal - start
        robust = self.goal_robust(span.shape[-1])
        unscaled = self.amplitude == 0.0
        ratio = np.where(unscaled, 1.0, span / np.where(unscaled, 1.0, self.amplitude))
        k_gain = self.alpha_z * self.beta_z
        return np.where(robust, k_gain, ratio), np.where(robust, -k_gain * span, 0.0)

    def integrate(
        self,
        forcing: NDArray[np.float64],
        start: NDArray[np.float64],
        goal: NDArray[np.float64],
        dt: float,
        tau: float,
        start_velocity: NDArray[np.float64] | None = None,
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """Integrate the transformation system for a precomputed input.

        Parameters
        ----------
        forcing : (n_samples, m) input u, rad; m columns are independent systems
        start, goal : (m,) rad
        dt : step, s;  tau : duration, s
        start_velocity : (m,) rad/s, default at rest

        Returns
        -------
        position, velocity, acceleration : (n_samples, m) rad, rad/s, rad/s^2
        """
        h = dt / tau
        b, a, state = euler_filter(h, self.alpha_z, self.beta_z)
        z0 = np.zeros_like(start) if start_velocity is None else tau * start_velocity
        # Initial conditions as the two past outputs of the recurrence with zero past input.
        back = np.linalg.inv(state)
        e0 = np.stack([start - goal, z0])
        e_m1 = back @ e0
        e_m2 = back @ e_m1
        # Direct form II transposed state from past outputs (as scipy.signal.lfiltic builds it),
        # written out so it vectorises over columns.
        zi = np.stack([-a[1] * e_m1[0] - a[2] * e_m2[0], -a[2] * e_m1[0]])
        error = lfilter(b, a, forcing, axis=0, zi=zi)[0]
        position = error + goal
        z = np.empty_like(error)
        z[0] = z0
        z[1:] = np.diff(error, axis=0) / h
        k_gain, d_gain = self.alpha_z * self.beta_z, self.alpha_z
        zdot = (-k_gain * error - d_gain * z + forcing) / tau
        return position, z / tau, zdot / tau


class DampingPolicy(BaseModel):
    """How the replay sets damping along the schedule.

    ``kind="ratio"`` keeps the damping ratio zeta on the target joint, d = 2*zeta*sqrt(k*I);
    ``kind="learned"`` follows a damping profile learned from a recorded damping channel.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    kind: Literal["ratio", "learned"] = "ratio"
    zeta: float = Field(default=0.7, gt=0, allow_inf_nan=False, description="Damping ratio, 1.")


class Skill(BaseModel):
    """A learned skill: movement primitive, stiffness profile, damping policy and provenance.

    Weights are stored as plain lists so the model round-trips through JSON unchanged. Every
    number must be finite: a NaN weight would roll out NaN positions without any error.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    name: str = Field("skill", min_length=1)
    joints: list[str] = Field(..., min_length=1)
    formulation: Formulation | list[Formulation] = Field(
        "classic", description="DMP form of every joint, or one per joint (skills stored before "
        "per-joint forms hold one)."
    )
    method: FitMethod = "lwr"
    n_basis: int = Field(..., ge=2)
    alpha_z: float = Field(ALPHA_Z, gt=0, description="Attractor damping gain, 1/s (scaled).")
    beta_z: float = Field(BETA_Z, gt=0, description="Attractor stiffness ratio, dimensionless.")
    alpha_x: float = Field(ALPHA_X, gt=0, description="Phase decay rate over the movement.")
    duration_s: float = Field(..., gt=0, description="Demonstrated duration, s.")
    start: list[float] = Field(..., description="Demonstrated start per joint, rad.")
    goal: list[float] = Field(..., description="Demonstrated goal per joint, rad.")
    amplitude: list[float] = Field(
        ..., description="Reference g - y0 per joint (classic; 0 = forcing not scaled), rad."
    )
    weights: list[list[float]] = Field(..., description="Forcing weights (n_joints, n_basis).")
    stiffness_log_weights: list[list[float]] = Field(
        ..., description="ln stiffness weights (n_joints, n_basis), ln(N*m/rad)."
    )
    stiffness_range: list[tuple[float, float]] = Field(
        ..., description="Target joint's stiffness range per joint, N*m/rad."
    )
    damping_policy: DampingPolicy = DampingPolicy()
    damping_log_weights: list[list[float]] | None = Field(
        None, description="ln damping weights (n_joints, n_basis) for a learned policy."
    )
    target_inertia: list[float] | None = Field(
        None, description="Target joint inertia per joint for the ratio policy, kg*m^2."
    )
    position_limits: list[tuple[float, float]] | None = Field(
        None, description="Admissible goal range per joint, rad."
    )
    provenance: Provenance

    @model_validator(mode="after")
    def _shapes_agree(self) -> Skill:
        n_joints = len(self.joints)
        tables: dict[str, Sequence[Any]] = {
            "start": self.start, "goal": self.goal, "amplitude": self.amplitude,
            "weights": self.weights, "stiffness_log_weights": self.stiffness_log_weights,
            "stiffness_range": self.stiffness_range,
        }
        if isinstance(self.formulation, list):
            tables["formulation"] = self.formulation
        for field, rows in tables.items():
            if len(rows) != n_joints:
                raise ValueError(f"{field} has {len(rows)} rows for {n_joints} joints")
        for field in ("weights", "stiffness_log_weights"):
            if any(len(row) != self.n_basis for row in getattr(self, field)):
                raise ValueError(f"{field} rows must have n_basis = {self.n_basis} entries")
        if self.damping_policy.kind == "learned" and self.damping_log_weights is None:
            raise ValueError("damping_policy 'learned' needs damping_log_weights")
        return self

    @property
    def dmp(self) -> DMP:
        """The movement primitive built from the stored weights.

        Rebuilt on each access (about 0.1 ms), so a copy with changed fields never sees stale
        weights.
        """
        dmp = DMP(self.n_basis, self.formulation, alpha_z=self.alpha_z, beta_z=self.beta_z,
                  alpha_x=self.alpha_x)
        dmp.weights = np.asarray(self.weights, dtype=float)
        dmp.amplitude = np.asarray(self.amplitude, dtype=float)
        return dmp

    def rollout(
        self,
        start: ArrayLike | None = None,
        goal: ArrayLike | None = None,
        duration_s: float | None = None,
        dt: float = 1e-3,
        target_inertia: ArrayLike | None = None,
        *,
        horizon_s: float | None = None,
        stiffness_range: ArrayLike | None = None,
    ) -> Rollout:
        """Generate the movement and impedance schedule for a new start, goal and duration.

        Parameters
        ----------
        start : (n_joints,) array, rad; default the demonstrated start
        goal : (n_joints,) array, rad, default the demonstrated goal; or a moving goal
            (n_samples, n_joints) sampled at the rollout's times t = 0, dt, ..., horizon_s (the
            goal-robust form is made for this, Hoffmann et al. 2009)
        duration_s : movement duration tau, s; default the demonstrated one. The phase, and with
            it the stiffness profile, stretches with it.
        dt : sample step, s
        target_inertia : (n_joints,) array, kg*m^2; needed by the ratio damping policy unless
            stored in the skill
        horizon_s : time span to sample, s; default ``duration_s`` (longer to watch settling)
        stiffness_range : (low, high) or (n_joints, 2), N*m/rad; default the skill's range

        Returns
        -------
        Rollout with samples at t = 0, dt, ..., horizon_s
        """
        n_joints = len(self.joints)
        start_arr = per_joint(start, n_joints, "start")
        start_arr = np.asarray(self.start) if start_arr is None else start_arr
        self._check_limits(start_arr, "start")
        tau = self.duration_s if duration_s is None else float(duration_s)
        if not math.isfinite(tau) or tau <= 0:
            raise InvalidInputError(f"duration_s: need a positive duration, got {duration_s!r}")
        horizon = tau if horizon_s is None else float(horizon_s)
        if not math.isfinite(horizon) or horizon <= 0:
            raise InvalidInputError(f"horizon_s: need a positive time span, got {horizon_s!r}")
        if not (isinstance(dt, int | float) and math.isfinite(dt) and 0 < dt <= horizon):
            raise InvalidInputError(f"dt: need 0 < dt <= horizon ({horizon} s), got {dt!r}")
        k_range = ranges(self.stiffness_range if stiffness_range is None else stiffness_range,
                          n_joints, "stiffness_range", positive=True)

        if horizon / dt > MAX_ROLLOUT_SAMPLES:
            raise InvalidInputError(
                f"horizon_s: {horizon} s at dt = {dt} s would be {horizon / dt:.3g} samples, more "
                f"than {MAX_ROLLOUT_SAMPLES:,} (check duration_s, horizon_s and dt)"
            )
        n_samples = int(round(horizon / dt)) + 1
        goal_arr = self._goal(goal, n_samples)
        # Gains and weights a hostile skill file carries can overflow; the result is checked below
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            rollout = self._sampled(start_arr, goal_arr, tau, dt, n_samples, k_range,
                                    target_inertia)
        for name in ("position", "velocity", "acceleration", "stiffness", "damping"):
            values = getattr(rollout, name)
            bad = ~np.isfinite(values)
            if bad.any():
                row, j = (int(i) for i in np.argwhere(bad)[0])
                raise InvalidInputError(
                    f"skill {self.name!r}: its rollout's {name} of joint {self.joints[j]!r} is "
                    f"{values[row, j]} at t = {rollout.t[row]:.6g} s; its gains or weights are "
                    "out of any usable range"
                )
        return rollout

    def _sampled(self, start_arr: NDArray[np.float64], goal_arr: NDArray[np.float64], tau: float,
                 dt: float, n_samples: int, k_range: NDArray[np.float64],
                 target_inertia: ArrayLike | None) -> Rollout:
        """The rollout of :meth:`rollout` from its checked arguments."""
        n_joints = len(self.joints)
        t = np.asarray(np.arange(n_samples) * dt, dtype=np.float64)
        dmp = self.dmp
        x = dmp.basis.phase(t / tau)
        phi = normalise_activations(dmp.basis.activations(x))
        # The forcing is learned over the demonstrated phase only and ends at t = tau: the phase
        # has decayed to exp(-alpha_x) there, but demonstrations that end still moving (a
        # recording stopped while the arm lags the hand) leave weights of order 1e4 on the last
        # basis functions, whose forcing would otherwise keep pushing the joint away from the
        # goal for about tau/alpha_x after tau. Beyond tau the attractor alone settles on g.
        active = (t <= tau * (1.0 + 1e-12))[:, np.newaxis]
        if goal_arr.ndim == 1:
            forcing = np.where(active, dmp.forcing(phi, x, start_arr, goal_arr), 0.0)
            position, velocity, acceleration = dmp.integrate(forcing, start_arr, goal_arr, dt,
                                                             tau)
        else:
            # Moving goal: integrate y itself (reference 0) with the spring's pull K*g(t) moved
            # into the input; the forcing gains follow g(t) sample by sample.
            shaped, decaying = dmp._input_gains(start_arr[np.newaxis], goal_arr)
            forcing = dmp._shape(phi, x) * shaped + x[:, np.newaxis] * decaying
            drive = np.where(active, forcing, 0.0) + dmp.alpha_z * dmp.beta_z * goal_arr
            position, velocity, acceleration = dmp.integrate(
                drive, start_arr, np.zeros(n_joints), dt, tau)
        stiffness = np.clip(np.exp(phi @ np.asarray(self.stiffness_log_weights).T),
                            k_range[:, 0], k_range[:, 1])
        damping = self._damping(phi, stiffness, target_inertia)
        return Rollout(t, position, velocity, acceleration, stiffness, damping,
                       tuple(self.joints), tau)

    def _goal(self, goal: ArrayLike | None, n_samples: int) -> NDArray[np.float64]:
        """Fixed goal (n_joints,) or moving goal (n_samples, n_joints), validated, rad."""
        n_joints = len(self.joints)
        if goal is None:
            return np.asarray(self.goal, dtype=float)
        array = finite_array(goal, "goal")
        if array.ndim == 2:
            if array.shape != (n_samples, n_joints):
                raise InvalidInputError(f"goal: a moving goal needs shape ({n_samples}, "
                                        f"{n_joints}), got {array.shape}")
        else:
            fixed = per_joint(array, n_joints, "goal")
            assert fixed is not None
            array = fixed
        self._check_limits(array, "goal")
        return array

    def _check_limits(self, value: NDArray[np.float64], name: str) -> None:
        if self.position_limits is None:
            return
        limits = np.asarray(self.position_limits)
        outside = (value < limits[:, 0]) | (value > limits[:, 1])
        if np.any(outside):
            index = tuple(int(i) for i in np.argwhere(outside)[0])
            j = index[-1]
            raise InvalidInputError(
                f"{name}: {float(value[index])!r} rad for joint {self.joints[j]!r} is outside "
                f"its limits [{limits[j, 0]}, {limits[j, 1]}] rad"
            )

    def _damping(
        self,
        phi: NDArray[np.float64],
        stiffness: NDArray[np.float64],
        target_inertia: ArrayLike | None,
    ) -> NDArray[np.float64]:
        if self.damping_policy.kind == "learned":
            return np.exp(phi @ np.asarray(self.damping_log_weights).T)
        inertia = per_joint(target_inertia, len(self.joints), "target_inertia")
        if inertia is None and self.target_inertia is not None:
            inertia = np.asarray(self.target_inertia)
        if inertia is None or np.any(inertia <= 0):
            raise InvalidInputError(
                f"target_inertia: the ratio damping policy needs positive joint inertias "
                f"(kg*m^2), got {None if inertia is None else inertia.tolist()!r}"
            )
        return 2.0 * self.damping_policy.zeta * np.sqrt(stiffness * inertia)


def _log_profile(
    basis: PhaseBasis,
    x: NDArray[np.float64],
    values: NDArray[np.float64],
    method: FitMethod,
    regularisation: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Fit ln(values) on the normalised basis; return weights (j, b) and the fitted (n, j)."""
    if np.any(values <= 0):
        index = tuple(int(i) for i in np.argwhere(values <= 0)[0])
        raise InvalidInputError(
            f"stiffness/damping: values must be positive, got {float(values[index])!r} at {index}"
        )
    log_values = np.log(values)
    ones = np.ones(x.size)
    weights = solve_weights(basis, x, ones, values.shape[0], log_values.sum(axis=0), method,
                             regularisation)
    return weights, on_basis(basis, x, weights)


def _fit_errors(
    dmp: DMP,
    times: NDArray[np.float64],
    demos: NDArray[np.float64],
    x: NDArray[np.float64],
) -> tuple[list[float], list[float] | None]:
    """Per-joint RMSE of the primitive against the aligned demonstrations' mean, and the RMS
    spread of the demonstrations about that mean, rad (spread None for one demonstration).

    The primitive is rolled out from the mean start to the mean goal over the demonstrated
    duration (the skill's defaults) and compared sample by sample on the common time base.
    ``x`` is the phase at ``times``; on a non-uniform time base the
    rollout runs on a uniform grid of as many samples and is interpolated back. The RMSE against
    the individual demonstrations is sqrt(fit^2 + spread^2).
    """
    n_demos, n_samples, _ = demos.shape
    mean = demos.mean(axis=0)
    tau = times[-1] - times[0]
    grid = np.linspace(0.0, tau, n_samples)
    uniform = uniform_step(times) is not None
    if not uniform:
        x = dmp.basis.phase(grid / tau)
    start, goal = mean[0], mean[-1]
    assert dmp.weights is not None
    shape = on_basis(dmp.basis, x, dmp.weights) * x[:, np.newaxis]
    forcing = dmp._forcing_from_shape(shape, x, (start, goal))
    position = dmp.integrate(forcing, start, goal, grid[1], tau)[0]
    if not uniform:
        position = np.column_stack([np.interp(times - times[0], grid, column)
                                    for column in position.T])
    fit = np.sqrt(((position - mean) ** 2).mean(axis=0)).tolist()
    if n_demos < 2:
        return fit, None
    deviation = demos - mean
    spread = np.sqrt(np.einsum("dnj,dnj->j", deviation, deviation) / (n_demos * n_samples))
    return fit, spread.tolist()


def fit_skill(
    t: ArrayLike,
    position: ArrayLike,
    stiffness: ArrayLike | None = None,
    *,
    joints: Sequence[str],
    n_basis: int = 50,
    method: FitMethod = "lwr",
    formulation: Formulation | Sequence[Formulation] = "classic",
    stiffness_range: ArrayLike | None = None,
    damping_policy: DampingPolicy | None = None,
    damping: ArrayLike | None = None,
    target_inertia: ArrayLike | None = None,
    position_limits: ArrayLike | None = None,
    regularisation: float = 1e-8,
    smoothing_window: int | None = None,
    name: str = "skill",
    provenance: dict[str, Any] | None = None,
) -> Skill:
    """Fit a skill to time-aligned demonstrations.

    Parameters
    ----------
    t : (n_samples,) array, s, strictly increasing, shared by all demonstrations
    position : (n_samples, n_joints) or (n_demos, n_samples, n_joints) array, rad
    stiffness : same shape as position (or one (n_samples, n_joints) profile for all
        demonstrations), N*m/rad, or None for a constant profile at the top of
        ``stiffness_range`` (a stiff, position-controlled replay)
    joints : joint names, one per column
    n_basis : Gaussian basis functions per joint, >= 2 and <= n_samples
    method : "lwr" or "ridge" (regularised global least squares)
    formulation : "classic" (Ijspeert et al. 2013) or "goal_robust" (Hoffmann et al. 2009) for
        every joint, or one of them per joint
    stiffness_range : (k_min, k_max) or (n_joints, 2), N*m/rad; the target joint's range the
        profile is clamped to. Default: the recorded range (required without ``stiffness``)
    damping_policy : default ``DampingPolicy(kind="ratio", zeta=0.7)``
    damping : like ``stiffness``, N*m*s/rad; required by a learned damping policy
    target_inertia : (n_joints,) kg*m^2, stored for the ratio policy
    position_limits : (low, high) or (n_joints, 2), rad; goals outside are refused at rollout
    regularisation : ridge factor relative to the Gram matrix's mean diagonal, 1
    smoothing_window : odd sample count of the Savitzky-Golay derivative filter (uniform t
        only), for demonstrations with jagged timing such as DTW-warped ones; None for central
        differences
    name : skill name
    provenance : extra provenance fields (demonstration_ids, alignment, stiffness_source, ...)

    Returns
    -------
    Skill
    """
    dmp = DMP(n_basis, formulation)
    times, demos, x = dmp._prepare(t, position, method)
    n_joints = demos.shape[2]
    joint_names = list(joints)
    if len(joint_names) != n_joints:
        raise InvalidInputError(
            f"joints: {len(joint_names)} names {joint_names!r} for {n_joints} position columns"
        )
    policy = DampingPolicy() if damping_policy is None else damping_policy
    dmp._fit_on_basis(times, demos, x, method, regularisation, smoothing_window)

    extra = dict(provenance or {})
    if stiffness is None:
        if stiffness_range is None:
            raise InvalidInputError(
                "stiffness_range: required when no stiffness channel is given, got None"
            )
        k_range = ranges(stiffness_range, n_joints, "stiffness_range", positive=True)
        log_weights = np.tile(np.log(k_range[:, 1])[:, None], (1, dmp.n_basis))
        stiffness_rmse = None
        extra.setdefault("stiffness_source", "constant")
    else:
        recorded = channel_stack(stiffness, demos, "stiffness")
        log_weights, fitted = _log_profile(dmp.basis, x, recorded, method, regularisation)
        default_range = np.stack([recorded.min(axis=(0, 1)), recorded.max(axis=(0, 1))], axis=1)
        k_range = ranges(default_range if stiffness_range is None else stiffness_range,
                          n_joints, "stiffness_range", positive=True)
        residual = np.clip(np.exp(fitted), k_range[:, 0], k_range[:, 1]) - recorded
        stiffness_rmse = np.sqrt((residual**2).mean(axis=(0, 1))).tolist()

    damping_weights = None
    if policy.kind == "learned":
        if damping is None:
            raise InvalidInputError("damping: a learned damping policy needs a damping channel, "
                                    "got None")
        recorded_damping = channel_stack(damping, demos, "damping")
        damping_weights = _log_profile(dmp.basis, x, recorded_damping, method,
                                       regularisation)[0].tolist()
    inertia = per_joint(target_inertia, n_joints, "target_inertia")
    limits = None if position_limits is None else ranges(position_limits, n_joints,
                                                          "position_limits")
    assert dmp.weights is not None and dmp.amplitude is not None
    fit_rmse, spread_rmse = _fit_errors(dmp, times, demos, x)
    data = dict(
        name=name,
        joints=joint_names,
        formulation=dmp.formulation,
        method=method,
        n_basis=dmp.n_basis,
        alpha_z=dmp.alpha_z,
        beta_z=dmp.beta_z,
        alpha_x=dmp.alpha_x,
        duration_s=float(times[-1] - times[0]),
        start=demos[:, 0, :].mean(axis=0).tolist(),
        goal=demos[:, -1, :].mean(axis=0).tolist(),
        amplitude=dmp.amplitude.tolist(),
        weights=dmp.weights.tolist(),
        stiffness_log_weights=np.asarray(log_weights).tolist(),
        stiffness_range=[(float(lo), float(hi)) for lo, hi in k_range],
        damping_policy=policy,
        damping_log_weights=damping_weights,
        target_inertia=None if inertia is None else inertia.tolist(),
        position_limits=None if limits is None else [(float(a), float(b)) for a, b in limits],
        provenance={
            "n_demonstrations": demos.shape[0],
            "n_basis": dmp.n_basis,
            "fit_rmse": fit_rmse,
            "demo_spread_rmse": spread_rmse,
            "stiffness_fit_rmse": stiffness_rmse,
            **extra,
        },
    )
    return model_from_mapping(Skill, data, source="fit_skill")
