"""Benchmark of stiffness estimation: accuracy with limb inertia, and stiffness from variability.

- hand_inertia: simulated teaching (``compliant_demo.teaching``, default dither and sensor noise)
  of one joint held still while the true hand stiffness steps through 5, 15, 40, 90 and
  150 N*m/rad, with 0.02 kg*m^2 of hand and forearm inertia on the operator's side of the torque
  sensor. Median |K_hat - K| / K over excited windows (K: the window mean of the true stiffness)
  and the share of settled windows with an estimate. Baseline in the same run: the former
  two-regressor fit (stiffness and damping only, ``model_inertia=False``) on the same data.
- link_inertia_3pct: the same task measured by a joint-side sensor, with the link inertia given
  3 % too large; baseline: the two-regressor fit with the same wrong inertia. For both, the
  share of excited windows at a constant level (true stiffness varying by less than 1 % over
  the window) whose 95 % interval covers the true stiffness, and the median |z| of
  (K_hat - K) / std there (0.67 for a calibrated normal; the windows overlap, so these are
  descriptions, not tests).
- variability: for each of 10 seeds, 8 cork_seat demonstrations of the default simulated
  teacher (variance between demonstrations inversely proportional to its stiffness), one skill
  learned from their variability (``stiffness_source="variability"``, anchored at the teacher's
  own reference: 0.02 rad at 6 N*m/rad; the learner's default ``variability_model="auto"``:
  variance held in levels or pooled with a kernel, whichever predicts left-out demonstrations
  better, ``compliant_demo.variability.select_variability_model``) and one from the true
  stiffness (``"recorded"``, the same alignment, so both profiles sit on the same phase), both
  with the learner's defaults otherwise. Spearman correlation along the phase between the two
  profiles per joint: median, quartiles and minimum over seeds and joints; main key with
  ``alignment="resample"``, also with DTW (which explains much of the variation as timing,
  see ``compliant_demo.alignment.align_demonstrations``), with held levels always
  (``variability_model="levels"``, penalties chosen by ``select_level_penalties``; median
  number of levels ``variability_levels_median``), with the kernel always (``"kernel"``, the
  former default, bandwidth chosen by ``select_bandwidth``; median chosen bandwidth
  ``variability_bandwidth_median``), with the fixed bandwidth ``VARIABILITY_BANDWIDTH``
  (``_fixed_bandwidth``) and with the per-sample variance (``variability_bandwidth=0``);
  ``variability_levels_chosen_share``: share of the sets for which the default chose held
  levels. ``variability_pair_concordance``: share of pairs of phases (200-point grid) whose
  true stiffness differs by at least a factor 2 that the learned profile orders the same way
  (also for the kernel). ``variability_rank_correlation_ceiling_10pct``: Spearman correlation
  of the true profile with itself times a smooth seeded error of 10 % (correlation length
  0.05 of the phase): what a nearly perfect estimate scores where the truth is flat over most
  of the phase. ``variability_truth_rank_correlation``: the true skill's profile against the
  teacher's stiffness resampled directly (the phase mapping of the ground truth). Levels:
  median over seeds of the median ratio of the law's stiffness on the resampled set's
  variance (the model the learner's default chooses, and each model alone: ``_levels``,
  ``_kernel``) to the resampled true stiffness, in the press and in the soft approach (1 is
  right); baseline: the former min-max scaling of the precision over the range (2 to
  200 N*m/rad) on the per-sample variance.
- throughput: online estimator cost per sample, 2 joints in 10-sample chunks.

Prints one JSON object per line; the last line is ``{"bench": "estimation", ...}``.
Run: ``python bench/bench_estimation.py [--quick]``
"""

from __future__ import annotations

import os

for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import argparse  # noqa: E402

import numpy as np  # noqa: E402
from _timing import emit, median_ms  # noqa: E402
from scipy import stats  # noqa: E402
from scipy.ndimage import gaussian_filter1d  # noqa: E402

from compliant_demo.estimation import (  # noqa: E402
    SlidingStiffnessEstimator,
    estimate_stiffness_series,
)
from compliant_demo.learning import learn_skill  # noqa: E402
from compliant_demo.models import JointParams  # noqa: E402
from compliant_demo.teaching import (  # noqa: E402
    Waypoint,
    cork_seat_scenario,
    simulate_teaching,
    teaching_series,
    windowed_truth,
)
from compliant_demo.variability import (  # noqa: E402
    VARIABILITY_BANDWIDTH,
    held_level_variance,
    pooled_variance,
    select_bandwidth,
    select_level_penalties,
    select_variability_model,
    stiffness_from_variability,
)

LEVELS = (5.0, 15.0, 40.0, 90.0, 150.0)
HAND_INERTIA = 0.02
LINK_INERTIA = 0.08
STIFFNESS_RANGE = (2.0, 200.0)
PRESS = (0.5, 0.6)  # phase of the cork_seat press, where the teacher holds about 40 / 30
SOFT = (0.05, 0.3)  # the approach, where it holds about 6 / 4


def _steps_scenario(sensor: str):
    """One joint held still while the hand stiffness steps through LEVELS (invented task)."""
    waypoints = []
    for index, level in enumerate(LEVELS):
        start, stop = index / len(LEVELS), (index + 1) / len(LEVELS)
        waypoints.append(Waypoint(time_fraction=start, position=(0.3,), hand_stiffness=(level,)))
        waypoints.append(
            Waypoint(time_fraction=stop - 0.04 if index < len(LEVELS) - 1 else 1.0,
                     position=(0.3,), hand_stiffness=(level,))
        )
    joint = JointParams.model_validate(
        {"name": "shoulder", "inertia": LINK_INERTIA, "viscous_damping": 0.05}
    )
    return cork_seat_scenario(
        joints=(joint,), waypoints=tuple(waypoints), duration_s=15.0, hand_damping=(0.3,),
        hand_inertia=(HAND_INERTIA,), hand_inertia_per_stiffness=0.0, torque_sensor=sensor,
        timing_variation=0.0, stiffness_variation=0.0,
    )


def _accuracy(record, settings: dict) -> tuple[float, float, float, float]:
    """Median relative error over excited windows, the excited share of settled windows, and
    the 95 % interval's coverage and median |z| over excited windows at a constant level."""
    series = estimate_stiffness_series(record.t, record.position, record.torque, **settings)
    window = round(settings["window_s"] / (record.t[1] - record.t[0]))
    truth, variation = windowed_truth(record.hand_stiffness_truth, window)
    settled = np.arange(record.t.size) >= window + round(2.0 / settings["band_hz"][0] * 1000)
    excited = series.excited[:, 0] & settled
    error = np.abs(series.stiffness[excited, 0] / truth[excited, 0] - 1.0)
    median = float(np.median(error)) if error.size else float("nan")
    level = excited & (variation[:, 0] < 0.01)
    k_true = truth[level, 0]
    low, high = series.stiffness_low[level, 0], series.stiffness_high[level, 0]
    inside = (low <= k_true) & (k_true <= high)
    z = (series.stiffness[level, 0] - k_true) / series.stiffness_std[level, 0]
    return (median, float(excited.sum() / settled.sum()), float(inside.mean()),
            float(np.median(np.abs(z))))


def _estimation(seed: int) -> dict:
    results: dict = {}
    names = ("median_rel_error", "excited_fraction", "interval_coverage", "median_abs_z")
    for sensor, case, wrong in (("hand", "hand_inertia", None),
                                ("joint", "link_inertia_3pct", [1.03 * LINK_INERTIA])):
        scenario = _steps_scenario(sensor)
        record = simulate_teaching(scenario, seed)
        settings = scenario.estimator_settings()
        if wrong is not None:
            settings = dict(settings, link_inertia=wrong)
        for suffix, extra in (("", {}), ("_two_regressor", {"model_inertia": False})):
            figures = _accuracy(record, dict(settings, **extra))
            for name, value in zip(names, figures, strict=True):
                if suffix and name in ("interval_coverage", "median_abs_z"):
                    continue
                results[f"{name}_{case}{suffix}"] = value
    return results


def _min_max_profile(variance: np.ndarray, low: float, high: float) -> np.ndarray:
    """Baseline: the former law, precision stretched linearly over the whole range per joint."""
    precision = 1.0 / np.maximum(variance, 1e-6 * variance.max(axis=0))
    span = precision.max(axis=0) - precision.min(axis=0)
    return low + (high - low) * (precision - precision.min(axis=0)) / span


def _resampled(records, field: str, n_out: int) -> np.ndarray:
    """``field`` of each record linearly resampled to ``n_out`` points of normalised time."""
    phase = np.linspace(0.0, 1.0, n_out)
    return np.array([
        np.column_stack([np.interp(phase, (r.t - r.t[0]) / (r.t[-1] - r.t[0]), column)
                         for column in getattr(r, field).T])
        for r in records
    ])


def _pair_concordance(learned: np.ndarray, truth: np.ndarray, factor: float = 2.0) -> float:
    """Share of phase pairs whose truth differs by ``factor`` that ``learned`` orders alike."""
    grid = np.linspace(0, len(truth) - 1, 200).astype(int)
    a, b = learned[grid], truth[grid]
    higher, lower = np.nonzero(b[:, None] >= factor * b[None, :])
    return float(np.mean(a[higher] > a[lower]))


def _ceiling(truth: np.ndarray, seed: int) -> float:
    """Spearman of ``truth`` against itself times a smooth 10 % error (length 0.05 of phase)."""
    rng = np.random.default_rng(seed)
    length = 0.05 * len(truth)
    error = gaussian_filter1d(rng.normal(size=len(truth) + 400), length, mode="wrap")[200:-200]
    return float(stats.spearmanr(truth * np.exp(0.1 * error / error.std()), truth)[0])


def _variability(seeds: list[int]) -> dict:
    scenario = cork_seat_scenario()
    joints = list(scenario.joint_names)
    inertia = [joint.inertia for joint in scenario.joints]
    rho: dict[str, list[float]] = {"resample": [], "dtw": [], "kernel": [], "levels": [],
                                   "fixed_bandwidth": [], "per_sample": []}
    bandwidths = {"fixed_bandwidth": VARIABILITY_BANDWIDTH, "per_sample": 0.0}
    extra: dict[str, list[float]] = {"pair": [], "pair_kernel": [], "ceiling": [], "truth": [],
                                     "bandwidth": [], "levels": [], "chose_levels": []}
    levels: dict[str, list[float]] = {
        phase + suffix: [] for phase in ("press", "soft")
        for suffix in ("", "_levels", "_kernel", "_min_max")}
    for seed in seeds:
        demos = teaching_series(scenario, 8, seed)
        plain = [(r.t - r.t[0], r.position) for r in demos]
        truth = [{"t": r.t - r.t[0], "position": r.position, "stiffness": r.hand_stiffness_truth}
                 for r in demos]
        for name in rho:
            alignment = "dtw" if name == "dtw" else "resample"
            model = {"resample": "auto", "dtw": "auto", "levels": "levels"}.get(name, "kernel")
            common = dict(joints=joints, stiffness_range=STIFFNESS_RANGE, alignment=alignment,
                          target_inertia=inertia)
            learned = learn_skill(plain, stiffness_source="variability",
                                  variability_reference=(0.02, 6.0), variability_model=model,
                                  variability_bandwidth=bandwidths.get(name), **common)
            reference = learn_skill(truth, stiffness_source="recorded", **common)
            a, b = learned.rollout(dt=0.002).stiffness, reference.rollout(dt=0.002).stiffness
            n = min(len(a), len(b))
            rho[name] += [float(stats.spearmanr(a[:n, j], b[:n, j])[0]) for j in range(2)]
            if name == "kernel":
                extra["bandwidth"].append(learned.provenance.alignment["variability_bandwidth"])
                extra["pair_kernel"] += [_pair_concordance(a[:n, j], b[:n, j]) for j in range(2)]
            if name == "levels":
                extra["levels"] += learned.provenance.alignment["variability_levels"]
            if name == "resample":
                extra["chose_levels"].append(
                    learned.provenance.alignment["variability_model"] == "levels")
                extra["pair"] += [_pair_concordance(a[:n, j], b[:n, j]) for j in range(2)]
                extra["ceiling"] += [_ceiling(b[:n, j], seed + j) for j in range(2)]
                direct = _resampled(demos, "hand_stiffness_truth", n).mean(axis=0)
                extra["truth"] += [float(stats.spearmanr(direct[:, j], b[:n, j])[0])
                                   for j in range(2)]
        # Levels on the resampled set itself, before any profile fit.
        n_out = int(np.median([r.t.size for r in demos]))
        positions = _resampled(demos, "position", n_out)
        estimates = {
            "_levels": held_level_variance(positions, *select_level_penalties(positions)),
            "_kernel": pooled_variance(positions, select_bandwidth(positions)),
        }
        estimates[""] = estimates["_" + select_variability_model(positions)]
        k_true = _resampled(demos, "hand_stiffness_truth", n_out).mean(axis=0)
        anchor = dict(n_demos=8, reference_std=0.02, reference_stiffness=6.0)
        laws = {
            suffix: stiffness_from_variability(estimate.variance, *STIFFNESS_RANGE, **anchor,
                                               degrees_of_freedom=estimate.degrees_of_freedom)
            for suffix, estimate in estimates.items()
        } | {
            "_min_max": _min_max_profile(positions.var(axis=0, ddof=1), *STIFFNESS_RANGE),
        }
        for phase, (low, high) in (("press", PRESS), ("soft", SOFT)):
            part = slice(int(low * n_out), int(high * n_out))
            for suffix, profile in laws.items():
                levels[phase + suffix].append(float(np.median(profile[part] / k_true[part])))
    main = np.array(rho["resample"])
    return {
        "variability_rank_correlation": float(np.median(main)),
        "variability_rank_correlation_min": float(main.min()),
        "variability_rank_correlation_q25": float(np.quantile(main, 0.25)),
        "variability_rank_correlation_q75": float(np.quantile(main, 0.75)),
        "variability_rank_correlation_per_sample": float(np.median(rho["per_sample"])),
        "variability_rank_correlation_dtw": float(np.median(rho["dtw"])),
        "variability_rank_correlation_kernel": float(np.median(rho["kernel"])),
        "variability_rank_correlation_kernel_q25": float(np.quantile(rho["kernel"], 0.25)),
        "variability_rank_correlation_kernel_min": float(np.min(rho["kernel"])),
        "variability_rank_correlation_levels": float(np.median(rho["levels"])),
        "variability_rank_correlation_levels_q25": float(np.quantile(rho["levels"], 0.25)),
        "variability_rank_correlation_levels_min": float(np.min(rho["levels"])),
        "variability_rank_correlation_fixed_bandwidth": float(np.median(rho["fixed_bandwidth"])),
        "variability_levels_chosen_share": float(np.mean(extra["chose_levels"])),
        "variability_bandwidth_median": float(np.median(extra["bandwidth"])),
        "variability_levels_median": float(np.median(extra["levels"])),
        "variability_pair_concordance": float(np.median(extra["pair"])),
        "variability_pair_concordance_min": float(np.min(extra["pair"])),
        "variability_pair_concordance_kernel": float(np.median(extra["pair_kernel"])),
        "variability_pair_concordance_kernel_min": float(np.min(extra["pair_kernel"])),
        "variability_rank_correlation_ceiling_10pct": float(np.median(extra["ceiling"])),
        "variability_truth_rank_correlation": float(np.median(extra["truth"])),
        **{f"variability_{name}_level_ratio": float(np.median(values))
           for name, values in levels.items()},
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer seeds and repeats")
    args = parser.parse_args()
    seeds = [101, 202] if args.quick else list(range(101, 1111, 101))

    estimation = _estimation(seed=7)
    emit({"bench": "estimation.accuracy", "levels_nm_per_rad": list(LEVELS),
          "hand_inertia_kg_m2": HAND_INERTIA, "link_inertia_kg_m2": LINK_INERTIA,
          **{key: round(value, 4) for key, value in estimation.items()}})

    variability = _variability(seeds)
    emit({"bench": "estimation.variability", "seeds": seeds, "n_demos": 8,
          **{key: round(value, 4) for key, value in variability.items()}})

    scenario = cork_seat_scenario()
    record = simulate_teaching(scenario, 3)
    estimator = SlidingStiffnessEstimator(2, rate_hz=scenario.rate_hz,
                                          **scenario.estimator_settings())

    def stream() -> None:
        estimator.reset()
        for start in range(0, record.t.size, 10):
            estimator.update(record.position[start:start + 10], record.torque[start:start + 10])

    per_sample_us = 1000.0 * median_ms(stream, 1 if args.quick else 3) / record.t.size
    emit({"bench": "estimation.throughput", "n_joints": 2, "chunk": 10,
          "update_us_per_sample": round(per_sample_us, 2)})

    emit({"bench": "estimation",
          **{key: round(value, 4) for key, value in {**estimation, **variability}.items()},
          "update_us_per_sample": round(per_sample_us, 2)})


if __name__ == "__main__":
    main()
