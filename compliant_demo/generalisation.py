"""Generalisation of a skill to new goals and durations: which DMP form each joint learns, which
goals a plant admits, and the goals and durations a campaign draws per scenario.

The classic DMP form scales its forcing term by a = (g - y0)/(g_d - y0_d) (Ijspeert et al. 2013,
Neural Computation 25(2), sec. 2.1 and 3.1), so moving the goal by dg moves every point of the
path by up to dg * E/|g_d - y0_d|, where E is the demonstrated excursion (the path's range of
motion). For a motion that goes straight to its goal (|g_d - y0_d| = E) that is exactly dg, the
exact spatial scaling the form is made for; for an out-and-back motion (cork_seat's elbow:
0.136 rad net, 0.73 rad excursion) it is 5.4 dg, and a goal on the other side of the start
mirrors the motion. The goal-robust form (Hoffmann, Pastor, Park, Schaal, ICRA 2009) keeps the
demonstrated shape and lets its critically damped attractor carry the goal change, which moves
the path by about dg at most.
:func:`choose_formulations` picks the classic form where |g_d - y0_d| is at least
:data:`CLASSIC_MIN_NET_FRACTION` of E, else the goal-robust form; each joint can be overridden.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import JointParams
from compliant_demo.perturbation import CampaignSpec
from compliant_demo.primitives import Formulation

__all__ = [
    "CLASSIC_MIN_NET_FRACTION",
    "FORMULATION_CHOICES",
    "ScenarioTarget",
    "choose_formulations",
    "check_goal",
    "draw_target",
]

#: Values a per-joint form request may take: "auto" lets the criterion decide.
FORMULATION_CHOICES: tuple[str, ...] = ("auto", "classic", "goal_robust")

#: Least |g_d - y0_d| / excursion for the classic form. At 0.5 a goal moved by dg moves no point
#: of the path by more than 2 dg (the amplification is excursion/|g_d - y0_d|); above that the
#: classic form's exact spatial scaling is worth more than the goal-robust form's shape
#: keeping, below it a modest goal change throws the path a multiple of the change away
#: (our own choice; the factor 2 is a judgement, not a published figure).
CLASSIC_MIN_NET_FRACTION = 0.5


def _requested(
    requested: str | Mapping[str, str] | Sequence[str], joints: Sequence[str]
) -> list[str]:
    """One of :data:`FORMULATION_CHOICES` per joint from a word, a mapping or a sequence."""
    if isinstance(requested, str):
        choices = [requested] * len(joints)
    elif isinstance(requested, Mapping):
        unknown = [name for name in requested if name not in joints]
        if unknown:
            raise InvalidInputError(f"formulation: names joint {unknown[0]!r}, not one of "
                                    f"{list(joints)}")
        choices = [requested.get(name, "auto") for name in joints]
    else:
        choices = list(requested)
        if len(choices) != len(joints):
            raise InvalidInputError(f"formulation: {len(choices)} forms {choices!r} for "
                                    f"{len(joints)} joints {list(joints)}")
    for name, choice in zip(joints, choices, strict=True):
        if choice not in FORMULATION_CHOICES:
            raise InvalidInputError(f"formulation: {choice!r} for joint {name!r}; expected one "
                                    f"of {', '.join(FORMULATION_CHOICES)}")
    return choices


def choose_formulations(
    positions: ArrayLike,
    joints: Sequence[str],
    requested: str | Mapping[str, str] | Sequence[str] = "auto",
) -> tuple[list[Formulation], list[dict[str, Any]]]:
    """The DMP form of each joint, by the criterion of the module docstring unless requested.

    Parameters
    ----------
    positions : (n_demos, n_samples, n_joints) or (n_samples, n_joints) array, rad; time-aligned
        demonstrations
    joints : joint names, one per column
    requested : "auto", "classic" or "goal_robust" for every joint; or a mapping joint name ->
        choice (joints not named: "auto"); or one choice per joint

    Returns
    -------
    forms : one form per joint
    record : per joint {"joint", "formulation", "chosen_by" ("criterion" or "request"),
        "net_rad" |g_d - y0_d| of the mean demonstration, "excursion_rad" its range of motion,
        "net_fraction" (net/excursion, 0 for a joint that does not move), "threshold"}
    """
    stack = np.asarray(positions, dtype=float)
    mean = stack.mean(axis=0) if stack.ndim == 3 else stack
    if mean.ndim != 2 or mean.shape[1] != len(joints):
        raise InvalidInputError(f"positions: shape {stack.shape} does not hold one column per "
                                f"joint of {list(joints)}")
    choices = _requested(requested, joints)
    net = np.abs(mean[-1] - mean[0])
    excursion = np.ptp(mean, axis=0)
    fraction = np.divide(net, excursion, out=np.zeros_like(net), where=excursion > 0)
    forms: list[Formulation] = []
    record = []
    for j, (name, choice) in enumerate(zip(joints, choices, strict=True)):
        form: Formulation
        if choice == "auto":
            form = "classic" if fraction[j] >= CLASSIC_MIN_NET_FRACTION else "goal_robust"
        else:
            form = "classic" if choice == "classic" else "goal_robust"
        forms.append(form)
        record.append({
            "joint": name, "formulation": form,
            "chosen_by": "criterion" if choice == "auto" else "request",
            "net_rad": float(net[j]), "excursion_rad": float(excursion[j]),
            "net_fraction": float(fraction[j]), "threshold": CLASSIC_MIN_NET_FRACTION,
        })
    return forms, record


def check_goal(
    goal: Sequence[float], joints: Sequence[JointParams], label: str = "goal"
) -> tuple[float, ...]:
    """``goal`` (one angle per joint, rad) if it is finite and inside every joint's range
    [lower_limit, upper_limit]; InvalidInputError naming ``label`` and the value otherwise."""
    values = list(goal)
    names = [joint.name for joint in joints]
    if len(values) != len(joints):
        raise InvalidInputError(f"{label}: {len(values)} value(s) {values} for the "
                                f"{len(joints)} joints {names}; give one angle per joint, rad")
    for value, joint in zip(values, joints, strict=True):
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(
                value):
            raise InvalidInputError(f"{label}: {value!r} for joint {joint.name!r} is not a "
                                    "finite angle in rad")
        if not joint.lower_limit <= value <= joint.upper_limit:
            raise InvalidInputError(
                f"{label}: {value!r} rad for joint {joint.name!r} is outside its range "
                f"[{joint.lower_limit}, {joint.upper_limit}] rad")
    return tuple(float(value) for value in values)


@dataclass(frozen=True)
class ScenarioTarget:
    """The goal (rad per joint) and movement duration (s) of one generalisation scenario, with
    the drawn offsets (rad) and duration scale (1) they came from."""

    goal: tuple[float, ...]
    duration_s: float
    goal_offset_rad: tuple[float, ...]
    duration_scale: float


def draw_target(
    spec: CampaignSpec,
    goal: Sequence[float],
    duration_s: float,
    limits: ArrayLike,
    seed: int,
) -> ScenarioTarget:
    """Draw one scenario's goal and duration around ``goal`` (rad) and ``duration_s`` (s).

    Offsets of the joints ``spec.goal_offset_rad`` names (by index) are added to their goals;
    a goal that lands beyond a joint's range ``limits`` ((n_joints, 2) array, rad) is held at
    the range's edge (the stored goal is the one replayed). The duration is ``duration_s``
    times the drawn ``spec.duration_scale`` (1 when not drawn). ``seed`` seeds this draw only,
    so the scenario's perturbations are drawn exactly as in a campaign without these draws.
    """
    rng = np.random.default_rng(seed)
    bounds = np.asarray(limits, dtype=float)
    offsets = np.zeros(len(bounds))
    for index in sorted(spec.goal_offset_rad):
        if index >= len(bounds):
            raise InvalidInputError(f"goal_offset_rad: joint index {index} beyond the "
                                    f"{len(bounds)} joints")
        offsets[index] = spec.goal_offset_rad[index].draw(rng, 1)[0]
    scale = 1.0 if spec.duration_scale is None else float(spec.duration_scale.draw(rng, 1)[0])
    drawn: NDArray[np.float64] = np.clip(np.asarray(goal, dtype=float) + offsets,
                                         bounds[:, 0], bounds[:, 1])
    return ScenarioTarget(goal=tuple(drawn.tolist()), duration_s=duration_s * scale,
                          goal_offset_rad=tuple(offsets.tolist()), duration_scale=scale)
