"""The Gaussian phase basis movement primitives are learned on, and the regression on it.

Basis functions of the phase x = exp(-alpha_x * t / tau), their normalised activations, locally
weighted or ridge regression of weights from samples (accumulated over blocks of samples so the
design matrix never has to exist whole), and the exact discrete filter of the transformation
system's Euler integration. Used by :mod:`compliant_demo.primitives` for motion and stiffness
alike.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "FitMethod",
    "PhaseBasis",
    "REGRESSION_BLOCK",
    "normalise_activations",
    "regression_blocks",
    "on_basis",
    "solve_weights",
    "euler_filter",
]

FitMethod = Literal["lwr", "ridge"]


class PhaseBasis:
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


def normalise_activations(psi: NDArray[np.float64]) -> NDArray[np.float64]:
    # Clamp the sum so a phase far beyond the last centre keeps the last weight instead of 0/0.
    return psi / np.maximum(psi.sum(axis=1, keepdims=True), 1e-300)


# Samples per block when a sum runs over (n_samples x n_basis) activations: the work arrays stay
# about 1.6 MB at 50 basis functions however long the time base.
REGRESSION_BLOCK = 4096


def regression_blocks(n_samples: int) -> list[slice]:
    """Consecutive slices of at most :data:`REGRESSION_BLOCK` samples covering ``n_samples``."""
    step = REGRESSION_BLOCK
    return [slice(i, min(i + step, n_samples)) for i in range(0, n_samples, step)]


def on_basis(
    basis: PhaseBasis, x: NDArray[np.float64], weights: NDArray[np.float64]
) -> NDArray[np.float64]:
    """sum(psi*w)/sum(psi) at the phases ``x``, (n_samples, n_joints), built block by block."""
    out = np.empty((x.size, weights.shape[0]))
    for block in regression_blocks(x.size):
        out[block] = normalise_activations(basis.activations(x[block])) @ weights.T
    return out


def solve_weights(
    basis: PhaseBasis,
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
    for block in regression_blocks(x.size):
        psi = basis.activations(x[block])
        if method == "lwr":
            # Locally weighted regression: each weight solves its own 1-D problem with
            # weights psi_i.
            weighted = psi * regressor[block, np.newaxis]
            rhs += weighted.T @ target_sum[block]
            denominator += weighted.T @ regressor[block]
        else:
            design = normalise_activations(psi) * regressor[block, np.newaxis]
            gram += design.T @ design
            rhs += design.T @ target_sum[block]
    if method == "lwr":
        return (rhs / (denominator[:, np.newaxis] * scale_sq)).T
    weights = np.empty((target_sum.shape[1], n_basis))
    ridge = regularisation * np.trace(gram) / n_basis
    for j in range(target_sum.shape[1]):
        weights[j] = np.linalg.solve(scale_sq[j] * gram + ridge * np.eye(n_basis), rhs[:, j])
    return weights


def euler_filter(h: float, alpha_z: float, beta_z: float) -> tuple[NDArray, NDArray, NDArray]:
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
