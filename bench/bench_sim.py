"""Benchmark of the batched joint simulation against scipy's solve_ivp on the same model.

1,000 perturbed scenarios of the two-joint cork_seat arm (soft approach, stiff press, soft
retreat; 5 s at 1 kHz) on the antagonistic mechanism with a mixed campaign of perturbations.
Reports simulated seconds per wall second on one core, the per-scenario speed-up over
``solve_ivp`` (RK45, rtol 1e-8) timed on a sample of the same scenarios in the same run, and the
largest angle error against it, separately for scenarios with and without contact. One JSON
object per line; the last line is ``{"bench": "sim", ...}``.
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import time  # noqa: E402

import numpy as np  # noqa: E402
from _timing import emit  # noqa: E402

from compliant_demo.models import AntagonisticParams, JointParams  # noqa: E402
from compliant_demo.perturbation import (  # noqa: E402
    CampaignSpec,
    Fixed,
    LogUniform,
    Uniform,
    draw_scenarios,
)
from compliant_demo.sim import simulate  # noqa: E402
from compliant_demo.sim.reference import reference_solve  # noqa: E402

N_SCENARIOS = 1000
DURATION_S = 5.0
DT = 1e-3
DECIMATION = 10
SEED = 2026
N_REFERENCE_FREE, N_REFERENCE_CONTACT = 6, 3
REPEATS = 3

JOINTS = [
    JointParams(name="shoulder", inertia=0.08, gravity_mass=0.6, com_distance=0.15,
                viscous_damping=0.04, coulomb_friction=0.03, friction_smoothing_velocity=0.05),
    JointParams(name="elbow", inertia=0.03, viscous_damping=0.02, lower_limit=-0.4,
                upper_limit=1.6),
]
MECHANISM = AntagonisticParams(k1=6.0, k2=90.0, pretension_offset=0.02, stiffness_min=15.0,
                               stiffness_max=180.0)


def cork_seat_commands() -> tuple[np.ndarray, np.ndarray]:
    """Equilibrium (rad) and stiffness (N*m/rad) for 5 s, from a 100 Hz stream held at 1 kHz."""
    n = int(round(DURATION_S / DT))
    t = np.floor(np.arange(n) * DT / 0.01) * 0.01
    phase = np.clip(t / DURATION_S, 0.0, 1.0)
    reach = 0.5 - 0.5 * np.cos(np.pi * np.clip(phase / 0.5, 0, 1))  # approach, then hold
    retreat = 0.5 - 0.5 * np.cos(np.pi * np.clip((phase - 0.75) / 0.25, 0, 1))
    shoulder = 0.6 * reach - 0.4 * retreat
    elbow = 0.9 * reach - 0.5 * retreat
    press = np.exp(-(((phase - 0.6) / 0.1) ** 2))  # stiff press in the middle
    k_shoulder = 30.0 + 120.0 * press
    k_elbow = 25.0 + 100.0 * press
    return np.stack([shoulder, elbow], axis=1), np.stack([k_shoulder, k_elbow], axis=1)


CAMPAIGN = CampaignSpec(
    name="cork_seat_bench",
    kinds={"impulse": 2, "torque_step": 1, "torque_window": 2, "sinusoid": 1,
           "random_torque": 1, "wall": 2, "hold": 1},
    joints=[0, 1],
    perturbations_per_scenario=2,
    onset_s=Uniform(low=0.3, high=4.2),
    duration_s={"torque_step": Uniform(low=0.2, high=0.8),
                "torque_window": Uniform(low=0.1, high=0.5),
                "sinusoid": Uniform(low=0.3, high=1.0), "random_torque": Uniform(low=0.3, high=1.0),
                "wall": Uniform(low=0.3, high=1.5), "hold": Uniform(low=0.05, high=0.3),
                "impulse": Fixed(value=0.0)},
    magnitude={"impulse": LogUniform(low=0.005, high=0.05),
               "torque_step": Uniform(low=0.2, high=1.5),
               "torque_window": Uniform(low=0.3, high=2.0), "sinusoid": Uniform(low=0.1, high=0.8),
               "random_torque": Uniform(low=0.1, high=0.6), "wall": Uniform(low=150.0, high=600.0)},
    fields={"wall": {"position": Uniform(low=0.01, high=0.08), "relative": Fixed(value=1)},
            "sinusoid": {"frequency_hz": Uniform(low=0.5, high=6.0)}},
)


def main() -> None:
    equilibrium, stiffness = cork_seat_commands()
    schedules = draw_scenarios(CAMPAIGN, N_SCENARIOS, SEED)
    # warm-up: first calls pay for imports and caches
    simulate(JOINTS, MECHANISM, equilibrium[:200], stiffness[:200])

    simulated_s = N_SCENARIOS * DURATION_S
    timings = {}
    for method in ("rk4", "symplectic_euler"):
        walls, cpus = [], []
        for _ in range(REPEATS):
            start, start_cpu = time.perf_counter(), time.process_time()
            run = simulate(JOINTS, MECHANISM, equilibrium, stiffness, schedules=schedules,
                           decimation=DECIMATION, seed=SEED, method=method)
            walls.append(time.perf_counter() - start)
            # CPU time of this single-threaded process: what the code costs while other work
            # shares the machine (wall time then includes waiting for a core)
            cpus.append(time.process_time() - start_cpu)
        if method == "rk4":
            result = run
        # best of REPEATS: the run least disturbed by other processes (as timeit advises)
        timings[method] = (min(walls), min(cpus))
        emit({"bench": "sim_batch", "method": method, "n_scenarios": N_SCENARIOS,
              "duration_s": DURATION_S, "dt_s": DT, "wall_s": [round(w, 3) for w in walls],
              "cpu_s": [round(c, 3) for c in cpus],
              "realtime_factor": round(simulated_s / min(walls), 1)})
    wall_s, cpu_s = timings["rk4"]
    symplectic_s = timings["symplectic_euler"][0]
    per_scenario_s = wall_s / N_SCENARIOS

    contact = result.in_contact.any(axis=(0, 2))
    rng = np.random.default_rng(SEED)
    sample = [int(i) for i in rng.permutation(np.nonzero(~contact)[0])[:N_REFERENCE_FREE]]
    sample += [int(i) for i in rng.permutation(np.nonzero(contact)[0])[:N_REFERENCE_CONTACT]]
    errors = {False: 0.0, True: 0.0}
    ref_times = []
    for s in sample:
        start = time.perf_counter()
        q_ref, _ = reference_solve(JOINTS, MECHANISM, equilibrium, stiffness, schedules=schedules,
                                   scenario=s, dt=DT, seed=SEED, rtol=1e-8, atol=1e-10)
        ref_times.append(time.perf_counter() - start)
        error = float(np.max(np.abs(result.q[:, s] - q_ref[::DECIMATION])))
        errors[bool(contact[s])] = max(errors[bool(contact[s])], error)
        emit({"bench": "sim_reference", "scenario": s, "contact": bool(contact[s]),
                          "kinds": schedules[s].kinds, "solve_ivp_s": round(ref_times[-1], 3),
                          "max_abs_angle_error_rad": error})

    residual = np.abs(result.energy.balance_residual()[-1])
    scale = np.abs(result.energy.actuator_work[-1]) + result.energy.dissipated[-1] + 1e-12
    emit({
        "bench": "sim",
        "batch_realtime_factor": round(simulated_s / wall_s, 1),
        "batch_realtime_factor_cpu": round(simulated_s / cpu_s, 1),
        "speedup_vs_solve_ivp": round(float(np.mean(ref_times)) / per_scenario_s, 1),
        "max_abs_angle_error_rad": errors[False],
        "max_abs_angle_error_contact_rad": errors[True],
        "symplectic_realtime_factor": round(simulated_s / symplectic_s, 1),
        "n_scenarios": N_SCENARIOS,
        "scenarios_with_contact": int(contact.sum()),
        "reference_scenarios": len(sample),
        "median_energy_balance_residual_rel": float(np.median(residual / scale)),
    })


if __name__ == "__main__":
    main()
