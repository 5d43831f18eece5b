"""Model uncertainty: plants drawn around the nominal one, and which drawn factor goes with failure.

A campaign's ``plant_variation`` maps a plant parameter (:data:`compliant_demo.perturbation.
PLANT_PARAMETERS`) to the
distribution of a multiplicative factor on its nominal value (for example a normal factor with
mean 1 and standard deviation 0.1: a 10 % spread). :func:`vary_plant` draws one factor per joint
and parameter and returns the plant a scenario runs on; the controller keeps its commands from the
nominal plant (feedforward, damping policy), as it would on a real robot whose parameters are known
only to within their spread. :func:`failure_drivers` then ranks the drawn factors by how well they
separate failed from passed scenarios (the area under the ROC curve, equivalently the
Mann-Whitney U statistic): a screening measure over one campaign, not a causal estimate.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from scipy.stats import rankdata

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import AntagonisticParams, BodyParams, IdealImpedanceParams
from compliant_demo.plant import ReplayPlant

__all__ = [
    "FailureDriver",
    "check_plant_variation",
    "vary_plant",
    "scenario_failed",
    "failure_drivers",
    "campaign_failure_drivers",
]

_JOINT_FIELDS = ("inertia", "gravity_mass", "viscous_damping", "coulomb_friction",
                 "torque_noise_std")
_MECHANISM_FIELDS = {
    "antagonistic": ("k1", "k2", "motor_time_constant"),
    "ideal": ("time_constant",),
}


class FactorDistribution(Protocol):
    """A distribution of :mod:`compliant_demo.perturbation` (``draw(rng, n)``)."""

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray: ...


def check_plant_variation(plant: ReplayPlant, names: Iterable[str]) -> None:
    """Refuse parameters the plant has no use for, naming the field and the plant.

    Raises
    ------
    InvalidInputError
        A parameter of the other mechanism kind, or ``gravity_mass`` on a coupled arm (its
        gravity load comes from the URDF's link masses: vary ``inertia``).
    """
    for name in names:
        if name in _JOINT_FIELDS:
            if name == "gravity_mass" and plant.chain is not None:
                raise InvalidInputError(
                    f"plant_variation.gravity_mass: the coupled arm {plant.chain.source!r} takes "
                    "its gravity load from the link masses; vary 'inertia' (mass and inertia "
                    "tensor together)")
            continue
        if name not in _MECHANISM_FIELDS[plant.mechanism.kind]:
            raise InvalidInputError(
                f"plant_variation.{name}: the {plant.mechanism.kind} mechanism has no {name!r} "
                f"(it varies {', '.join(_MECHANISM_FIELDS[plant.mechanism.kind])})")


def vary_plant(
    plant: ReplayPlant, variation: Mapping[str, FactorDistribution], rng: np.random.Generator
) -> tuple[ReplayPlant, dict[str, dict[str, float]]]:
    """A plant drawn around ``plant``: each parameter times a factor drawn per joint.

    Parameters
    ----------
    plant : the nominal plant
    variation : parameter name -> distribution of its factor, 1 (draws must be > 0)
    rng : drawn in the sorted order of the names, ``n_joints`` values each

    Returns
    -------
    plant : the drawn plant (one mechanism record per joint when a mechanism parameter varies)
    factors : parameter name -> joint name -> factor, 1

    Notes
    -----
    A drawn ``k1`` raises the mechanism's ``stiffness_min`` to at least 2*k1, the stiffness of
    the antagonistic pair with both springs at zero elongation (Migliore, Brown, DeWeerth, ICRA
    2005): a real pair cannot be softer.
    """
    check_plant_variation(plant, variation)
    n_joints = len(plant.joints)
    factors = {name: variation[name].draw(rng, n_joints) for name in sorted(variation)}
    for name, drawn in factors.items():
        bad = np.flatnonzero(~(drawn > 0))
        if bad.size:
            raise InvalidInputError(
                f"plant_variation.{name}: drew the factor {float(drawn[bad[0]])}; factors must "
                "be > 0")
    joints = list(plant.joints)
    for name in (n for n in _JOINT_FIELDS if n in factors):
        joints = [j.model_copy(update={name: getattr(j, name) * float(f)})
                  for j, f in zip(joints, factors[name], strict=True)]
    changes: dict[str, Any] = {"joints": tuple(joints)}
    if plant.chain is not None and "inertia" in factors:
        bodies = {b.joint: b for b in plant.chain.bodies}
        scaled = tuple(_scaled_body(bodies[j.name], float(f))
                       for j, f in zip(plant.joints, factors["inertia"], strict=True))
        changes["chain"] = plant.chain.model_copy(update={"bodies": scaled})
    mechanism_names = [n for n in _MECHANISM_FIELDS[plant.mechanism.kind] if n in factors]
    if mechanism_names:
        mechanisms = [
            _scaled_mechanism(m, {n: float(factors[n][i]) for n in mechanism_names})
            for i, m in enumerate(plant.mechanisms_for([j.name for j in plant.joints]))
        ]
        changes.update(mechanism=mechanisms[0], mechanisms=tuple(mechanisms))
    drawn_plant = ReplayPlant.model_validate({**plant.model_dump(), **changes})
    names = [j.name for j in plant.joints]
    return drawn_plant, {name: dict(zip(names, drawn.tolist(), strict=True))
                         for name, drawn in factors.items()}


def _scaled_body(body: BodyParams, factor: float) -> BodyParams:
    """The link with mass and inertia tensor times ``factor`` (same shape, denser or lighter)."""
    return body.model_copy(update={"mass": body.mass * factor,
                                   "inertia": tuple(v * factor for v in body.inertia)})


def _scaled_mechanism(
    mechanism: IdealImpedanceParams | AntagonisticParams, factors: Mapping[str, float]
) -> IdealImpedanceParams | AntagonisticParams:
    update = {name: getattr(mechanism, name) * f for name, f in factors.items()}
    if isinstance(mechanism, AntagonisticParams) and "k1" in update:
        update["stiffness_min"] = max(mechanism.stiffness_min, 2.0 * update["k1"])
        update["stiffness_max"] = max(mechanism.stiffness_max, update["stiffness_min"])
    return type(mechanism).model_validate({**mechanism.model_dump(), **update})


def scenario_failed(status: str, metrics: Mapping[str, Any]) -> bool:
    """A scenario fails when it left a limit (status other than ``"ok"``) or did not recover
    within the band from a perturbation that acted (``"not_recovered"``)."""
    return status != "ok" or "not_recovered" in metrics.get("perturbation_status", ())


@dataclass(frozen=True)
class FailureDriver:
    """How one drawn factor on one joint separates failed from passed scenarios.

    Attributes
    ----------
    parameter : name in :data:`compliant_demo.perturbation.PLANT_PARAMETERS`
    joint : joint name
    auc : probability that a failed scenario drew a larger factor than a passed one (ties count
        half), 1: 0.5 no association, 1 failures come with large factors, 0 with small ones
    n_failed, n_passed : scenarios on each side
    """

    parameter: str
    joint: str
    auc: float
    n_failed: int
    n_passed: int

    @property
    def rank_biserial(self) -> float:
        """Rank-biserial correlation 2*AUC - 1, in [-1, 1] (Kerby, Compr. Psychol. 3, 2014)."""
        return 2.0 * self.auc - 1.0

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready: parameter, joint, auc, rank_biserial, failed, passed."""
        return {"parameter": self.parameter, "joint": self.joint, "auc": self.auc,
                "rank_biserial": self.rank_biserial, "failed": self.n_failed,
                "passed": self.n_passed}

    def describe(self) -> str:
        """One line: the parameter, joint, direction and measure, with the counts."""
        larger = "larger" if self.auc >= 0.5 else "smaller"
        return (f"{self.parameter} on {self.joint}: failures come with {larger} factors, AUC "
                f"{self.auc:.2f} (rank-biserial {self.rank_biserial:+.2f}) over "
                f"{self.n_failed} failed and {self.n_passed} passed scenarios")


def failure_drivers(
    factors: Sequence[Mapping[str, Mapping[str, float]]], failed: Sequence[bool]
) -> list[FailureDriver]:
    """Each drawn factor's AUC against failure, strongest association first.

    Parameters
    ----------
    factors : per scenario, parameter -> joint -> factor (as :func:`vary_plant` returns them)
    failed : per scenario, whether it failed (:func:`scenario_failed`)

    Returns
    -------
    list of FailureDriver sorted by |AUC - 0.5| (descending; ties by parameter, joint); empty
    when there are no factors or no failed or no passed scenario (nothing to separate)

    Notes
    -----
    AUC = U / (n_failed * n_passed) with the Mann-Whitney U of the failed scenarios' factors,
    U = R - n_failed*(n_failed + 1)/2 from their mid-ranks R among all scenarios (Mann and
    Whitney, Ann. Math. Stat. 18(1), 1947; AUC = U/(n1*n0): Hanley and McNeil, Radiology
    143(1), 1982). One campaign's draws screen parameters; several parameters varied together
    and few failures make it a hint where to look, not a proof of cause.
    """
    failed_mask = np.asarray(failed, dtype=bool)
    if len(factors) != failed_mask.size:
        raise InvalidInputError(
            f"failed: {failed_mask.size} flags for {len(factors)} scenarios' factors")
    n_failed = int(failed_mask.sum())
    n_passed = failed_mask.size - n_failed
    if not factors or n_failed == 0 or n_passed == 0:
        return []
    keys = sorted((name, joint) for name, per_joint in factors[0].items() for joint in per_joint)
    for i, row in enumerate(factors):
        found = sorted((name, joint) for name, per_joint in row.items() for joint in per_joint)
        if found != keys:
            raise InvalidInputError(
                f"factors[{i}]: parameters and joints {found} differ from the first scenario's "
                f"{keys}")
    drivers = []
    for name, joint in keys:
        values = np.array([row[name][joint] for row in factors], dtype=float)
        u = rankdata(values)[failed_mask].sum() - n_failed * (n_failed + 1) / 2.0
        drivers.append(FailureDriver(name, joint, float(u / (n_failed * n_passed)),
                                     n_failed, n_passed))
    return sorted(drivers, key=lambda d: (-abs(d.auc - 0.5), d.parameter, d.joint))


def campaign_failure_drivers(results: Iterable[Any]) -> list[FailureDriver]:
    """:func:`failure_drivers` over stored campaign results (objects with ``status`` and
    ``metrics``) whose metrics hold ``plant_factors``; empty for a campaign on the nominal plant.
    """
    rows = [(r.metrics["plant_factors"], scenario_failed(r.status, r.metrics))
            for r in results if r.metrics.get("plant_factors")]
    return failure_drivers([f for f, _ in rows], [b for _, b in rows])
