"""Simulation of variable-stiffness joints: mechanisms, batched integration and energy bookkeeping."""
