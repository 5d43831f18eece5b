"""Shared inputs of the campaign, report and command-line tests: a skill learned from the simulated
teacher's cork_seat demonstrations, the plant it replays on, and stores holding them."""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np

from compliant_demo.campaign import ReplayCampaign, default_campaign_spec
from compliant_demo.learning import learn_skill, save_skill
from compliant_demo.plant import ReplayPlant
from compliant_demo.primitives import Skill, fit_skill
from compliant_demo.replay import ReplaySetup
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario, teaching_series

JOINTS = ("shoulder", "elbow")
TEACHING_SEED = 11


@functools.lru_cache(maxsize=1)
def cork_seat_records() -> tuple:
    """Three simulated cork_seat demonstrations (seeded)."""
    return tuple(teaching_series(cork_seat_scenario(), 3, seed=TEACHING_SEED))


@functools.lru_cache(maxsize=1)
def cork_seat_skill() -> Skill:
    """A skill learned from :func:`cork_seat_records` with the teacher's hand stiffness."""
    demos = [
        {"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth, "id": f"demo-{i}"}
        for i, r in enumerate(cork_seat_records())
    ]
    return learn_skill(
        demos, joints=list(JOINTS), n_basis=30, stiffness_range=(5.0, 200.0), name="cork_seat"
    )


def plant() -> ReplayPlant:
    """The teaching scenario's cork_seat joints with the ideal variable-impedance mechanism (its
    default settings): a mechanism with a damping input, unlike the package's default plant."""
    return ReplayPlant(joints=cork_seat_scenario().joints)


def campaign_job(
    n_scenarios: int = 14, seed: int = 5, target: ReplayPlant | None = None, **changes
) -> ReplayCampaign:
    """A short campaign of the cork_seat skill over every perturbation kind: the movement is
    played in 1.5 s so the tests stay fast. ``target`` defaults to :func:`plant`."""
    spec = default_campaign_spec(movement_s=1.5)
    setup_keys = ("duration_s", "settle_s", "dt", "method", "goal", "max_stiffness_rate")
    setup_settings = {"duration_s": 1.5, "settle_s": 0.3,
                      **{k: v for k, v in changes.items() if k in setup_keys}}
    job_settings = {"seed": seed, **{k: v for k, v in changes.items() if k not in setup_keys}}
    setup = ReplaySetup(cork_seat_skill(), target or plant(), **setup_settings)
    return ReplayCampaign(setup, spec, n_scenarios, **job_settings)


def store_with_demos_and_skill(path: Path, *, with_skill: bool = True) -> str | None:
    """Fill a store at ``path`` with the three demonstrations (stiffness channel: the teacher's
    hand stiffness) and, unless told otherwise, the skill; returns the skill's id."""
    with DemoStore(path, durable=False) as store:
        ids = []
        for record in cork_seat_records():
            ids.append(
                store.add_demonstration(
                    skill="cork_seat",
                    operator="operator_a",
                    joints=list(JOINTS),
                    t=record.t,
                    position=record.position,
                    velocity=record.velocity,
                    torque=record.torque,
                    stiffness=record.hand_stiffness_truth,
                    source="simulated",
                )
            )
        if not with_skill:
            return None
        skill = cork_seat_skill().model_copy(deep=True)
        skill.provenance.demonstration_ids = ids
        return save_skill(store, skill).id


def stationary_skill(
    stiffness: float, position: tuple[float, float] = (0.3, 0.8), duration_s: float = 2.0
) -> Skill:
    """A skill that holds one posture at a constant stiffness (start = goal)."""
    t = np.linspace(0.0, duration_s, 201)
    q = np.tile(np.asarray(position), (t.size, 1))
    return fit_skill(
        t,
        q,
        np.full_like(q, stiffness),
        joints=list(JOINTS),
        n_basis=10,
        formulation="goal_robust",
        name="hold_still",
        target_inertia=[j.inertia for j in plant().joints],
    )
