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
from datetime import UTC, datetime
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from pydantic import BaseModel, ConfigDict, Field, model_validator
from scipy.signal import lfilter, savgol_filter

from compliant_demo import __version__
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import model_from_mapping

__all__ = [
    "DMP",
    "DampingPolicy",
    "FitMethod",
    "Formulation",
    "Provenance",
    "Rollout",
    "Skill",
    "fit_skill",
]

Formulation = Literal["classic", "goal_robust"]
FitMethod = Literal["lwr", "ridge"]

ALPHA_Z = 25.0
BETA_Z = ALPHA_Z / 4.0
# Phase decays to exp(-alpha_z/3) ~ 2.4e-4 at t = tau, so the forcing term has died out by the
# end of the demonstrated duration and the attractor alone settles on the goal.
ALPHA_X = ALPHA_Z / 3.0
# Amplitude |g - y0| below this fraction of a joint's range of motion makes the classic scaling
# x*(g - y0) meaningless; the joint is then fitted and rolled out without amplitude scaling.
_DEGENERATE_AMPLITUDE = 1e-3


def _finite_array(value: ArrayLike, name: str) -> NDArray[np.float64]:
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name}: cannot convert {value!r} to a float array") from None
    if not np.all(np.isfinite(array)):
        bad = tuple(int(i) for i in np.argwhere(~np.isfinite(array))[0])
        raise InvalidInputError(f"{name}: non-finite value {float(array[bad])!r} at index {bad}")
    return array


def _time_axis(t: ArrayLike, name: str = "t") -> NDArray[np.float64]:
    """Validate a strictly increasing time vector with a positive duration, s."""
    times = _finite_array(t, name)
    if times.ndim != 1 or times.size < 2:
        raise InvalidInputError(f"{name}: expected a 1-D array of at least 2 samples, got shape "
                                f"{times.shape}")
    steps = np.diff(times)
    if np.any(steps <= 0):
        k = int(np.argmax(steps <= 0))
        raise InvalidInputError(
            f"{name}: time must be strictly increasing; {name}[{k + 1}] = {times[k + 1]!r} "
            f"follows {name}[{k}] = {times[k]!r}"
        )
    return times


def _uniform_step(times: NDArray[np.float64]) -> float | None:
    """The common step of a uniformly sampled time vector, s, or None if it is not uniform."""
    steps = np.diff(times)
    mean_step = (times[-1] - times[0]) / steps.size
    return float(mean_step) if np.ptp(steps) <= 1e-9 * mean_step else None


def _derivatives(
    times: NDArray[np.float64], demos: NDArray[np.float64], smoothing_window: int | None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Velocity and acceleration of (d, n, j) positions along axis 1, rad/s and rad/s^2.

    Central differences by default; with ``smoothing_window`` a cubic Savitzky-Golay filter
    (Savitzky and Golay, Analytical Chemistry 36(8), 1964), which keeps the plateaus and steps
    of a warped time axis out of the acceleration the forcing term is fitted to.
    """
    step = _uniform_step(times)
    if smoothing_window is None:
        velocity = np.gradient(demos, times if step is None else step, axis=1)
        return velocity, np.gradient(velocity, times if step is None else step, axis=1)
    if (isinstance(smoothing_window, bool) or not isinstance(smoothing_window, int | np.integer)
            or smoothing_window < 5 or smoothing_window % 2 == 0
            or smoothing_window > times.size):
        raise InvalidInputError(
            f"smoothing_window: need an odd sample count from 5 to {times.size}, got "
            f"{smoothing_window!r}"
        )
    if step is None:
        raise InvalidInputError("smoothing_window: needs uniformly sampled t, got uneven steps")
    window = int(smoothing_window)
    velocity = savgol_filter(demos, window, 3, deriv=1, delta=step, axis=1)
    return velocity, savgol_filter(demos, window, 3, deriv=2, delta=step, axis=1)


def _per_joint(value: ArrayLike | None, n_joints: int, name: str) -> NDArray[np.float64] | None:
    if value is None:
        return None
    array = _finite_array(value, name)
    if array.ndim == 0:
        array = np.full(n_joints, float(array))
    if array.shape != (n_joints,):
        raise InvalidInputError(f"{name}: expected shape ({n_joints},), got {array.shape}")
    return array


def _ranges(
    value: ArrayLike, n_joints: int, name: str, *, positive: bool = False
) -> NDArray[np.float64]:
    """Broadcast a (low, high) pair or a (n_joints, 2) table and check low <= high (and, with
    ``positive``, low > 0)."""
    array = _finite_array(value, name)
    if array.shape == (2,):
        array = np.tile(array, (n_joints, 1))
    if array.shape != (n_joints, 2):
        raise InvalidInputError(f"{name}: expected (low, high) or shape ({n_joints}, 2), got "
                                f"{array.shape}")
    if np.any(array[:, 0] > array[:, 1]):
        j = int(np.argmax(array[:, 0] > array[:, 1]))
        raise InvalidInputError(
            f"{name}: low {float(array[j, 0])!r} above high {float(array[j, 1])!r} for joint {j}"
        )
    if positive and np.any(array[:, 0] <= 0):
        j = int(np.argmax(array[:, 0] <= 0))
        raise InvalidInputError(f"{name}: low {float(array[j, 0])!r} for joint {j} must be "
                                "positive")
    return array


def _as_demo_stack(value: ArrayLike, n_samples: int, name: str) -> NDArray[np.float64]:
    """Return (n_demos, n_samples, n_joints) from (n, j) or (d, n, j)."""
    array = _finite_array(value, name)
    if array.ndim == 2:
        array = array[np.newaxis]
    if array.ndim != 3 or array.shape[1] != n_samples:
        raise InvalidInputError(
            f"{name}: expected shape ({n_samples}, n_joints) or (n_demos, {n_samples}, n_joints), "
            f"got {array.shape}"
        )
    return array


def _channel_stack(value: ArrayLike, demos: NDArray[np.float64], name: str) -> NDArray:
    """A per-sample channel as (n_demos, n_samples, n_joints) like ``demos``; one (n, j) profile
    is shared by all demonstrations."""
    array = _as_demo_stack(value, demos.shape[1], name)
    if array.shape[0] == 1 and array.shape[2] == demos.shape[2]:
        return np.broadcast_to(array, demos.shape)
    if array.shape != demos.shape:
        raise InvalidInputError(f"{name}: shape {array.shape} does not match position "
                                f"{demos.shape}")
    return array


class _PhaseBasis:
    """Gaussian basis functions in the phase x = exp(-alpha_x * s), s = t / tau in [0, 1].

    Centres are spaced evenly in time (so evenly in s), widths from the spacing of neighbouring
    centres: h_i = 1 / (c_{i+1} - c_i)^2, so each has fallen to exp(-1) at its neighbour's centre.
    """

    def __init__(self, n_basis: int, alpha_x: float) -> None:
        self.alpha_x = alpha_x
        self.centres = np.exp(-alpha_x * np.linspace(0.0, 1.0, n_basis))
        spacing = np.abs(np.diff(self.centres))
        self.widths = 1.0 / np.append(spacing, spacing[-1]) ** 2

    def phase(self, s: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.exp(-self.alpha_x * s)

    def activations(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """Unnormalised activations psi, (n_samples, n_basis)."""
        return np.exp(-self.widths * (x[:, np.newaxis] - self.centres) ** 2)


def _normalise(psi: NDArray[np.float64]) -> NDArray[np.float64]:
    # Clamp the sum so a phase far beyond the last centre keeps the last weight instead of 0/0.
    return psi / np.maximum(psi.sum(axis=1, keepdims=True), 1e-300)


# Samples per block when a sum runs over (n_samples x n_basis) activations: the work arrays stay
# about 1.6 MB at 50 basis functions however long the time base.
_BLOCK = 4096


def _blocks(n_samples: int) -> list[slice]:
    return [slice(i, min(i + _BLOCK, n_samples)) for i in range(0, n_samples, _BLOCK)]


def _on_basis(
    basis: _PhaseBasis, x: NDArray[np.float64], weights: NDArray[np.float64]
) -> NDArray[np.float64]:
    """sum(psi*w)/sum(psi) at the phases ``x``, (n_samples, n_joints), built block by block."""
    out = np.empty((x.size, weights.shape[0]))
    for block in _blocks(x.size):
        out[block] = _normalise(basis.activations(x[block])) @ weights.T
    return out


def _solve_weights(
    basis: _PhaseBasis,
    x: NDArray[np.float64],
    regressor: NDArray[np.float64],
    n_demos: int,
    target_sum: NDArray[np.float64],
    method: FitMethod,
    regularisation: float,
) -> NDArray[np.float64]:
    """Weights (n_joints, n_basis) for target = sum_i w_i * phi_i * regressor.

    Parameters
    ----------
    basis : the phase basis; its activations at ``x`` are built block by block
    x : (n_samples,) phase
    regressor : (n_samples,) phase-dependent factor shared by all demonstrations
    n_demos : number of demonstrations summed in ``target_sum``
    target_sum : (n_samples, n_joints) sum over demonstrations of the target

    Notes
    -----
    Because the demonstrations share one time base, the normal equations of the stacked problem
    reduce to products with the single-demonstration design matrix, weighted by n_demos: the
    weights fit the demonstrations' mean target.
    """
    scale_sq = np.full(target_sum.shape[1], float(n_demos))
    n_basis = basis.centres.size
    # Sums over samples, accumulated block by block (the full design matrix is never built).
    rhs = np.zeros((n_basis, target_sum.shape[1]))
    gram = np.zeros((n_basis, n_basis))
    denominator = np.zeros(n_basis)
    for block in _blocks(x.size):
        psi = basis.activations(x[block])
        if method == "lwr":
            # Locally weighted regression: each weight solves its own 1-D problem with
            # weights psi_i.
            weighted = psi * regressor[block, np.newaxis]
            rhs += weighted.T @ target_sum[block]
            denominator += weighted.T @ regressor[block]
        else:
            design = _normalise(psi) * regressor[block, np.newaxis]
            gram += design.T @ design
            rhs += design.T @ target_sum[block]
    if method == "lwr":
        return (rhs / (denominator[:, np.newaxis] * scale_sq)).T
    weights = np.empty((target_sum.shape[1], n_basis))
    ridge = regularisation * np.trace(gram) / n_basis
    for j in range(target_sum.shape[1]):
        weights[j] = np.linalg.solve(scale_sq[j] * gram + ridge * np.eye(n_basis), rhs[:, j])
    return weights


def _euler_filter(h: float, alpha_z: float, beta_z: float) -> tuple[NDArray, NDArray, NDArray]:
    """Transfer function of one semi-implicit Euler step of the transformation system.

    With e = y - g and K = alpha_z * beta_z, D = alpha_z, h = dt / tau:
    z[k+1] = z[k] + h * (-K e[k] - D z[k] + u[k]),  e[k+1] = e[k] + h * z[k+1].
    Returns (b, a, A) with e = lfilter(b, a, u) for zero initial state and A the state matrix
    of [e, z].
    """
    k_gain, d_gain = alpha_z * beta_z, alpha_z
    state = np.array([[1.0 - h * h * k_gain, h - h * h * d_gain], [-h * k_gain, 1.0 - h * d_gain]])
    a = np.array([1.0, -np.trace(state), np.linalg.det(state)])
    # e[k] = C (zI - A)^-1 B u with B = [h^2, h], C = [1, 0]:
    # numerator = h^2 z + (h * A01 - h^2 * A11), delayed one step.
    b = np.array([0.0, h * h, h * state[0, 1] - h * h * state[1, 1]])
    return b, a, state


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
    formulation : "classic" (forcing scaled by x*(g - y0)) or "goal_robust" (Hoffmann et al. 2009)
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
        formulation: Formulation = "classic",
        *,
        alpha_z: float = ALPHA_Z,
        beta_z: float | None = None,
        alpha_x: float = ALPHA_X,
    ) -> None:
        if isinstance(n_basis, bool) or not isinstance(n_basis, int | np.integer) or n_basis < 2:
            raise InvalidInputError(f"n_basis: need an integer of at least 2, got {n_basis!r}")
        if formulation not in ("classic", "goal_robust"):
            raise InvalidInputError(
                f"formulation: expected 'classic' or 'goal_robust', got {formulation!r}"
            )
        self.n_basis = int(n_basis)
        self.formulation: Formulation = formulation
        self.alpha_z = float(alpha_z)
        self.beta_z = float(alpha_z / 4.0 if beta_z is None else beta_z)
        self.alpha_x = float(alpha_x)
        self.basis = _PhaseBasis(self.n_basis, self.alpha_x)
        self.weights: NDArray[np.float64] | None = None
        self.amplitude: NDArray[np.float64] | None = None

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
        times = _time_axis(t)
        if times.size < self.n_basis:
            raise InvalidInputError(
                f"t: {times.size} samples are fewer than n_basis = {self.n_basis}"
            )
        demos = _as_demo_stack(position, times.size, "position")
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
        if self.formulation == "classic":
            span = demos.max(axis=(0, 1)) - demos.min(axis=(0, 1))
            amplitude = (goal - start).mean(axis=0)
            degenerate = np.abs(amplitude) <= _DEGENERATE_AMPLITUDE * np.maximum(span, 1e-12)
            if np.any(degenerate):
                warnings.warn(
                    f"joints {np.flatnonzero(degenerate).tolist()} end where they start "
                    "(g - y0 ~ 0); the classic form cannot scale them, fitted unscaled. "
                    "Use formulation='goal_robust' for such motions.",
                    stacklevel=2,
                )
            # Amplitude 0 marks a joint whose forcing is applied unscaled at rollout.
            amplitude = np.where(degenerate, 0.0, amplitude)
        else:
            amplitude = np.ones(demos.shape[2])
        # The demonstrations are averaged, not each rescaled by its own (g_d - y0_d) / amplitude:
        # teaching demonstrations of one skill differ by offsets and timing rather than by a
        # scaling about their start, and where the range of motion is several times |g - y0|
        # (cork_seat: 0.6 rad against 0.15 rad) such factors varied by +-30 % and pulled the
        # primitive ~0.01 rad off the demonstrations' mean. Scaling to new goals at rollout is
        # unchanged. The targets are linear in the positions (differentiation and
        # Savitzky-Golay filtering included), so the sum of the demonstrations is differentiated
        # once instead of every demonstration.
        summed = demos.sum(axis=0)
        velocity, acceleration = (d[0] for d in _derivatives(times, summed[None],
                                                             smoothing_window))
        inertial = tau * tau * acceleration + d_gain * tau * velocity
        to_goal = goal.sum(axis=0) - summed
        if self.formulation == "classic":
            target_sum = inertial - k_gain * to_goal
        else:
            target_sum = (inertial / k_gain - to_goal
                          + (goal - start).sum(axis=0) * x[:, np.newaxis])
        self.weights = _solve_weights(self.basis, x, x, demos.shape[0], target_sum, method,
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
        if self.formulation == "classic":
            unscaled = self.amplitude == 0.0
            ratio = np.where(unscaled, 1.0, span / np.where(unscaled, 1.0, self.amplitude))
            return ratio, np.zeros_like(span)
        k_gain = self.alpha_z * self.beta_z
        return np.full_like(span, k_gain), -k_gain * span

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
        b, a, state = _euler_filter(h, self.alpha_z, self.beta_z)
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


class Provenance(BaseModel):
    """Where a skill came from: demonstrations, alignment, fit quality, software version."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    demonstration_ids: list[str] = Field(default_factory=list)
    n_demonstrations: int = Field(1, ge=1)
    alignment: dict[str, Any] = Field(
        default_factory=dict, description="Summary of the time alignment (method, band, costs)."
    )
    stiffness_source: Literal["recorded", "variability", "constant"] = "recorded"
    n_basis: int = Field(..., ge=2)
    fit_rmse: list[float] = Field(
        ...,
        description="Position RMSE per joint of the primitive (rolled out from the mean start to "
        "the mean goal over the demonstrated duration) against the mean of the aligned "
        "demonstrations on their common time base, rad.",
    )
    demo_spread_rmse: list[float] | None = Field(
        None,
        description="RMS spread per joint of the aligned demonstrations about their mean, rad "
        "(None for one demonstration); RMSE against each demonstration is "
        "sqrt(fit_rmse^2 + demo_spread_rmse^2).",
    )
    stiffness_fit_rmse: list[float] | None = Field(
        None, description="RMSE of the learned stiffness per joint, N*m/rad."
    )
    package_version: str = __version__
    created_utc: str = Field(default_factory=lambda: datetime.now(UTC).isoformat())


class Skill(BaseModel):
    """A learned skill: movement primitive, stiffness profile, damping policy and provenance.

    Weights are stored as plain lists so the model round-trips through JSON unchanged. Every
    number must be finite: a NaN weight would roll out NaN positions without any error.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    name: str = Field("skill", min_length=1)
    joints: list[str] = Field(..., min_length=1)
    formulation: Formulation = "classic"
    method: FitMethod = "lwr"
    n_basis: int = Field(..., ge=2)
    alpha_z: float = ALPHA_Z
    beta_z: float = BETA_Z
    alpha_x: float = ALPHA_X
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
        start_arr = _per_joint(start, n_joints, "start")
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
        k_range = _ranges(self.stiffness_range if stiffness_range is None else stiffness_range,
                          n_joints, "stiffness_range", positive=True)

        n_samples = int(round(horizon / dt)) + 1
        goal_arr = self._goal(goal, n_samples)
        t = np.asarray(np.arange(n_samples) * dt, dtype=np.float64)
        dmp = self.dmp
        x = dmp.basis.phase(t / tau)
        phi = _normalise(dmp.basis.activations(x))
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
        array = _finite_array(goal, "goal")
        if array.ndim == 2:
            if array.shape != (n_samples, n_joints):
                raise InvalidInputError(f"goal: a moving goal needs shape ({n_samples}, "
                                        f"{n_joints}), got {array.shape}")
        else:
            fixed = _per_joint(array, n_joints, "goal")
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
        inertia = _per_joint(target_inertia, len(self.joints), "target_inertia")
        if inertia is None and self.target_inertia is not None:
            inertia = np.asarray(self.target_inertia)
        if inertia is None or np.any(inertia <= 0):
            raise InvalidInputError(
                f"target_inertia: the ratio damping policy needs positive joint inertias "
                f"(kg*m^2), got {None if inertia is None else inertia.tolist()!r}"
            )
        return 2.0 * self.damping_policy.zeta * np.sqrt(stiffness * inertia)


def _log_profile(
    basis: _PhaseBasis,
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
    weights = _solve_weights(basis, x, ones, values.shape[0], log_values.sum(axis=0), method,
                             regularisation)
    return weights, _on_basis(basis, x, weights)


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
    uniform = _uniform_step(times) is not None
    if not uniform:
        x = dmp.basis.phase(grid / tau)
    start, goal = mean[0], mean[-1]
    assert dmp.weights is not None
    shape = _on_basis(dmp.basis, x, dmp.weights) * x[:, np.newaxis]
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
    formulation: Formulation = "classic",
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
    formulation : "classic" (Ijspeert et al. 2013) or "goal_robust" (Hoffmann et al. 2009)
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
        k_range = _ranges(stiffness_range, n_joints, "stiffness_range", positive=True)
        log_weights = np.tile(np.log(k_range[:, 1])[:, None], (1, dmp.n_basis))
        stiffness_rmse = None
        extra.setdefault("stiffness_source", "constant")
    else:
        recorded = _channel_stack(stiffness, demos, "stiffness")
        log_weights, fitted = _log_profile(dmp.basis, x, recorded, method, regularisation)
        default_range = np.stack([recorded.min(axis=(0, 1)), recorded.max(axis=(0, 1))], axis=1)
        k_range = _ranges(default_range if stiffness_range is None else stiffness_range,
                          n_joints, "stiffness_range", positive=True)
        residual = np.clip(np.exp(fitted), k_range[:, 0], k_range[:, 1]) - recorded
        stiffness_rmse = np.sqrt((residual**2).mean(axis=(0, 1))).tolist()

    damping_weights = None
    if policy.kind == "learned":
        if damping is None:
            raise InvalidInputError("damping: a learned damping policy needs a damping channel, "
                                    "got None")
        recorded_damping = _channel_stack(damping, demos, "damping")
        damping_weights = _log_profile(dmp.basis, x, recorded_damping, method,
                                       regularisation)[0].tolist()
    inertia = _per_joint(target_inertia, n_joints, "target_inertia")
    limits = None if position_limits is None else _ranges(position_limits, n_joints,
                                                          "position_limits")
    assert dmp.weights is not None and dmp.amplitude is not None
    fit_rmse, spread_rmse = _fit_errors(dmp, times, demos, x)
    data = dict(
        name=name,
        joints=joint_names,
        formulation=formulation,
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
