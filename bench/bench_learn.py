"""Benchmark of skill learning: fit, DTW alignment of a pair, and one rollout.

- fit: one skill from 10 time-aligned demonstrations of 7 joints x 5,000 samples, 50 basis
  functions, stiffness profile included (alignment excluded). Baseline in the same run: a plain
  ``numpy.linalg.lstsq`` of the stacked forcing-term problem of the same data (weights only).
- dtw: ``compliant_demo.alignment.dtw`` on two 5,000-sample, 7-joint demonstrations with a 10 %
  Sakoe-Chiba band (cost and path). Reference in the same run: dtaidistance's compiled
  ``dtw.warping_path(..., use_c=True, use_ndim=True, include_distance=True)`` (also cost and path,
  same band as ``window = radius + 1``) on the same pair; the distance-only
  ``dtw_ndim.distance_fast`` is reported beside it. The numba kernel is compiled before timing.
- rollout: one 5 s rollout at 1 kHz of 7 joints with stiffness and damping. Baseline in the same
  run: the same semi-implicit Euler integration as a per-step Python loop over numpy arrays.

BLAS runs single-threaded (set before numpy loads) so that timings on a shared machine do not
depend on idle threads spinning; medians of repeated runs are reported.
Prints one JSON object per line; the last line is ``{"bench": "learn", ...}``.
Run: ``python bench/bench_learn.py [--quick]``
"""

from __future__ import annotations

import os

for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import argparse  # noqa: E402

import numpy as np  # noqa: E402
from _timing import emit, median_ms  # noqa: E402
from dtaidistance import dtw as dtai_dtw  # noqa: E402
from dtaidistance import dtw_ndim  # noqa: E402

from compliant_demo.alignment import band_radius, dtw  # noqa: E402
from compliant_demo.primitives import fit_skill  # noqa: E402

N_JOINTS = 7
N_SAMPLES = 5000
DURATION_S = 5.0


def _demonstrations(n_demos: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented reach-and-press motions with per-demo amplitude, wobble and stiffness."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, DURATION_S, N_SAMPLES)
    s = t / DURATION_S
    shape = 10 * s**3 - 15 * s**4 + 6 * s**5
    amplitude = rng.uniform(0.5, 1.5, (n_demos, 1, N_JOINTS))
    wobble = 0.05 * np.sin(2 * np.pi * (s[None, :, None] + rng.uniform(0, 1, (n_demos, 1, 1))))
    position = rng.normal(0, 0.1, (n_demos, 1, N_JOINTS)) + amplitude * shape[None, :, None]
    position = position + wobble * np.sin(np.pi * s)[None, :, None]
    stiffness = 40.0 + 100.0 * np.exp(-0.5 * ((s - 0.5) / 0.1) ** 2)[None, :, None]
    stiffness = stiffness + rng.uniform(0, 5, (n_demos, 1, N_JOINTS))
    return t, position, stiffness


def _stacked_lstsq(skill, t: np.ndarray, position: np.ndarray) -> np.ndarray:
    """Baseline: global least squares of the classic forcing term over all demos (weights)."""
    dmp = skill.dmp
    tau = t[-1] - t[0]
    x = dmp.basis.phase((t - t[0]) / tau)
    psi = dmp.basis.activations(x)
    design = psi / psi.sum(axis=1, keepdims=True) * x[:, None]
    velocity = np.gradient(position, t, axis=1)
    acceleration = np.gradient(velocity, t, axis=1)
    goal = position[:, -1:, :]
    target = (tau**2 * acceleration + dmp.alpha_z * tau * velocity
              - dmp.alpha_z * dmp.beta_z * (goal - position))
    stacked = np.tile(design, (position.shape[0], 1))
    return np.linalg.lstsq(stacked, target.reshape(-1, N_JOINTS), rcond=None)[0]


def _loop_rollout(skill, dt: float) -> np.ndarray:
    """Baseline: per-step semi-implicit Euler of the same primitive in plain Python."""
    dmp = skill.dmp
    start, goal = np.asarray(skill.start), np.asarray(skill.goal)
    weights, amplitude = np.asarray(skill.weights), np.asarray(skill.amplitude)
    tau, k_gain, d_gain = skill.duration_s, dmp.alpha_z * dmp.beta_z, dmp.alpha_z
    n = int(round(tau / dt)) + 1
    y, z = start.copy(), np.zeros_like(start)
    out = np.empty((n, start.size))
    out[0] = y
    for k in range(n - 1):
        x = np.exp(-dmp.alpha_x * k * dt / tau)
        psi = np.exp(-dmp.basis.widths * (x - dmp.basis.centres) ** 2)
        forcing = x * (weights @ psi) / psi.sum() * (goal - start) / amplitude
        z = z + dt / tau * (k_gain * (goal - y) - d_gain * z + forcing)
        y = y + dt / tau * z
        out[k + 1] = y
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    args = parser.parse_args()
    repeats = 3 if args.quick else 9
    joints = [f"joint{i}" for i in range(1, N_JOINTS + 1)]

    t, position, stiffness = _demonstrations(10, seed=1)

    def fit():
        return fit_skill(t, position, stiffness, joints=joints, n_basis=50,
                         stiffness_range=(10.0, 200.0), target_inertia=np.full(N_JOINTS, 0.05))

    skill = fit()
    fit_ms = median_ms(fit, repeats)
    lstsq_ms = median_ms(lambda: _stacked_lstsq(skill, t, position), repeats)
    emit({"bench": "learn.fit", "n_demos": 10, "n_joints": N_JOINTS, "n_samples": N_SAMPLES,
          "n_basis": 50, "fit_ms": round(fit_ms, 2), "stacked_lstsq_ms": round(lstsq_ms, 2),
          "fit_vs_lstsq_ratio": round(fit_ms / lstsq_ms, 3)})

    a = np.ascontiguousarray(position[0])
    b = np.ascontiguousarray(position[1] + 0.01 * np.sin(np.arange(N_SAMPLES))[:, None])
    radius = band_radius(N_SAMPLES, N_SAMPLES, 0.1)
    dtw_ms = median_ms(lambda: dtw(a, b, band=0.1), repeats)
    def reference():
        return dtai_dtw.warping_path(a, b, window=radius + 1, use_c=True, use_ndim=True,
                                     include_distance=True)

    reference_ms = median_ms(reference, repeats)
    distance_only_ms = median_ms(lambda: dtw_ndim.distance_fast(a, b, window=radius + 1), repeats)
    ours, _ = dtw(a, b, band=0.1)
    theirs = reference()[1]
    emit({"bench": "learn.dtw", "n_samples": N_SAMPLES, "n_joints": N_JOINTS, "band": 0.1,
          "radius": radius, "dtw_ms": round(dtw_ms, 2), "reference_path_ms": round(reference_ms, 2),
          "reference_distance_only_ms": round(distance_only_ms, 2),
          "dtw_vs_distance_only_ratio": round(dtw_ms / distance_only_ms, 3),
          "cost_relative_difference": abs(ours - theirs) / theirs})

    rollout_ms = median_ms(lambda: skill.rollout(dt=1e-3), repeats)
    loop_ms = median_ms(lambda: _loop_rollout(skill, 1e-3), max(1, repeats // 3))
    gap = np.abs(skill.rollout(dt=1e-3).position - _loop_rollout(skill, 1e-3)).max()
    emit({"bench": "learn.rollout", "duration_s": DURATION_S, "dt": 1e-3, "n_joints": N_JOINTS,
          "rollout_ms": round(rollout_ms, 3), "python_loop_ms": round(loop_ms, 2),
          "rollout_vs_loop_ratio": round(rollout_ms / loop_ms, 4),
          "max_position_gap_rad": float(gap)})

    emit({"bench": "learn", "fit_ms": round(fit_ms, 2), "dtw_ms": round(dtw_ms, 2),
          "dtw_vs_reference_ratio": round(dtw_ms / reference_ms, 3),
          "rollout_ms": round(rollout_ms, 3)})


if __name__ == "__main__":
    main()
