"""Benchmark of the batched joint simulation against scipy's solve_ivp on the same model.

1,000 perturbed scenarios of the two-joint cork_seat arm (soft approach, stiff press, soft
retreat; 5 s at 1 kHz) on the antagonistic mechanism with a mixed campaign of perturbations.
Reports simulated seconds per wall second on one core, the per-scenario speed-up over
``solve_ivp`` (RK45, rtol 1e-8) timed on a sample of the same scenarios in the same run, and the
largest angle error against it, separately for scenarios with and without contact.

The coupled part runs the same campaign on the cork_seat arm read from its URDF (one rigid-body
chain, compiled kernel) on one numba thread, times a per-scenario RK4 loop calling Pinocchio's
``aba`` at every stage on a sample of those scenarios (torques and walls only: that loop has no
impulses or holds), runs a seven-joint example arm, checks accelerations against ``pin.aba``,
and times the coupled batch split over two worker processes forked as the campaign's pool
forks them (each half on one thread) against the whole batch in one process; beside it,
``machine_scaling_2_cores``: the same split of a pure-Python CPU loop, what the machine's two
cores give at that moment (a virtual machine whose second core is shared gives less than 2,
and the batch cannot scale better). CPU times come
from ``time.process_time``; the machine is shared, so the load average is reported beside them.
One JSON object per line; the last line is ``{"bench": "sim", ...}``.
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import concurrent.futures as cf  # noqa: E402
import multiprocessing  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pinocchio as pin  # noqa: E402
from _timing import emit  # noqa: E402

from compliant_demo.models import AntagonisticParams, JointParams  # noqa: E402
from compliant_demo.perturbation import (  # noqa: E402
    CampaignSpec,
    Fixed,
    LogUniform,
    Uniform,
    draw_scenarios,
)
from compliant_demo.plant import load_plant  # noqa: E402
from compliant_demo.sim import simulate  # noqa: E402
from compliant_demo.sim.reference import reference_solve  # noqa: E402
from compliant_demo.sim.rigid_body import ChainKernel  # noqa: E402
from compliant_demo.sim.urdf import pinocchio_model  # noqa: E402

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


CONFIG = Path(__file__).resolve().parent.parent / "config"
N_ARM7 = 200
N_PIN_LOOP = 3
# the per-scenario Pinocchio loop has no impulses or holds (the coupled arm handles them through
# its mass matrix inside the batched simulator only)
LOOP_KINDS = {"torque_step", "torque_window", "sinusoid", "random_torque", "wall"}


def arm7_commands(plant) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Equilibrium (rad), stiffness (N*m/rad) and damping (N*m*s/rad) for the 7-joint arm, 5 s:
    every joint swings a third of its range about its middle, stiffness at 40 % of its range,
    damping for a damping ratio of 0.5 on its apparent inertia (diagonal of M at zero)."""
    n = int(round(DURATION_S / DT))
    t = np.arange(n)[:, None] * DT
    lower = np.array([j.lower_limit for j in plant.joints])
    upper = np.array([j.upper_limit for j in plant.joints])
    middle, swing = 0.5 * (lower + upper), (upper - lower) / 6
    phase = np.arange(len(plant.joints)) * 0.7
    equilibrium = middle + swing * np.sin(2 * np.pi * 0.4 * t + phase)
    mechanisms = plant.mechanisms
    k = np.array([m.stiffness_min + 0.4 * (m.stiffness_max - m.stiffness_min) for m in mechanisms])
    inertia = np.array([j.inertia for j in plant.joints])
    damping = np.clip(2 * 0.5 * np.sqrt(k * inertia), [m.damping_min for m in mechanisms],
                      [m.damping_max for m in mechanisms])
    return equilibrium, np.broadcast_to(k, (n, k.size)), np.broadcast_to(damping, (n, k.size))


def max_rel_accel_error() -> float:
    """Largest |ours - pin.aba| / |pin.aba| over 500 random states of each shipped arm."""
    worst = 0.0
    for name in ("arm_cork_seat", "arm7_example"):
        plant = load_plant(CONFIG / f"{name}.yaml")
        model = pinocchio_model(Path(__file__).resolve().parent.parent / "compliant_demo"
                                / "data" / f"{name}.urdf")
        data = model.createData()
        rng = np.random.default_rng(SEED)
        n = model.nv
        q, dq, tau = (rng.uniform(-lim, lim, (n, 500)) for lim in (np.pi, 4.0, 6.0))
        ours = np.zeros((n, 500))
        ChainKernel(plant.chain).forward(q, dq, tau, np.ones((n, 500)), ours)
        ref = np.array([pin.aba(model, data, q[:, s], dq[:, s], tau[:, s])
                        for s in range(500)]).T
        worst = max(worst, float(np.max(np.abs(ours - ref) / np.abs(ref))))
    return worst


def _timed(run) -> tuple[object, float, float]:
    start, start_cpu = time.perf_counter(), time.process_time()
    result = run()
    return result, time.perf_counter() - start, time.process_time() - start_cpu


_POOL_JOB: dict = {}  # what forked workers simulate: set before the pool forks


def _pool_half(bounds: tuple[int, int]) -> float:
    """Worker: simulate scenarios [lo, hi) of the pool job; returns its CPU time, s."""
    job = _POOL_JOB
    lo, hi = bounds
    start = time.process_time()
    simulate(job["plant"].joints, job["plant"].mechanism, job["equilibrium"], job["stiffness"],
             schedules=job["schedules"][lo:hi], decimation=DECIMATION, seed=SEED,
             chain=job["plant"].chain)
    return time.process_time() - start


def two_process_wall(plant, equilibrium: np.ndarray, stiffness: np.ndarray,
                     schedules: list) -> float:
    """Wall time of the batch split in two halves over two forked worker processes, s (best of
    REPEATS, as the one-process time it is compared with; the workers load the compiled kernels
    on a short warm-up batch first)."""
    _POOL_JOB.update(plant=plant, equilibrium=equilibrium, stiffness=stiffness,
                     schedules=schedules)
    half = len(schedules) // 2
    with cf.ProcessPoolExecutor(max_workers=2,
                                mp_context=multiprocessing.get_context("fork")) as pool:
        list(pool.map(_pool_half, [(0, 2), (2, 4)]))
        walls = []
        for _ in range(REPEATS):
            start = time.perf_counter()
            list(pool.map(_pool_half, [(0, half), (half, len(schedules))]))
            walls.append(time.perf_counter() - start)
    return min(walls)


def _spin(count: int) -> int:
    """Pure-Python integer work: CPU only, no memory traffic to speak of."""
    total = 0
    for i in range(count):
        total += i * i
    return total


def machine_scaling(count: int = 5_000_000) -> float:
    """What two cores of this machine give now: ``_spin`` twice in this process against once in
    each of two forked workers, wall times, best of REPEATS each (the ceiling of
    ``parallel_scaling_2_cores`` at that moment; a shared or virtual machine gives less than
    2)."""
    one, two = [], []
    with cf.ProcessPoolExecutor(max_workers=2,
                                mp_context=multiprocessing.get_context("fork")) as pool:
        list(pool.map(_spin, [1000, 1000]))
        for _ in range(REPEATS):
            start = time.perf_counter()
            _spin(count)
            _spin(count)
            one.append(time.perf_counter() - start)
            start = time.perf_counter()
            list(pool.map(_spin, [count, count]))
            two.append(time.perf_counter() - start)
    return min(one) / min(two)


def coupled(equilibrium: np.ndarray, stiffness: np.ndarray, schedules: list) -> dict:
    """The coupled keys of the last line (see the module docstring)."""
    plant = load_plant(CONFIG / "arm_cork_seat.yaml")
    model = pinocchio_model(Path(__file__).resolve().parent.parent / "compliant_demo" / "data"
                            / "arm_cork_seat.urdf")
    data = model.createData()

    def batch():
        return simulate(plant.joints, plant.mechanism, equilibrium, stiffness,
                        schedules=schedules, decimation=DECIMATION, seed=SEED,
                        chain=plant.chain)

    # warm-up: compiled kernels load from the cache
    simulate(plant.joints, plant.mechanism, equilibrium[:200], stiffness[:200],
             chain=plant.chain)
    runs = [_timed(batch) for _ in range(REPEATS)]
    result = runs[0][0]
    wall_1, cpu_1 = min(r[1] for r in runs), min(r[2] for r in runs)
    wall_2 = two_process_wall(plant, equilibrium, stiffness, schedules)
    machine = machine_scaling()
    simulated_s = N_SCENARIOS * DURATION_S
    emit({"bench": "sim_coupled", "n_scenarios": N_SCENARIOS, "threads": 1,
          "wall_s": round(wall_1, 3), "cpu_s": round(cpu_1, 3), "wall_2_processes_s":
          round(wall_2, 3), "load_average": os.getloadavg()})

    eligible = [s for s, schedule in enumerate(schedules)
                if set(schedule.kinds) <= LOOP_KINDS and schedule.kinds]
    loop_cpu, loop_error = [], 0.0
    for s in eligible[:N_PIN_LOOP]:
        (q_ref, _), _, cpu = _timed(lambda s=s: reference_solve(
            plant.joints, plant.mechanism, equilibrium, stiffness, schedules=schedules,
            scenario=s, dt=DT, seed=SEED, method="RK4",
            forward_dynamics=lambda q, dq, tau: pin.aba(model, data, q, dq, tau)))
        loop_cpu.append(cpu)
        loop_error = max(loop_error, float(np.max(np.abs(result.q[:, s] - q_ref[::DECIMATION]))))
        emit({"bench": "sim_pinocchio_loop", "scenario": s, "kinds": schedules[s].kinds,
              "cpu_s": round(cpu, 3)})

    arm7 = load_plant(CONFIG / "arm7_example.yaml")
    eq7, k7, d7 = arm7_commands(arm7)
    spec7 = CAMPAIGN.model_copy(update={"joints": list(range(7))})
    schedules7 = draw_scenarios(spec7, N_ARM7, SEED)
    simulate(arm7.joints, arm7.mechanisms, eq7[:100], k7[:100], d7[:100], chain=arm7.chain)
    _, wall7, cpu7 = _timed(lambda: simulate(
        arm7.joints, arm7.mechanisms, eq7, k7, d7, schedules=schedules7,
        decimation=DECIMATION, seed=SEED, chain=arm7.chain))
    emit({"bench": "sim_arm7", "n_scenarios": N_ARM7, "threads": 1, "wall_s": round(wall7, 3),
          "cpu_s": round(cpu7, 3)})
    return {
        "coupled_realtime_factor_cpu": round(simulated_s / cpu_1, 1),
        "speedup_vs_pinocchio_loop": round(float(np.mean(loop_cpu)) / (cpu_1 / N_SCENARIOS), 1),
        "max_abs_angle_error_vs_pinocchio_loop_rad": loop_error,
        "arm7_realtime_factor_cpu": round(N_ARM7 * DURATION_S / cpu7, 1),
        "max_rel_accel_error_vs_pinocchio": max_rel_accel_error(),
        "parallel_scaling_2_cores": round(wall_1 / wall_2, 2),
        "machine_scaling_2_cores": round(machine, 2),
        "load_average_1_5_15_min": [round(x, 2) for x in os.getloadavg()],
    }


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

    coupled_keys = coupled(equilibrium, stiffness, schedules)
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
        **coupled_keys,
    })


if __name__ == "__main__":
    main()
