"""Simulation of variable-stiffness joints: mechanisms, batched integration and energy bookkeeping.

``simulate`` runs whole command arrays for a batch of perturbed scenarios; ``Simulator`` steps
one command at a time (the replay node); ``check_step_stability`` refuses a step the stiffest
setting cannot take. See the README section "Simulation".
"""

from compliant_demo.sim.integrate import GRAVITY, Simulator, simulate
from compliant_demo.sim.mechanisms import (
    antagonistic_motor_angles,
    antagonistic_stiffness,
    antagonistic_torque,
)
from compliant_demo.sim.results import EnergyTraces, SimResult, StepState
from compliant_demo.sim.stability import METHODS, check_step_stability, largest_stable_step

__all__ = [
    "GRAVITY",
    "METHODS",
    "EnergyTraces",
    "SimResult",
    "Simulator",
    "StepState",
    "simulate",
    "check_step_stability",
    "largest_stable_step",
    "antagonistic_motor_angles",
    "antagonistic_stiffness",
    "antagonistic_torque",
]
